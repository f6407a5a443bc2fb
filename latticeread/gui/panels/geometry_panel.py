"""Geometry panel: Fourier spectrum, lattice vectors, fit quality, constraints, nudges, drift.

A pure view of a :class:`latticeread.core.geometry.LatticeGeometry`. The only arithmetic it
does is display math (lengths, angles, nm conversion, where the reciprocal vectors of the
shown geometry fall in the spectrum) and the manual nudges (add a small step to a vector,
rotate or scale both vectors slightly), which produce a new ``LatticeGeometry``.

Methods (data in)
-----------------
``set_geometry(geometry, *, pixel_size_nm=None)``
    Show the vectors (pixels, and nm when the object-plane pixel size is known), angles,
    quality (peak-to-background, residual, sites used, warnings in red) and load the nudge
    boxes. Becomes the "revert" point of the manual nudges, except when it equals the
    geometry this panel last emitted with ``geometryEdited`` (the owner echoing the edit
    back). ``None`` clears.
``set_spectrum(spectrum_2d, peaks_xy=None, *, is_log=False)``
    ``spectrum_2d``: (H, W) magnitude of the 2-D FFT, shifted so zero frequency is at pixel
    ``(W // 2, H // 2)`` (complex input is reduced to its magnitude); shown as
    ``log10(1 + magnitude)`` unless ``is_log``. ``peaks_xy``: (K, 2) detected reciprocal
    peaks in the same (x = column, y = row) pixel coordinates of the spectrum, marked with
    red crosses. The reciprocal vectors of the shown geometry are drawn as green circles.
``set_drift(frame_indices, offsets, trend=None, *, units="px")``
    Phase of every frame against frame index, plotted relative to the first frame with a
    finite offset (NaN rows, frames where the lattice was not seen, leave gaps). ``offsets``: (N, 2) offset ``(x, y)`` in
    pixels (``units="px"``) or phases along ``(a1, a2)`` in lattice sites
    (``units="sites"``). ``trend``: (N, 2) fitted linear trend at the same frame indices
    (drawn dashed; its slope is printed), or None.
``set_distortion(field)``
    A :class:`latticeread.core.distortion.DistortionField` (or None to hide the view): the
    measured shift of each block of the frame off the best perfect lattice (blue arrows) and
    what the fitted field leaves of it (red arrows), both magnified by the factor printed,
    with the field's one-line summary (applied or not, largest shift, scatter).
``set_brightness(brightness_map, frame_shape)``
    A :class:`latticeread.core.brightness.BrightnessMap` (or None): the relative brightness of
    one atom across the frame (1 at the map's centre), drawn in grey behind the distortion
    arrows (colour bar), with its one-line summary.
``clear()``
    Remove everything.

Signals (user actions out)
--------------------------
``reestimateRequested()``
    "re-estimate" pressed: estimate the geometry again from the frames.
``constraintsChanged(dict)``
    "apply" pressed in the constraint box. Keys present only when ticked:
    ``spacing_px`` (float, pixels; also ``spacing_nm`` when typed in nm), ``angle_deg``
    (direction of a1 from +x towards +y, image down, degrees), ``angle_between_deg``
    (degrees). An empty dict means "no constraints".
``geometryEdited(object)``
    A new ``LatticeGeometry`` after every manual nudge (each spin-box step, rotate, scale or
    revert), so the owner can redraw the grid overlay live. The quality is carried over
    from the geometry last given to ``set_geometry``.

Attributes for the owner: ``spectrum_plot`` and ``drift_plot`` (pyqtgraph PlotWidgets, for
plot export).
"""

from __future__ import annotations

import dataclasses
import math
from collections import Counter

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.core.geometry import LatticeGeometry
from latticeread.gui.axes import IntegerAxis, plain_plot
from latticeread.gui.panels import WARNING_STYLE, fmt, show_warnings

__all__ = ["GeometryPanel"]

_NUDGE_STEPS = (0.001, 0.01, 0.1, 1.0)  # pixels
_ROTATE_STEP_DEG = 0.05
_SCALE_STEP = 5e-4  # relative


def _deg(rad: float) -> float:
    return math.degrees(rad)


class GeometryPanel(QtWidgets.QWidget):
    """Lattice geometry: spectrum with peaks, vectors, quality, constraints, nudges, drift."""

    reestimateRequested = QtCore.Signal()
    constraintsChanged = QtCore.Signal(dict)
    geometryEdited = QtCore.Signal(object)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._geometry: LatticeGeometry | None = None  # shown (possibly nudged)
        self._reference: LatticeGeometry | None = None  # as given by set_geometry
        self._pixel_size_nm: float | None = None
        self._spectrum_shape: tuple[int, int] | None = None
        self._loading = False

        # --- spectrum -------------------------------------------------------------
        self.spectrum_plot = pg.PlotWidget(background="k")
        self.spectrum_plot.setToolTip(
            "Fourier spectrum of the frame(s), log magnitude, zero frequency in the centre. "
            "Red crosses: detected reciprocal-lattice peaks; green circles: where the primitive "
            "reciprocal vectors ±b1, ±b2 of the geometry shown here fall (they follow the manual "
            "adjustments). Scroll to zoom, drag to pan.")
        self.spectrum_plot.setMinimumSize(200, 200)
        sp = plain_plot(self.spectrum_plot, bottom="kx (FFT pixels)", left="ky (FFT pixels)", image=True)
        self._no_spectrum = pg.TextItem("no spectrum yet", color=(200, 200, 200), anchor=(0.5, 0.5))
        sp.addItem(self._no_spectrum, ignoreBounds=True)
        sp.setRange(xRange=(-1, 1), yRange=(-1, 1), padding=0)
        self._spectrum_image = pg.ImageItem(axisOrder="row-major")
        self._spectrum_image.setColorMap(pg.colormap.get("inferno"))
        sp.addItem(self._spectrum_image)
        self._peaks = pg.ScatterPlotItem(symbol="x", size=16, pen=pg.mkPen((255, 40, 40), width=2),
                                         brush=None)
        self._expected = pg.ScatterPlotItem(symbol="o", size=22, pen=pg.mkPen((60, 230, 90), width=2),
                                            brush=None)
        sp.addItem(self._peaks)
        sp.addItem(self._expected)

        # --- vectors and quality ----------------------------------------------------
        self.vectors_label = QtWidgets.QLabel("no geometry")
        self.vectors_label.setTextFormat(QtCore.Qt.TextFormat.RichText)
        self.vectors_label.setToolTip(
            "Lattice vectors a1 (rows) and a2 (columns): length in camera pixels (and in nm in "
            "the atom plane when the pixel size is known), direction from +x towards +y (image "
            "down), and the angle between them")
        self.quality_label = QtWidgets.QLabel("")
        self.quality_label.setWordWrap(True)
        self.quality_label.setToolTip(
            "Fit quality: height of the weaker Fourier peak over the spectral background "
            "(below ~5 the lattice is doubtful), RMS residual of the refinement, the "
            "number of bright sites used and, after an image-model fit, the statistical "
            "uncertainty of the spacing")
        self.warnings_label = QtWidgets.QLabel()
        self.warnings_label.setStyleSheet(WARNING_STYLE)
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setToolTip("Reasons why this lattice estimate may mislead")
        self.warnings_label.setVisible(False)
        self.edited_label = QtWidgets.QLabel("")
        self.edited_label.setStyleSheet("QLabel { color: #8a5a00; }")
        self.edited_label.setToolTip("The geometry has been nudged by hand since it was estimated")

        self.reestimate_button = QtWidgets.QPushButton("Re-estimate")
        self.reestimate_button.setToolTip("Estimate the lattice vectors and offset again from the "
                                          "frames, using the constraints if applied")
        self.reestimate_button.clicked.connect(self.reestimateRequested)

        info = QtWidgets.QVBoxLayout()
        info.addWidget(self.vectors_label)
        info.addWidget(self.quality_label)
        info.addWidget(self.edited_label)
        info.addWidget(self.warnings_label)
        info.addWidget(self.reestimate_button)
        info.addStretch(1)

        # spectrum beside the numbers in a wide dock, above them in a narrow one (resizeEvent)
        top = QtWidgets.QBoxLayout(QtWidgets.QBoxLayout.LeftToRight)
        top.addWidget(self.spectrum_plot, 3)
        top.addLayout(info, 2)
        self._top_layout = top

        # --- constraints -------------------------------------------------------------
        cons = QtWidgets.QGroupBox("Constraints from the lab calibration")
        cons.setToolTip("Fix quantities known from the optical set-up; the estimate then only "
                        "fits what is left free. With spacing and direction both fixed, Calibrate can "
                        "also fit a lattice finer than the PSF (no visible Fourier peaks) from them, "
                        "given the ideal Airy PSF in Analysis settings")
        grid = QtWidgets.QGridLayout(cons)
        self.fix_spacing = QtWidgets.QCheckBox("spacing")
        self.fix_spacing.setToolTip("Fix the length of both lattice vectors")
        self.spacing_box = QtWidgets.QDoubleSpinBox()
        self.spacing_box.setRange(0.1, 100000.0)
        self.spacing_box.setDecimals(4)
        self.spacing_box.setValue(5.0)
        self.spacing_box.setToolTip("Lattice spacing, in the unit chosen on the right")
        self.spacing_unit = QtWidgets.QComboBox()
        self.spacing_unit.addItems(["px", "nm"])
        self.spacing_unit.setToolTip("Unit of the spacing: camera pixels, or nm in the atom "
                                     "plane (needs the pixel size)")
        self.spacing_unit.model().item(1).setEnabled(False)
        self.fix_angle = QtWidgets.QCheckBox("a1 direction")
        self.fix_angle.setToolTip("Fix the direction of a1")
        self.angle_box = QtWidgets.QDoubleSpinBox()
        self.angle_box.setRange(-180.0, 180.0)
        self.angle_box.setDecimals(3)
        self.angle_box.setSuffix(" °")
        self.angle_box.setToolTip("Direction of a1 in degrees from +x towards +y (image down)")
        self.fix_between = QtWidgets.QCheckBox("angle between")
        self.fix_between.setToolTip("Fix the angle between a1 and a2 (90° for a square lattice)")
        self.between_box = QtWidgets.QDoubleSpinBox()
        self.between_box.setRange(1.0, 179.0)
        self.between_box.setDecimals(3)
        self.between_box.setValue(90.0)
        self.between_box.setSuffix(" °")
        self.between_box.setToolTip("Angle between a1 and a2 in degrees")
        for box in (self.spacing_box, self.angle_box, self.between_box):
            box.setMinimumWidth(90)  # narrower than its widest value: the dock may be narrow
        self.fill_constraints_button = QtWidgets.QPushButton("From current")
        self.fill_constraints_button.setToolTip("Copy spacing, direction and angle of the geometry "
                                                "shown into the constraint boxes")
        self.fill_constraints_button.clicked.connect(self._fill_constraints)
        self.apply_constraints_button = QtWidgets.QPushButton("Apply")
        self.apply_constraints_button.setToolTip("Send the ticked constraints; the next estimate "
                                                 "respects them (nothing ticked: no constraints)")
        self.apply_constraints_button.clicked.connect(self._emit_constraints)
        grid.addWidget(self.fix_spacing, 0, 0)
        grid.addWidget(self.spacing_box, 0, 1)
        grid.addWidget(self.spacing_unit, 0, 2)
        grid.addWidget(self.fix_angle, 1, 0)
        grid.addWidget(self.angle_box, 1, 1)
        grid.addWidget(self.fix_between, 2, 0)
        grid.addWidget(self.between_box, 2, 1)
        grid.addWidget(self.fill_constraints_button, 1, 2)
        grid.addWidget(self.apply_constraints_button, 2, 2)

        # --- manual nudges -------------------------------------------------------------
        nudge = QtWidgets.QGroupBox("Manual adjustment")
        nudge.setToolTip("Small corrections by hand; the grid overlay follows every step")
        ng = QtWidgets.QGridLayout(nudge)
        self._boxes: dict[str, QtWidgets.QDoubleSpinBox] = {}
        names = (("a1", "a1 (rows)"), ("a2", "a2 (columns)"), ("offset", "offset (site 0,0)"))
        for r, (key, text) in enumerate(names):
            ng.addWidget(QtWidgets.QLabel(text), r, 0)
            for c, comp in enumerate("xy"):
                box = QtWidgets.QDoubleSpinBox()
                box.setRange(-1e5, 1e5)
                box.setDecimals(4)
                box.setSingleStep(0.01)
                box.setPrefix(f"{comp} ")
                box.setSuffix(" px")
                box.setKeyboardTracking(False)
                box.setMinimumWidth(96)  # narrower than its widest value: the dock may be narrow
                box.setToolTip(f"{comp} component of {text.split()[0]} in pixels; use the arrows, "
                               "the mouse wheel or arrow keys for steps of the size set below")
                box.valueChanged.connect(lambda value, k=key, i=c: self._on_box_changed(k, i, value))
                self._boxes[f"{key}_{comp}"] = box
                ng.addWidget(box, r, 1 + c)
        self.step_combo = QtWidgets.QComboBox()
        for s in _NUDGE_STEPS:
            self.step_combo.addItem(f"{s:g} px", s)
        self.step_combo.setCurrentIndex(1)
        self.step_combo.setToolTip("Step of one arrow click in the boxes above (pixels)")
        self.step_combo.currentIndexChanged.connect(self._on_step_changed)
        self.rotate_minus = QtWidgets.QToolButton()
        self.rotate_minus.setText("⟲")
        self.rotate_minus.setToolTip(f"Rotate both vectors by -{_ROTATE_STEP_DEG}° about site (0, 0)")
        self.rotate_plus = QtWidgets.QToolButton()
        self.rotate_plus.setText("⟳")
        self.rotate_plus.setToolTip(f"Rotate both vectors by +{_ROTATE_STEP_DEG}° about site (0, 0)")
        self.scale_minus = QtWidgets.QToolButton()
        self.scale_minus.setText("−")
        self.scale_minus.setToolTip(f"Shrink both vectors by {_SCALE_STEP * 100:g} %")
        self.scale_plus = QtWidgets.QToolButton()
        self.scale_plus.setText("+")
        self.scale_plus.setToolTip(f"Stretch both vectors by {_SCALE_STEP * 100:g} %")
        self.revert_button = QtWidgets.QPushButton("Revert")
        self.revert_button.setToolTip("Undo all manual adjustments: back to the estimated geometry")
        self.rotate_minus.clicked.connect(lambda: self._transform(rotate=-_ROTATE_STEP_DEG))
        self.rotate_plus.clicked.connect(lambda: self._transform(rotate=_ROTATE_STEP_DEG))
        self.scale_minus.clicked.connect(lambda: self._transform(scale=1 - _SCALE_STEP))
        self.scale_plus.clicked.connect(lambda: self._transform(scale=1 + _SCALE_STEP))
        self.revert_button.clicked.connect(self._revert)
        row = QtWidgets.QHBoxLayout()
        row.addWidget(QtWidgets.QLabel("step"))
        row.addWidget(self.step_combo)
        row.addSpacing(6)
        row.addWidget(QtWidgets.QLabel("rotate"))
        row.addWidget(self.rotate_minus)
        row.addWidget(self.rotate_plus)
        row.addStretch(1)
        ng.addLayout(row, 3, 0, 1, 3)
        row2 = QtWidgets.QHBoxLayout()
        row2.addWidget(QtWidgets.QLabel("scale"))
        row2.addWidget(self.scale_minus)
        row2.addWidget(self.scale_plus)
        row2.addStretch(1)
        row2.addWidget(self.revert_button)
        ng.addLayout(row2, 4, 0, 1, 3)

        # --- drift -----------------------------------------------------------------------
        self.drift_plot = pg.PlotWidget(background="w", axisItems={"bottom": IntegerAxis("bottom")})
        self.drift_plot.setToolTip("Lattice phase of every frame against frame index, as the change "
                                   "since the first frame shown, with its 1-sigma error bars where the "
                                   "frame's offset fit gave one and the fitted linear trend (dashed)")
        self.drift_plot.setMinimumHeight(150)
        dp = plain_plot(self.drift_plot, bottom="frame", left="offset (px)", grid=0.25)
        self._drift_legend = dp.addLegend(offset=(-10, 10), labelTextColor=(40, 40, 40))
        colours = ((30, 100, 200), (210, 90, 20))
        self._drift_curves = [
            pg.PlotDataItem(pen=pg.mkPen(c, width=1.5), symbol="o", symbolSize=5, symbolBrush=c,
                            symbolPen=None) for c in colours]
        self._trend_curves = [pg.PlotDataItem(pen=pg.mkPen(c, width=2, style=QtCore.Qt.PenStyle.DashLine))
                              for c in colours]
        for c in self._drift_curves + self._trend_curves:
            dp.addItem(c)
        self._drift_bars = [pg.ErrorBarItem(x=np.zeros(0), y=np.zeros(0), height=np.zeros(0), beam=0.2,
                                            pen=pg.mkPen(c, width=1)) for c in colours]
        for bar in self._drift_bars:
            dp.addItem(bar)
        self.drift_label = QtWidgets.QLabel("no drift data")
        self.drift_label.setWordWrap(True)
        self.drift_label.setToolTip("Spread of the phase over the stack and the slope of the "
                                    "linear trend per frame")

        # --- lens distortion: block shifts off the perfect lattice and the fit's residual -----
        self.distortion_plot = pg.PlotWidget(background="w")
        self.distortion_plot.setToolTip(
            "Lens distortion. Each arrow starts at the centroid of the atoms of one block of the frame. "
            "Blue: how far that block's lattice sits off the best perfect lattice; red: what is left "
            "after the fitted distortion field. Arrows are magnified by the factor in the text below. "
            "Grey background (bar on the right): relative brightness of one atom across the frame, "
            "1 at the centre of the brightness map.")
        self.distortion_plot.setMinimumHeight(150)
        dsp = plain_plot(self.distortion_plot, bottom="x (px)", left="y (px)", image=True)
        self._brightness_image = pg.ImageItem(axisOrder="row-major")
        self._brightness_image.setColorMap(pg.colormap.get("CET-L1"))
        self._brightness_image.setZValue(-10)
        dsp.addItem(self._brightness_image)
        self._brightness_bar = pg.ColorBarItem(values=(0.0, 1.0), colorMap=pg.colormap.get("CET-L1"),
                                               interactive=False, width=12)
        self._brightness_bar.setImageItem(self._brightness_image, insert_in=dsp)
        self._brightness_bar.setVisible(False)
        self._distortion_legend = dsp.addLegend(offset=(-10, 10), labelTextColor=(40, 40, 40))
        self._shift_arrows = pg.PlotDataItem(pen=pg.mkPen((30, 100, 200), width=2), connect="pairs")
        self._residual_arrows = pg.PlotDataItem(pen=pg.mkPen((210, 40, 40), width=2), connect="pairs")
        self._block_points = pg.ScatterPlotItem(size=4, brush=pg.mkBrush(60, 60, 60), pen=None)
        for item in (self._shift_arrows, self._residual_arrows, self._block_points):
            dsp.addItem(item)
        self._distortion_legend.addItem(self._shift_arrows, "off the perfect lattice")
        self._distortion_legend.addItem(self._residual_arrows, "left by the field")
        self.distortion_label = QtWidgets.QLabel("no distortion field")
        self.distortion_label.setWordWrap(True)
        self.distortion_label.setToolTip("The fitted lens-distortion field: whether the sites are placed "
                                         "with it, its largest shift, and the scatter of the blocks")
        self.brightness_label = QtWidgets.QLabel("")
        self.brightness_label.setWordWrap(True)
        self.brightness_label.setToolTip("The fitted brightness map: how many photons an atom gives across the "
                                         "field relative to the centre, and whether classification uses it")
        self.distortion_box = QtWidgets.QGroupBox("Across the field: lens distortion and atom brightness")
        dl = QtWidgets.QVBoxLayout(self.distortion_box)
        dl.setContentsMargins(4, 4, 4, 4)
        dl.addWidget(self.distortion_plot)
        dl.addWidget(self.distortion_label)
        dl.addWidget(self.brightness_label)
        self.distortion_box.setVisible(False)
        self._has_distortion = self._has_brightness = False

        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addLayout(top, 3)
        layout.addWidget(cons)
        layout.addWidget(nudge)
        layout.addWidget(self.distortion_box, 2)
        layout.addWidget(self.drift_plot, 2)
        layout.addWidget(self.drift_label)
        self._set_nudges_enabled(False)

    #: below this panel width (pixels) the numbers go under the spectrum
    STACK_BELOW_WIDTH = 560

    def resizeEvent(self, event) -> None:
        super().resizeEvent(event)
        direction = (QtWidgets.QBoxLayout.TopToBottom if event.size().width() < self.STACK_BELOW_WIDTH
                     else QtWidgets.QBoxLayout.LeftToRight)
        if self._top_layout.direction() != direction:
            self._top_layout.setDirection(direction)

    # ------------------------------------------------------------------ data in
    def set_geometry(self, geometry: LatticeGeometry | None, *, pixel_size_nm: float | None = None) -> None:
        """Show ``geometry`` (pixels); ``pixel_size_nm`` adds lengths in nm. None clears."""
        self._pixel_size_nm = float(pixel_size_nm) if pixel_size_nm else None
        self.spacing_unit.model().item(1).setEnabled(self._pixel_size_nm is not None)
        if self._pixel_size_nm is None and self.spacing_unit.currentIndex() == 1:
            self.spacing_unit.setCurrentIndex(0)
        if geometry is not None and self._geometry is not None and geometry == self._geometry:
            # the owner echoes back the geometry this panel just emitted: keep the revert point
            self._geometry = geometry
            self._update_labels()
            return
        self._reference = geometry
        self._show(geometry)

    def set_spectrum(self, spectrum_2d, peaks_xy=None, *, is_log: bool = False) -> None:
        """Show an fft-shifted spectrum (H, W) and the detected peaks (K, 2) as (x, y) pixels."""
        self._no_spectrum.setVisible(spectrum_2d is None)
        if spectrum_2d is None:
            self._spectrum_image.clear()
            self._spectrum_shape = None
            self._peaks.setData([], [])
            self._update_expected()
            self._no_spectrum.setPos(0, 0)
            self.spectrum_plot.getPlotItem().setRange(xRange=(-1, 1), yRange=(-1, 1), padding=0)
            return
        s = np.asarray(spectrum_2d)
        if s.ndim != 2:
            raise ValueError(f"the spectrum must be a 2-D array, got shape {s.shape}")
        mag = np.abs(s).astype(float) if np.iscomplexobj(s) else s.astype(float)
        img = mag if is_log else np.log10(1.0 + np.abs(mag))
        img = np.where(np.isfinite(img), img, 0.0)
        self._spectrum_shape = img.shape
        hi = float(np.percentile(img, 99.9)) if img.size else 1.0
        lo = float(np.median(img)) if img.size else 0.0
        self._spectrum_image.setImage(img, levels=(lo, max(hi, lo + 1e-9)))
        # pixel (0, 0) centred on (0, 0): shift the image by half a pixel
        self._spectrum_image.setRect(QtCore.QRectF(-0.5, -0.5, img.shape[1], img.shape[0]))
        if peaks_xy is None or len(peaks_xy) == 0:
            self._peaks.setData([], [])
        else:
            p = np.asarray(peaks_xy, dtype=float).reshape(-1, 2)
            self._peaks.setData(p[:, 0], p[:, 1])
        self._update_expected()
        self.spectrum_plot.getPlotItem().autoRange(padding=0)

    def set_drift(self, frame_indices, offsets, trend=None, *, units: str = "px", sigma=None,
                  methods=None) -> None:
        """Plot per-frame phase (N, 2) against frame index; ``units`` "px" or "sites".

        ``sigma`` (N, 2), in the same units, draws 1-sigma error bars (NaN: none); ``methods``
        (N strings) names how each offset was found, counted in the label below the plot.
        """
        if units not in ("px", "sites"):
            raise ValueError(f"drift units must be 'px' or 'sites', got {units!r}")
        f = np.asarray(frame_indices, dtype=float).ravel()
        o = np.asarray(offsets, dtype=float).reshape(-1, 2) if np.size(offsets) else np.empty((0, 2))
        if o.shape[0] != f.size:
            raise ValueError(f"{f.size} frame indices but {o.shape[0]} offsets")
        names = ("x", "y") if units == "px" else ("along a1", "along a2")
        unit_text = "px" if units == "px" else "sites"
        dp = self.drift_plot.getPlotItem()
        # plot changes relative to the first frame so both components share one scale
        finite_rows = np.flatnonzero(np.isfinite(o).all(axis=1))
        ref = o[finite_rows[0]].copy() if finite_rows.size else np.zeros(2)
        dp.setLabel("left", "Δ offset (px)" if units == "px" else "Δ phase (sites)")
        self._drift_legend.clear()
        for i, curve in enumerate(self._drift_curves):
            curve.setData(f, o[:, i] - ref[i], connect="finite")
            self._drift_legend.addItem(curve, names[i])
        s = np.full_like(o, np.nan) if sigma is None else np.asarray(sigma, dtype=float).reshape(-1, 2)
        if s.shape != o.shape:
            raise ValueError(f"{f.size} frame indices but {s.shape[0]} offset sigmas")
        for i, bar in enumerate(self._drift_bars):
            ok = np.isfinite(s[:, i]) & np.isfinite(o[:, i])
            bar.setData(x=f[ok], y=o[ok, i] - ref[i], height=2 * s[ok, i])
        text = [f"{f.size} frames"]
        if methods is not None and len(methods):
            if len(methods) != f.size:
                raise ValueError(f"{f.size} frame indices but {len(methods)} offset methods")
            counts = Counter(m or "not recorded" for m in methods)
            text.append("offset from " + ", ".join(f"{m} ({n})" for m, n in sorted(counts.items())))
        if np.isfinite(s).any():
            text.append(f"largest 1-sigma {fmt(float(np.nanmax(np.hypot(s[:, 0], s[:, 1]))))} {unit_text}")
        if f.size:
            spread = np.nanmax(o, axis=0) - np.nanmin(o, axis=0)
            text.append(f"peak-to-peak {names[0]} {fmt(spread[0])} {unit_text}, "
                        f"{names[1]} {fmt(spread[1])} {unit_text}")
        if trend is not None and f.size:
            t = np.asarray(trend, dtype=float).reshape(-1, 2)
            if t.shape[0] != f.size:
                raise ValueError(f"{f.size} frame indices but {t.shape[0]} trend values")
            for i, curve in enumerate(self._trend_curves):
                curve.setData(f, t[:, i] - ref[i])
            if f.size > 1 and f[-1] != f[0]:
                slope = (t[-1] - t[0]) / (f[-1] - f[0])
                text.append(f"trend {names[0]} {fmt(slope[0])}, {names[1]} {fmt(slope[1])} {unit_text}/frame")
        else:
            for curve in self._trend_curves:
                curve.setData([], [])
        self.drift_label.setText(" · ".join(text))
        dp.autoRange()

    def set_distortion(self, field) -> None:
        """Show a DistortionField's measured block shifts and residuals (pixels); None hides the view."""
        self._has_distortion = field is not None
        self.distortion_box.setVisible(self._has_distortion or self._has_brightness)
        if field is None:
            for item in (self._shift_arrows, self._residual_arrows):
                item.setData([], [])
            self._block_points.setData([], [])
            self.distortion_label.setText("no lens-distortion field")
            return
        b = np.asarray(field.binned, float).reshape(-1, 6)
        if not len(b):
            for item in (self._shift_arrows, self._residual_arrows):
                item.setData([], [])
            self._block_points.setData([], [])
            self.distortion_label.setText(field.describe())
            return
        x, y = b[:, 0], b[:, 1]
        # magnify the longest arrow to about half the typical distance between blocks
        spread = max(float(np.ptp(x)), float(np.ptp(y)), 1.0)
        step = spread / max(np.sqrt(len(b)) - 1, 1)
        longest = float(np.max(np.hypot(b[:, 2], b[:, 3]))) or 1.0
        gain = max(1.0, 0.6 * step / longest)
        for item, (dx, dy) in ((self._shift_arrows, (b[:, 2], b[:, 3])), (self._residual_arrows, (b[:, 4], b[:, 5]))):
            xs = np.column_stack([x, x + gain * dx]).ravel()
            ys = np.column_stack([y, y + gain * dy]).ravel()
            item.setData(xs, ys)
        self._block_points.setData(x, y)
        self.distortion_label.setText(f"{field.describe()} · arrows magnified {gain:.0f}x")
        self.distortion_plot.getPlotItem().autoRange()

    def set_brightness(self, brightness, frame_shape=None) -> None:
        """Show a BrightnessMap over a frame of ``frame_shape`` (height, width) pixels; None hides it."""
        self._has_brightness = brightness is not None and frame_shape is not None and min(frame_shape) > 0
        self.distortion_box.setVisible(self._has_distortion or self._has_brightness)
        self._brightness_bar.setVisible(self._has_brightness)
        if not self._has_brightness:
            self._brightness_image.clear()
            self.brightness_label.setText("" if brightness is None else brightness.describe())
            return
        h, w = (int(v) for v in frame_shape)
        step = max(1, max(h, w) // 128)  # a coarse image is enough for a smooth map
        yy, xx = np.mgrid[0:h:step, 0:w:step]
        image = brightness.relative(xx, yy)
        self._brightness_image.setImage(image, levels=(0.0, max(1.0, float(image.max()))))
        self._brightness_image.setRect(QtCore.QRectF(-0.5, -0.5, xx.shape[1] * step, yy.shape[0] * step))
        self._brightness_bar.setLevels((0.0, max(1.0, float(image.max()))))
        self.brightness_label.setText(brightness.describe())
        self.distortion_plot.getPlotItem().autoRange()

    def clear(self) -> None:
        """Remove geometry, spectrum, distortion, brightness and drift."""
        self.set_geometry(None)
        self.set_spectrum(None)
        self.set_distortion(None)
        self.set_brightness(None)
        self.set_drift([], [])
        self.drift_label.setText("no drift data")

    @property
    def geometry(self) -> LatticeGeometry | None:
        """The geometry shown, including manual nudges."""
        return self._geometry

    # --------------------------------------------------------------- internals
    def _set_nudges_enabled(self, on: bool) -> None:
        for w in (*self._boxes.values(), self.rotate_minus, self.rotate_plus, self.scale_minus,
                  self.scale_plus, self.revert_button, self.fill_constraints_button):
            w.setEnabled(on)

    def _show(self, geometry: LatticeGeometry | None) -> None:
        self._geometry = geometry
        self._set_nudges_enabled(geometry is not None)
        if geometry is None:
            self.vectors_label.setText("no geometry")
            self.quality_label.setText("")
            self.edited_label.setText("")
            show_warnings(self.warnings_label, ())
            self._update_expected()
            return
        self._load_boxes(geometry)
        self._update_labels()
        self._update_expected()

    def _load_boxes(self, g: LatticeGeometry) -> None:
        self._loading = True
        try:
            for key, vec in (("a1", g.a1), ("a2", g.a2), ("offset", g.offset)):
                for comp, v in zip("xy", vec):
                    box = self._boxes[f"{key}_{comp}"]
                    if abs(box.value() - v) > 5e-5:
                        box.setValue(v)
        finally:
            self._loading = False

    def _length_text(self, px: float) -> str:
        text = f"{px:.4f} px"
        if self._pixel_size_nm is not None:
            text += f" = {px * self._pixel_size_nm:.1f} nm"
        return text

    def _update_labels(self) -> None:
        g = self._geometry
        l1, l2 = g.spacings
        t1, t2 = (_deg(a) for a in g.angles)
        rows = [
            ("a1", f"({g.a1[0]:.4f}, {g.a1[1]:.4f})", self._length_text(l1), f"{t1:.3f}°"),
            ("a2", f"({g.a2[0]:.4f}, {g.a2[1]:.4f})", self._length_text(l2), f"{t2:.3f}°"),
        ]
        html = ["<table cellspacing='3'><tr><th></th><th>(x, y) px</th><th>length</th><th>direction</th></tr>"]
        for r in rows:
            html.append("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>")
        html.append("</table>")
        html.append(f"angle between: <b>{_deg(g.angle_between):.3f}°</b> · "
                    f"offset ({g.offset[0]:.3f}, {g.offset[1]:.3f}) px")
        area = g.cell_area
        if self._pixel_size_nm is not None:
            html.append(f"<br>cell area {area:.3f} px² = {area * self._pixel_size_nm ** 2 / 1e6:.4f} µm²")
        else:
            html.append(f"<br>cell area {area:.3f} px²")
        self.vectors_label.setText("".join(html))
        q = g.quality
        precision = (f" · spacing ±{q.spacing_sigma:.1e} (1σ, relative)"
                     if np.isfinite(getattr(q, "spacing_sigma", float("nan"))) else "")
        self.quality_label.setText(
            f"peak/background {fmt(q.peak_to_background)} · residual {fmt(q.residual)} · "
            f"sites used {int(q.n_sites_used)}{precision}")
        show_warnings(self.warnings_label, q.warnings)
        edited = self._reference is not None and g != self._reference
        self.edited_label.setText("adjusted by hand (Revert to undo)" if edited else "")

    def _update_expected(self) -> None:
        g, shape = self._geometry, self._spectrum_shape
        if g is None or shape is None:
            self._expected.setData([], [])
            return
        h, w = shape
        b = g.reciprocal  # rows b1, b2 in cycles per pixel
        pts = np.array([b[0], -b[0], b[1], -b[1]])
        self._expected.setData(w // 2 + pts[:, 0] * w, h // 2 + pts[:, 1] * h)

    def _edited(self, geometry: LatticeGeometry) -> None:
        self._geometry = geometry
        self._load_boxes(geometry)
        self._update_labels()
        self._update_expected()
        self.geometryEdited.emit(geometry)

    def _on_box_changed(self, key: str, index: int, value: float) -> None:
        """One nudge box changed: replace that single component, keep the others exact."""
        if self._loading or self._geometry is None:
            return
        vec = list(getattr(self._geometry, key))
        vec[index] = float(value)
        try:
            g = dataclasses.replace(self._geometry, **{key: tuple(vec)})
        except ValueError:  # collinear vectors typed by hand: keep the last valid geometry
            self._load_boxes(self._geometry)
            return
        self._edited(g)

    def _on_step_changed(self, index: int) -> None:
        step = float(self.step_combo.itemData(index))
        for box in self._boxes.values():
            box.setSingleStep(step)

    def _transform(self, *, rotate: float = 0.0, scale: float = 1.0) -> None:
        g = self._geometry
        if g is None:
            return
        c, s = math.cos(math.radians(rotate)), math.sin(math.radians(rotate))
        m = scale * np.array([[c, -s], [s, c]])
        self._edited(dataclasses.replace(g, a1=tuple(m @ np.asarray(g.a1)), a2=tuple(m @ np.asarray(g.a2))))

    def _revert(self) -> None:
        if self._reference is not None:
            self._edited(self._reference)

    def _fill_constraints(self) -> None:
        g = self._geometry
        if g is None:
            return
        spacing = float(np.mean(g.spacings))
        if self.spacing_unit.currentText() == "nm" and self._pixel_size_nm:
            spacing *= self._pixel_size_nm
        self.spacing_box.setValue(spacing)
        self.angle_box.setValue(_deg(g.angles[0]))
        self.between_box.setValue(_deg(g.angle_between))

    def _emit_constraints(self) -> None:
        out: dict = {}
        if self.fix_spacing.isChecked():
            value = float(self.spacing_box.value())
            if self.spacing_unit.currentText() == "nm" and self._pixel_size_nm:
                out["spacing_nm"] = value
                out["spacing_px"] = value / self._pixel_size_nm
            else:
                out["spacing_px"] = value
        if self.fix_angle.isChecked():
            out["angle_deg"] = float(self.angle_box.value())
        if self.fix_between.isChecked():
            out["angle_between_deg"] = float(self.between_box.value())
        self.constraintsChanged.emit(out)
