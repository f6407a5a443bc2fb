"""Observables panel: density map, profiles, correlation map and order histogram of the shots.

A pure view of an :class:`latticeread.core.observables.Observables` result. Four plots:

* the mean occupation (atoms per site) with a colour bar (or the misread-corrected density
  when "corrected" is ticked and a correction exists);
* a profile with standard-error bars: radial about the density centroid, or the 1-D
  profile along a1 or a2 averaged over a band;
* the connected correlator C(d) as a map over displacements (d = 0 left out of the colour
  scale: it is the variance, far larger than the correlations), with a colour bar;
* the histogram of the staggered (checkerboard) order parameter m over shots.

Above them one line of numbers (shots, filling, atoms per shot, C at nearest neighbours,
<|m|>, S(pi, pi)) and the warnings in red.

Methods (data in)
-----------------
``set_observables(obs, *, source="")``
    Show a result; ``source`` names the shots (e.g. "12 reconstructed frames").
``set_message(text)``
    Clear the plots and say why there is nothing to show.
``clear()``
``save_figure(path)``
    PNG or SVG (by suffix) of the four plots and the numbers, through
    :mod:`latticeread.gui.plot_export` (SVG via QSvgGenerator).

Signals (user actions out)
--------------------------
``exportRequested(str)``
    "PNG..." or "SVG..." pressed (``"png"`` / ``"svg"``); the owner asks for a file name and
    calls :meth:`save_figure`.
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.gui.axes import plain_plot
from latticeread.gui.panels import WARNING_STYLE, fmt, show_warnings

__all__ = ["ObservablesPanel"]

_PROFILES = (("radial", "radial (about the centroid)"), ("line_a1", "along a1 (band)"),
             ("line_a2", "along a2 (band)"))
_ERR_PEN = pg.mkPen((40, 90, 200), width=1)
_LINE_PEN = pg.mkPen((40, 90, 200), width=2)
_CORR_PEN = pg.mkPen((200, 40, 40), width=2)


def _plot(title: str, left: str, bottom: str, tip: str) -> pg.PlotWidget:
    w = pg.PlotWidget(background="w")
    w.setToolTip(tip)
    w.setMinimumSize(220, 180)
    p = plain_plot(w, bottom=bottom, left=left)
    p.setTitle(title, color=(40, 40, 40), size="9pt")
    return w


class ObservablesPanel(QtWidgets.QWidget):
    """Density, profiles, correlations and staggered order of the reconstructed shots."""

    exportRequested = QtCore.Signal(str)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._obs = None
        self.summary_label = QtWidgets.QLabel("no observables: reconstruct at least 2 frames")
        self.summary_label.setWordWrap(True)
        self.summary_label.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        self.summary_label.setToolTip("Statistics over the shots: errors are standard errors over shots "
                                      "(correlator: bootstrap over shots)")
        self.warnings_label = QtWidgets.QLabel()
        self.warnings_label.setStyleSheet(WARNING_STYLE)
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setVisible(False)

        self.profile_box = QtWidgets.QComboBox()
        for key, text in _PROFILES:
            self.profile_box.addItem(text, key)
        self.profile_box.setToolTip("Which density profile to plot")
        self.profile_box.currentIndexChanged.connect(lambda _i: self._draw_profile())
        self.corrected_box = QtWidgets.QCheckBox("misread-corrected")
        self.corrected_box.setToolTip("Show the density and C(d) corrected for the false-positive, false-negative "
                                      "and loss rates (only when rates are known)")
        self.corrected_box.setEnabled(False)
        self.corrected_box.toggled.connect(lambda _on: self._draw_maps())
        self.png_button = QtWidgets.QPushButton("PNG…")
        self.png_button.setToolTip("Save the four plots and the numbers as a PNG image")
        self.png_button.clicked.connect(lambda: self.exportRequested.emit("png"))
        self.svg_button = QtWidgets.QPushButton("SVG…")
        self.svg_button.setToolTip("Save the four plots and the numbers as an SVG vector drawing")
        self.svg_button.clicked.connect(lambda: self.exportRequested.emit("svg"))
        controls = QtWidgets.QHBoxLayout()
        controls.addWidget(QtWidgets.QLabel("profile:"))
        controls.addWidget(self.profile_box)
        controls.addWidget(self.corrected_box)
        controls.addStretch(1)
        controls.addWidget(self.png_button)
        controls.addWidget(self.svg_button)

        self.density_plot = _plot("mean occupation", "row (along a1)", "column (along a2)",
                                  "Mean occupation per site over the shots (atoms per site)")
        dp = self.density_plot.getPlotItem()
        dp.invertY(True)
        dp.setAspectLocked(True)
        self.density_image = pg.ImageItem(axisOrder="row-major")
        dp.addItem(self.density_image)
        self.density_bar = pg.ColorBarItem(values=(0, 1), colorMap=pg.colormap.get("viridis"), interactive=False,
                                           width=12, label="atoms/site")
        self.density_bar.setImageItem(self.density_image, insert_in=dp)

        self.profile_plot = _plot("radial profile", "atoms per site", "distance (lattice units)",
                                  "Density profile with standard errors over shots")
        pp = self.profile_plot.getPlotItem()
        pp.showGrid(x=True, y=True, alpha=0.25)
        self.profile_curve = pg.PlotDataItem(pen=_LINE_PEN, symbol="o", symbolSize=4, symbolBrush=(40, 90, 200),
                                             symbolPen=None)
        self.profile_errors = pg.ErrorBarItem(pen=_ERR_PEN, beam=0.2)
        pp.addItem(self.profile_errors)
        pp.addItem(self.profile_curve)

        self.corr_plot = _plot("connected correlator C(d)", "d along a1 (sites)", "d along a2 (sites)",
                               "C(d) = <n_i n_i+d> - <n_i><n_i+d> averaged over the region; the centre "
                               "(d = 0, the variance) is left out of the colour scale")
        cp = self.corr_plot.getPlotItem()
        cp.invertY(True)
        cp.setAspectLocked(True)
        self.corr_image = pg.ImageItem(axisOrder="row-major")
        cp.addItem(self.corr_image)
        self.corr_bar = pg.ColorBarItem(values=(-0.01, 0.01), colorMap=pg.colormap.get("CET-D1"), interactive=False,
                                        width=12, label="C(d)")
        self.corr_bar.setImageItem(self.corr_image, insert_in=cp)

        self.order_plot = _plot("staggered order per shot", "shots", "m",
                                "Checkerboard order m = sum (-1)^(i+j) (2n - 1) / N per shot: +-1 for a "
                                "perfect checkerboard, near 0 without order")
        op = self.order_plot.getPlotItem()
        self.order_bars = pg.BarGraphItem(x=[], height=[], width=0.05, brush=(120, 120, 200), pen=None)
        op.addItem(self.order_bars)
        op.setXRange(-1.05, 1.05)

        grid = QtWidgets.QGridLayout()
        grid.setSpacing(4)
        grid.addWidget(self.density_plot, 0, 0)
        grid.addWidget(self.profile_plot, 0, 1)
        grid.addWidget(self.corr_plot, 1, 0)
        grid.addWidget(self.order_plot, 1, 1)
        self.figure = QtWidgets.QWidget()
        fig_layout = QtWidgets.QVBoxLayout(self.figure)
        fig_layout.setContentsMargins(0, 0, 0, 0)
        fig_layout.addWidget(self.summary_label)
        fig_layout.addWidget(self.warnings_label)
        fig_layout.addLayout(grid, 1)
        layout = QtWidgets.QVBoxLayout(self)
        layout.addLayout(controls)
        layout.addWidget(self.figure, 1)
        self._set_enabled(False)

    # --- data in ---------------------------------------------------------------------
    def set_observables(self, obs, *, source: str = "") -> None:
        """Show ``obs`` (an Observables result); ``None`` clears."""
        if obs is None:
            self.clear()
            return
        self._obs = obs
        self._source = source
        self.corrected_box.setEnabled(obs.corrected is not None)
        self._set_enabled(True)
        self._draw_summary()
        self._draw_maps()
        self._draw_profile()
        self._draw_order()

    def set_message(self, text: str) -> None:
        """Clear the plots and show ``text`` instead of the numbers."""
        self.clear()
        self.summary_label.setText(text)

    def clear(self) -> None:
        self._obs = None
        self.density_image.clear()
        self.corr_image.clear()
        self.profile_curve.setData([], [])
        self.profile_errors.setData(x=np.zeros(0), y=np.zeros(0), height=np.zeros(0))
        self.order_bars.setOpts(x=[], height=[])
        self.summary_label.setText("no observables: reconstruct at least 2 frames")
        show_warnings(self.warnings_label, ())
        self.corrected_box.setEnabled(False)
        self._set_enabled(False)

    @property
    def observables(self):
        """The result shown (or None)."""
        return self._obs

    def save_figure(self, path):
        """Save the plots and numbers as PNG or SVG (by the suffix of ``path``); returns the path."""
        from pathlib import Path

        from latticeread.gui.plot_export import export_svg, export_widget_png

        path = Path(path)
        if path.suffix.lower() == ".svg":
            return export_svg(self.figure, path, title="latticeread observables")
        return export_widget_png(self.figure, path, scale=2.0)

    # --- drawing ---------------------------------------------------------------------
    def _set_enabled(self, on: bool) -> None:
        for w in (self.png_button, self.svg_button, self.profile_box):
            w.setEnabled(on)

    def _draw_summary(self) -> None:
        o = self._obs
        d, a, c, m = o.density, o.atoms, o.correlator, o.order
        k = (c.map.shape[0] - 1) // 2
        nn = np.array([c.map[k, k + 1], c.map[k + 1, k]])
        nn_err = np.array([c.err[k, k + 1], c.err[k + 1, k]])
        parts = [f"<b>{d.n_shots} shots</b>{' (' + self._source + ')' if self._source else ''}, "
                 f"{int(d.region.sum())} sites",
                 f"filling {fmt(d.filling, 4)} ± {fmt(d.filling_err, 2)}",
                 f"atoms/shot {fmt(a.mean, 4)} ± {fmt(a.mean_err, 2)} (variance {fmt(a.variance, 3)})",
                 f"C(nearest) {fmt(nn.mean(), 3)} ± {fmt(math.hypot(*nn_err) / 2, 2)}",
                 f"⟨|m|⟩ {fmt(m.mean_abs, 3)} ± {fmt(m.mean_abs_err, 2)}",
                 f"S(π,π) {fmt(m.s_pi_pi, 3)} ± {fmt(m.s_pi_pi_err, 2)} of {m.n_sites}"]
        if o.corrected is not None:
            parts.append(f"corrected filling {fmt(o.corrected.filling, 4)} ± "
                         f"{fmt(math.hypot(o.corrected.filling_stat_err, o.corrected.filling_rate_err), 2)}")
        self.summary_label.setText(" · ".join(parts))
        show_warnings(self.warnings_label, o.warnings)

    def _draw_maps(self) -> None:
        o = self._obs
        if o is None:
            return
        corrected = self.corrected_box.isChecked() and o.corrected is not None
        dens = o.corrected.density if corrected else o.density.mean
        dens = np.where(o.density.region, dens, np.nan)
        self.density_image.setImage(dens, autoLevels=False)
        # cell (i, j) centred on the matrix indices (i, j)
        self.density_image.setRect(QtCore.QRectF(-0.5, -0.5, dens.shape[1], dens.shape[0]))
        finite = dens[np.isfinite(dens)]
        hi = max(1.0, float(finite.max())) if finite.size else 1.0
        lo = min(0.0, float(finite.min())) if finite.size else 0.0
        self.density_bar.setLevels((lo, hi))
        self.density_plot.getPlotItem().setTitle("mean occupation" + (" (misread-corrected)" if corrected else ""),
                                                 color=(40, 40, 40), size="9pt")
        c = o.correlator
        cmap = o.corrected.correlator if corrected else c.map
        k = (cmap.shape[0] - 1) // 2
        show = cmap.copy()
        show[k, k] = np.nan
        vals = show[np.isfinite(show)]
        span = float(np.abs(vals).max()) if vals.size else 0.01
        span = span if span > 0 else 0.01
        # small correlations are shown in units of a power of ten, so the colour bar has ticks
        exponent = int(math.floor(math.log10(span)))
        scale = 10.0 ** -exponent if exponent < -2 else 1.0
        self.corr_image.setImage(show * scale, autoLevels=False)
        self.corr_image.setRect(QtCore.QRectF(-k - 0.5, -k - 0.5, 2 * k + 1, 2 * k + 1))
        self.corr_bar.setLevels((-span * scale, span * scale))
        self.corr_bar.getAxis("left").setLabel("C(d)" if scale == 1.0 else f"C(d) × 1e{exponent}")
        self.corr_scale = scale
        self.corr_plot.getPlotItem().setTitle("connected correlator C(d)" + (" (corrected)" if corrected else ""),
                                              color=(40, 40, 40), size="9pt")

    def _draw_profile(self) -> None:
        o = self._obs
        if o is None:
            return
        key = self.profile_box.currentData()
        pp = self.profile_plot.getPlotItem()
        if key == "radial":
            prof = o.radial
            x, y, e = prof.coordinate, prof.mean, prof.stderr
            pp.setTitle("radial profile", color=(40, 40, 40), size="9pt")
            pp.setLabel("bottom", f"distance from ({prof.centre[0]:.1f}, {prof.centre[1]:.1f}) (lattice units)")
        else:
            prof = getattr(o, key)
            ok = np.isfinite(prof.mean)
            x, y, e = prof.position[ok], prof.mean[ok], prof.stderr[ok]
            pp.setTitle(f"along {prof.axis}: centre {prof.centre_of_mass:.2f} ± {prof.centre_of_mass_err:.2f}, "
                        f"width {prof.width:.2f} ± {prof.width_err:.2f} sites", color=(40, 40, 40), size="9pt")
            pp.setLabel("bottom", f"site index along {prof.axis} (band {prof.band[0]}–{prof.band[1]})")
        self.profile_curve.setData(x, y)
        self.profile_errors.setData(x=np.asarray(x, float), y=np.asarray(y, float),
                                    height=2 * np.nan_to_num(np.asarray(e, float)))

    def _draw_order(self) -> None:
        m = self._obs.order
        centres = 0.5 * (m.bin_edges[:-1] + m.bin_edges[1:])
        self.order_bars.setOpts(x=centres, height=m.histogram, width=0.9 * float(np.diff(m.bin_edges)[0]))
        self.order_plot.getPlotItem().setTitle(
            f"staggered order per shot: ⟨|m|⟩ = {m.mean_abs:.3f}", color=(40, 40, 40), size="9pt")
