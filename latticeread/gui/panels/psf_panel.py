"""PSF panel: the image of one atom, its radial profile against the ideal Airy pattern.

A pure view of a :class:`latticeread.core.psf.PSFModel`. The only thing it evaluates is the
model itself (``psf.image``, ``psf.radial_profile``) and the ideal Airy pattern for the optics
typed into the panel (``latticeread.core.psf.airy_psf(...).radial_profile``).

Methods (data in)
-----------------
``set_psf(psf_model)``
    Show a PSFModel (kind airy/gaussian/empirical): a finely sampled image (pixels, site at
    the centre), the radial profile along +x compared with the ideal Airy pattern (both as
    densities of a unit-flux source, divided by the ideal peak), FWHM in pixels and nm,
    ellipticity and number of atoms used (from ``params["ellipticity"]``,
    ``params["n_atoms"]`` of empirical models) and any ``params["warnings"]``. None clears.
    A "log image" box switches the image to a logarithmic scale (display only).
``set_zones(zone_psfs)``
    Show a calibration's :class:`latticeread.core.psf_zones.ZonePSFs`: every zone's PSF
    image in its place in the field (each scaled to its own peak), its FWHM in pixels and
    ``few atoms`` where a zone had too few atoms for its own PSF, plus the zones' warnings.
    None hides the view.
``set_optics(*, numerical_aperture=None, wavelength_nm=None, pixel_size_nm=None)``
    Fill the optics boxes (e.g. from the calibration) without emitting ``opticsChanged``.
``optics()``
    The optics currently entered, as the dict described below.
``clear()``
    Remove the PSF.

Signals (user actions out)
--------------------------
``opticsChanged(dict)``
    The user changed an optics box; keys ``numerical_aperture``, ``wavelength_nm`` (nm,
    fluorescence) and ``pixel_size_nm`` (camera pixel projected into the atom plane, nm).
``estimateRequested()``
    "Estimate PSF" pressed: estimate the PSF from isolated atoms in the frames.

Attribute for the owner: ``profile_plot``, ``image_plot`` and ``zones_plot`` (pyqtgraph
PlotWidgets, for plot export).
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.core.psf import PSFModel, airy_psf
from latticeread.gui.axes import plain_plot
from latticeread.gui.panels import WARNING_STYLE, fmt, show_warnings

__all__ = ["PSFPanel"]

_IMAGE_SUPERSAMPLE = 4  # display samples per pixel and axis
_MEASURED_PEN = pg.mkPen((220, 110, 20), width=2.5)
_IDEAL_PEN = pg.mkPen((30, 90, 200), width=2, style=QtCore.Qt.PenStyle.DashLine)


class PSFPanel(QtWidgets.QWidget):
    """Point-spread function: image, radial profile against the ideal Airy pattern, numbers."""

    opticsChanged = QtCore.Signal(dict)
    estimateRequested = QtCore.Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        self._psf: PSFModel | None = None
        self._psf_image: np.ndarray | None = None
        self._zones = None
        self._zone_labels: list = []

        # --- image ------------------------------------------------------------------
        self.image_plot = pg.PlotWidget(background="k")
        self.image_plot.setToolTip("The PSF: image of one atom, finely sampled, in camera pixels "
                                   "from the atom position")
        self.image_plot.setMinimumSize(200, 200)
        ip = plain_plot(self.image_plot, bottom="x (px)", left="y (px)", image=True)
        self._image = pg.ImageItem(axisOrder="row-major")
        self._image.setColorMap(pg.colormap.get("viridis"))
        ip.addItem(self._image)

        # --- radial profile ---------------------------------------------------------------
        self.profile_plot = pg.PlotWidget(background="w")
        self.profile_plot.setToolTip(
            "Radial profile along +x: the PSF shown (orange) and the ideal Airy pattern for the "
            "optics entered below (blue dashed), both for the same total flux and divided by the "
            "ideal peak; vertical lines at half the FWHM")
        self.profile_plot.setMinimumSize(240, 200)
        pp = plain_plot(self.profile_plot, bottom="distance from atom (px)", left="intensity / ideal peak", grid=0.25)
        pp.addLegend(offset=(-10, 10), labelTextColor=(40, 40, 40))
        self._measured_curve = pg.PlotDataItem(pen=_MEASURED_PEN, name="PSF")
        self._ideal_curve = pg.PlotDataItem(pen=_IDEAL_PEN, name="ideal Airy")
        pp.addItem(self._measured_curve)
        pp.addItem(self._ideal_curve)
        self._measured_half = pg.InfiniteLine(angle=90, pen=pg.mkPen((220, 110, 20), width=1))
        self._ideal_half = pg.InfiniteLine(angle=90, pen=pg.mkPen((30, 90, 200), width=1,
                                                                  style=QtCore.Qt.PenStyle.DotLine))
        for line in (self._measured_half, self._ideal_half):
            line.setVisible(False)
            pp.addItem(line, ignoreBounds=True)

        # --- zone PSFs across the field ------------------------------------------------
        self.zones_plot = pg.PlotWidget(background="k")
        self.zones_plot.setToolTip("PSF measured in each zone of the field, in its place (top left = top left of "
                                   "the atoms' region), each scaled to its own peak; numbers: FWHM in pixels")
        self.zones_plot.setMinimumSize(200, 200)
        zp = plain_plot(self.zones_plot, bottom="zone column", left="zone row", image=True)
        self._zones_image = pg.ImageItem(axisOrder="row-major")
        self._zones_image.setColorMap(pg.colormap.get("viridis"))
        zp.addItem(self._zones_image)
        self.zones_plot.setVisible(False)

        plots = QtWidgets.QBoxLayout(QtWidgets.QBoxLayout.LeftToRight)
        plots.addWidget(self.image_plot, 2)
        plots.addWidget(self.profile_plot, 3)
        plots.addWidget(self.zones_plot, 2)

        # --- optics ---------------------------------------------------------------------
        optics = QtWidgets.QGroupBox("Optics for the ideal pattern")
        optics.setToolTip("Objective and wavelength that define the diffraction-limited PSF")
        form = QtWidgets.QFormLayout(optics)
        self.na_box = self._spin(0.05, 1.6, 3, 0.75, 0.01, "",
                                 "Numerical aperture of the objective (0.05 to 1.6)")
        self.wavelength_box = self._spin(100.0, 3000.0, 1, 767.0, 1.0, " nm",
                                         "Wavelength of the detected fluorescence, nanometres")
        self.pixel_box = self._spin(1.0, 100000.0, 2, 100.0, 1.0, " nm",
                                    "Size of one camera pixel projected into the atom plane, "
                                    "nanometres (pixel pitch / magnification)")
        form.addRow("NA", self.na_box)
        form.addRow("wavelength", self.wavelength_box)
        form.addRow("pixel size", self.pixel_box)

        self.log_check = QtWidgets.QCheckBox("log image")
        self.log_check.setToolTip("Show the PSF image on a logarithmic scale (three decades), to see "
                                  "the diffraction rings and aberrated wings")
        self.log_check.toggled.connect(lambda _on: self._show_image())

        self.estimate_button = QtWidgets.QPushButton("Estimate PSF")
        self.estimate_button.setToolTip("Estimate the PSF from isolated atoms in the frames "
                                        "(sparse frames work best)")
        self.estimate_button.clicked.connect(self.estimateRequested)

        self.numbers_label = QtWidgets.QLabel("no PSF")
        self.numbers_label.setTextFormat(QtCore.Qt.TextFormat.RichText)
        self.numbers_label.setToolTip(
            "FWHM of the PSF and of the ideal Airy pattern (0.514 λ/NA, Born & Wolf), their ratio, "
            "the peak relative to the ideal peak for the same flux, ellipticity and atoms used")
        self.warnings_label = QtWidgets.QLabel()
        self.warnings_label.setStyleSheet(WARNING_STYLE)
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setToolTip("Reasons why this PSF estimate may mislead")
        self.warnings_label.setVisible(False)

        right = QtWidgets.QVBoxLayout()
        right.addWidget(self.numbers_label)
        right.addWidget(self.warnings_label)
        right.addStretch(1)
        right.addWidget(self.log_check)
        right.addWidget(self.estimate_button)
        bottom = QtWidgets.QBoxLayout(QtWidgets.QBoxLayout.LeftToRight)
        bottom.addWidget(optics, 2)
        bottom.addLayout(right, 3)
        self._rows = (plots, bottom)  # side by side in a wide dock, stacked in a narrow one

        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addLayout(plots, 1)
        layout.addLayout(bottom)

        for box in (self.na_box, self.wavelength_box, self.pixel_box):
            box.valueChanged.connect(self._on_optics_changed)
        self._redraw()

    #: below this panel width (pixels) the plots and the boxes are stacked
    STACK_BELOW_WIDTH = 600

    def resizeEvent(self, event) -> None:
        super().resizeEvent(event)
        direction = (QtWidgets.QBoxLayout.TopToBottom if event.size().width() < self.STACK_BELOW_WIDTH
                     else QtWidgets.QBoxLayout.LeftToRight)
        for row in self._rows:
            if row.direction() != direction:
                row.setDirection(direction)

    def _spin(self, lo, hi, decimals, value, step, suffix, tip) -> QtWidgets.QDoubleSpinBox:
        box = QtWidgets.QDoubleSpinBox()
        box.setRange(lo, hi)
        box.setDecimals(decimals)
        box.setValue(value)
        box.setSingleStep(step)
        box.setSuffix(suffix)
        box.setKeyboardTracking(False)
        box.setToolTip(tip)
        return box

    # ------------------------------------------------------------------ data in
    def set_psf(self, psf_model: PSFModel | None) -> None:
        """Show ``psf_model`` (see module docstring); None clears."""
        self._psf = psf_model
        self._psf_image = None
        if psf_model is not None:
            self._psf_image = psf_model.image(supersample=_IMAGE_SUPERSAMPLE)
        self._show_image()
        if psf_model is not None:
            self.image_plot.getPlotItem().autoRange(padding=0)
        self._redraw()

    def set_zones(self, zone_psfs) -> None:
        """Show the zone PSFs of a calibration (see module docstring); None hides the view."""
        self._zones = zone_psfs
        zp = self.zones_plot.getPlotItem()
        for item in self._zone_labels:
            zp.removeItem(item)
        self._zone_labels = []
        if zone_psfs is None:
            self._zones_image.clear()
            self.zones_plot.setVisible(False)
            self._redraw()
            return
        rows, cols = zone_psfs.grid
        r = zone_psfs.radius
        s = 2  # display samples per pixel
        n = (2 * r + 1) * s
        mosaic = np.zeros((rows * n, cols * n))
        for k, psf in enumerate(zone_psfs.psfs):
            img = psf.image(supersample=s)[:n, :n]
            i, j = divmod(k, cols)
            top = float(np.nanmax(img)) or 1.0
            mosaic[i * n:i * n + img.shape[0], j * n:j * n + img.shape[1]] = img / top
        self._zones_image.setImage(mosaic, levels=(0.0, 1.0))
        self._zones_image.setRect(QtCore.QRectF(0.0, 0.0, float(cols), float(rows)))
        for k in range(rows * cols):
            i, j = divmod(k, cols)
            width = zone_psfs.fwhm[k]
            text = f"{width:.2f} px" if np.isfinite(width) else "-"
            if not zone_psfs.fitted[k]:
                text += "\nfew atoms"
            label = pg.TextItem(text, color=(255, 255, 255), anchor=(0, 0))
            label.setPos(j + 0.03, i + 0.03)
            zp.addItem(label)
            self._zone_labels.append(label)
        self.zones_plot.setVisible(True)
        zp.autoRange(padding=0)
        self._redraw()

    def _show_image(self) -> None:
        img = getattr(self, "_psf_image", None)
        if img is None:
            self._image.clear()
            return
        top = float(np.nanmax(img)) or 1.0
        if self.log_check.isChecked():
            shown = np.log10(np.clip(img / top, 1e-3, None))
            levels = (-3.0, 0.0)
        else:
            shown, levels = img, (0.0, top)
        s, r = _IMAGE_SUPERSAMPLE, self._psf.radius
        self._image.setImage(shown, levels=levels)
        half = 0.5 / s
        self._image.setRect(QtCore.QRectF(-r - half, -r - half, img.shape[1] / s, img.shape[0] / s))

    def set_optics(self, *, numerical_aperture=None, wavelength_nm=None, pixel_size_nm=None) -> None:
        """Fill the optics boxes without emitting ``opticsChanged`` (None leaves a box as is)."""
        for box, value in ((self.na_box, numerical_aperture), (self.wavelength_box, wavelength_nm),
                           (self.pixel_box, pixel_size_nm)):
            if value is None:
                continue
            blocked = box.blockSignals(True)
            box.setValue(float(value))
            box.blockSignals(blocked)
        self._redraw()

    def optics(self) -> dict:
        """The optics entered: numerical_aperture, wavelength_nm, pixel_size_nm (nm)."""
        return {
            "numerical_aperture": float(self.na_box.value()),
            "wavelength_nm": float(self.wavelength_box.value()),
            "pixel_size_nm": float(self.pixel_box.value()),
        }

    def clear(self) -> None:
        """Remove the PSF."""
        self.set_psf(None)

    # --------------------------------------------------------------- internals
    def _on_optics_changed(self, _value) -> None:
        self._redraw()
        self.opticsChanged.emit(self.optics())

    def _redraw(self) -> None:
        o = self.optics()
        ideal = airy_psf(**o)
        psf = self._psf
        r_max = max(ideal.fwhm * 2.5, psf.radius if psf is not None else 0.0)
        r = np.linspace(0.0, r_max, 300)
        ideal_peak = float(ideal.radial_profile([0.0])[0])
        self._ideal_curve.setData(r, ideal.radial_profile(r) / ideal_peak)
        self._ideal_half.setValue(ideal.fwhm / 2)
        self._ideal_half.setVisible(True)
        px = o["pixel_size_nm"]
        rows = [("ideal Airy FWHM", f"{ideal.fwhm:.3f} px = {ideal.fwhm * px:.0f} nm")]
        if psf is None:
            self._measured_curve.setData([], [])
            self._measured_half.setVisible(False)
            show_warnings(self.warnings_label, ())
        else:
            measured = psf.radial_profile(r)
            self._measured_curve.setData(r, measured / ideal_peak)
            self._measured_half.setValue(psf.fwhm / 2)
            self._measured_half.setVisible(True)
            peak_ratio = float(measured[0]) / ideal_peak
            rows.insert(0, (f"PSF FWHM ({psf.kind})", f"{psf.fwhm:.3f} px = {psf.fwhm * px:.0f} nm"))
            rows.append(("FWHM / ideal", f"{psf.fwhm / ideal.fwhm:.3f}"))
            rows.append(("peak / ideal peak", f"{peak_ratio:.3f}"))
            params = psf.params or {}
            ell = params.get("ellipticity")
            n_atoms = params.get("n_atoms")
            if psf.kind == "empirical":
                rows.append(("ellipticity", fmt(ell)))
                rows.append(("atoms used", "-" if n_atoms is None else str(int(n_atoms))))
            else:
                rows.append(("source", "model, not measured"))
            rows.append(("stamp radius", f"{psf.radius} px"))
            zones = self._zones
            zone_warnings = ()
            if zones is not None:
                f = np.asarray(zones.fwhm)
                f = f[np.isfinite(f)]
                state = "" if zones.applied else " (not used)"
                rows.append((f"zone PSFs {zones.grid[0]}x{zones.grid[1]}{state}",
                             f"FWHM {f.min():.2f}-{f.max():.2f} px" if f.size else "-"))
                zone_warnings = zones.warnings
            show_warnings(self.warnings_label, tuple(params.get("warnings", ())) + tuple(zone_warnings))
        html = "<table cellspacing='2'>" + "".join(
            f"<tr><td>{k}</td><td><b>{v}</b></td></tr>" for k, v in rows) + "</table>"
        self.numbers_label.setText(html)
        self.profile_plot.getPlotItem().setXRange(0, r_max, padding=0.02)
        top = 1.05
        if psf is not None and math.isfinite(float(psf.radial_profile([0.0])[0])):
            top = max(top, 1.05 * float(psf.radial_profile([0.0])[0]) / ideal_peak)
        self.profile_plot.getPlotItem().setYRange(0, top, padding=0.02)
