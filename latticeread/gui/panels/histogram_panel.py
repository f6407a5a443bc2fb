"""Histogram panel: site amplitudes, the fitted two components and a draggable threshold.

A pure view. It histograms the amplitudes it is given, draws the two fitted components of a
threshold result, and lets the user drag the threshold line; it never classifies sites
itself (the owner re-classifies and feeds back counts and rates).

Methods (data in)
-----------------
``set_amplitudes(amplitudes, *, unit="photons")``
    (N,) site amplitudes of the current frame or stack. Non-finite values are ignored and
    counted in the summary; the plotted range is the central 99 % plus margins, and sites
    outside it are counted in the summary. Re-histograms (the only expensive call).
``set_threshold_result(result)``
    A threshold result, duck-typed: an object or dict with ``threshold`` (same unit as the
    amplitudes) and, when available, ``method``, ``empty_mean``, ``empty_std``,
    ``occupied_mean``, ``occupied_std``, ``occupied_fraction`` (or ``means``, ``stds``,
    ``weights`` pairs ordered empty, occupied), ``false_positive_rate``,
    ``false_negative_rate`` (fractions 0..1), ``n_sites`` and ``warnings``. Cheap: moves the
    line and rewrites labels; redraws the component curves only when they changed. Safe to
    call on every ``thresholdDragged``.
``set_threshold(value)``
    Move the line without a result (e.g. a fixed threshold from a calibration).
``set_threshold_label(text)``
    Label format of the line (with ``{value}``), e.g. naming the frame whose own fit it
    shows; None restores the plain threshold label.
``set_counts(n_occupied, n_empty, n_uncertain)``
    Site counts after classification with the current threshold.
``set_method(name)``
    Select ``"mixture"``, ``"otsu"`` or ``"minimum"`` in the method box without emitting.
``set_log_scale(on)``
    Switch the count axis to logarithmic without emitting.
``clear()``
    Remove all data.

Signals (user actions out)
--------------------------
``thresholdDragged(float)``
    Emitted continuously while the user drags the threshold line (photons).
``thresholdCommitted(float)``
    Emitted once when the drag ends, or when a value is typed into the threshold box.
``thresholdRefused(str)``
    A typed or dragged threshold outside the allowed range (negative, above
    :data:`~latticeread.core.classify.MAX_THRESHOLD_PHOTONS`): the message says why; the box
    and the line are back at the last accepted value and nothing else was emitted.
``methodChanged(str)``
    The user picked another threshold method: ``"mixture"``, ``"otsu"`` or ``"minimum"``.
``logScaleToggled(bool)``
    The user switched the logarithmic count axis on or off (to remember the setting).

Attributes for the owner: ``plot_widget`` (the pyqtgraph PlotWidget, for plot export) and
``threshold_line`` (the pyqtgraph InfiniteLine).
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.gui.axes import plain_plot
from latticeread.gui.panels import WARNING_STYLE, fmt, rate_pct, show_warnings

__all__ = ["HistogramPanel", "THRESHOLD_METHODS"]

#: (value emitted by methodChanged, text shown, tooltip)
THRESHOLD_METHODS = (
    ("mixture", "two-component fit",
     "Fit two components (empty sites, occupied sites) to the histogram and put the threshold "
     "where misreads are fewest"),
    ("otsu", "Otsu",
     "Otsu's method: the threshold that maximises the variance between the two classes"),
    ("minimum", "histogram minimum",
     "The threshold at the lowest point of the smoothed histogram between the two peaks"),
)

_HIST_BRUSH = (120, 140, 170, 150)
_EMPTY_PEN = pg.mkPen((40, 110, 200), width=2)
_OCC_PEN = pg.mkPen((220, 120, 20), width=2)
_SUM_PEN = pg.mkPen((60, 60, 60), width=1.5, style=QtCore.Qt.PenStyle.DashLine)
_LINE_PEN = pg.mkPen((200, 0, 0), width=2)
#: the threshold line's label (one decimal: the precision of the threshold box)
THRESHOLD_LABEL = "threshold {value:.1f}"

_LINE_HOVER_PEN = pg.mkPen((255, 60, 60), width=4)


def _get(result, *names, default=None):
    """First present, non-None attribute or key among ``names``."""
    for name in names:
        if isinstance(result, dict):
            value = result.get(name)
        else:
            value = getattr(result, name, None)
        if value is not None:
            return value
    return default


def _pair(result, name, index):
    seq = _get(result, name)
    if seq is None:
        return None
    try:
        return float(seq[index])
    except (TypeError, IndexError, ValueError):
        return None


def _valid(mu, sd) -> bool:
    return mu is not None and sd is not None and math.isfinite(mu) and math.isfinite(sd) and sd > 0


def _components(result):
    """(empty_mean, empty_std, occupied_mean, occupied_std, occupied_fraction) or None.

    A component that is not defined (e.g. no atoms at all) has NaN mean and width; None when
    neither is defined.
    """
    def num(v):
        try:
            return float(v)
        except (TypeError, ValueError):
            return None

    e_mu, e_sd = num(_get(result, "empty_mean")), num(_get(result, "empty_std"))
    o_mu, o_sd = num(_get(result, "occupied_mean")), num(_get(result, "occupied_std"))
    frac = num(_get(result, "occupied_fraction"))
    if e_mu is None and o_mu is None:
        e_mu, o_mu = _pair(result, "means", 0), _pair(result, "means", 1)
        e_sd, o_sd = _pair(result, "stds", 0), _pair(result, "stds", 1)
        frac = _pair(result, "weights", 1) if frac is None else frac
    has_empty, has_occ = _valid(e_mu, e_sd), _valid(o_mu, o_sd)
    if not (has_empty or has_occ):
        return None
    if frac is None or not math.isfinite(frac):
        if has_empty and has_occ:
            return None
        frac = 1.0 if has_occ else 0.0
    nan = float("nan")
    return (e_mu if has_empty else nan, e_sd if has_empty else nan,
            o_mu if has_occ else nan, o_sd if has_occ else nan, float(np.clip(frac, 0.0, 1.0)))


def _display_range(values: np.ndarray) -> tuple[float, float]:
    """Histogram range: the central 99 % of ``values`` plus 25 % margins, within min..max.

    A few wild amplitudes (a cosmic ray, a site at the frame edge) would otherwise squeeze
    both peaks into a handful of bins; the sites left out are counted in the summary. Above
    200,000 values the percentiles come from a regular subsample (display only).
    """
    vmin, vmax = float(values.min()), float(values.max())
    if vmax <= vmin:
        return vmin - 0.5, vmax + 0.5
    # a regular subsample is plenty for a display range and keeps 10^7 sites fast
    sample = values[:: values.size // 200_000 + 1]
    lo, hi = (float(v) for v in np.percentile(sample, [0.5, 99.5]))
    pad = 0.25 * (hi - lo)
    lo, hi = max(vmin, lo - pad), min(vmax, hi + pad)
    if hi <= lo:
        return vmin, vmax
    return lo, hi


def _same(a, b) -> bool:
    """Equal component tuples (NaN equal to NaN)."""
    if a is None or b is None:
        return a is b
    return bool(np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True))


def _gauss(x, mu, sd):
    return np.exp(-0.5 * ((x - mu) / sd) ** 2) / (sd * math.sqrt(2 * math.pi))


class HistogramPanel(QtWidgets.QWidget):
    """Site-amplitude histogram with fitted components and a draggable threshold."""

    thresholdDragged = QtCore.Signal(float)
    thresholdCommitted = QtCore.Signal(float)
    thresholdRefused = QtCore.Signal(str)
    methodChanged = QtCore.Signal(str)
    logScaleToggled = QtCore.Signal(bool)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._unit = "photons"
        self._edges = None
        self._counts = None
        self._n_finite = 0
        self._components = None
        self._loss = 0.0  # share of the occupied class lost during the exposure (a plateau between the peaks)
        self._programmatic = False  # True while the owner moves the line
        self._n_outside = 0
        self._last_dragged = None
        self._accepted = None  # last threshold shown or emitted (the value a refusal goes back to)

        # --- plot -------------------------------------------------------------
        self.plot_widget = pg.PlotWidget(background="w")
        self.plot_widget.setToolTip(
            "Histogram of site amplitudes. Drag the red line to move the occupancy threshold; "
            "blue: empty-site component, orange: occupied-site component, dashed: their sum.")
        self.plot_widget.setMinimumSize(260, 170)
        item = plain_plot(self.plot_widget, bottom="site amplitude", left="sites per bin", grid=0.2)
        item.getViewBox().setMouseEnabled(x=True, y=False)
        self._hist_curve = pg.PlotDataItem(stepMode="center", fillLevel=0, brush=_HIST_BRUSH,
                                           pen=pg.mkPen((90, 110, 140), width=1))
        self._empty_curve = pg.PlotDataItem(pen=_EMPTY_PEN)
        self._occ_curve = pg.PlotDataItem(pen=_OCC_PEN)
        self._sum_curve = pg.PlotDataItem(pen=_SUM_PEN)
        for c in (self._hist_curve, self._sum_curve, self._empty_curve, self._occ_curve):
            item.addItem(c)
        self.threshold_line = pg.InfiniteLine(
            pos=0.0, angle=90, movable=True, pen=_LINE_PEN, hoverPen=_LINE_HOVER_PEN,
            label=THRESHOLD_LABEL,
            labelOpts={"position": 0.92, "color": (170, 0, 0), "fill": (255, 255, 255, 200),
                       "movable": True})
        self.threshold_line.setZValue(10)
        self.threshold_line.setVisible(False)
        item.addItem(self.threshold_line, ignoreBounds=True)
        self.threshold_line.sigPositionChanged.connect(self._on_line_moved)
        self.threshold_line.sigPositionChangeFinished.connect(self._on_line_released)

        # --- controls ---------------------------------------------------------
        self.method_combo = QtWidgets.QComboBox()
        for value, text, tip in THRESHOLD_METHODS:
            self.method_combo.addItem(text, value)
            self.method_combo.setItemData(self.method_combo.count() - 1, tip, QtCore.Qt.ItemDataRole.ToolTipRole)
        self.method_combo.setToolTip("How the threshold is chosen automatically from the histogram")
        self.method_combo.activated.connect(self._on_method_activated)

        self.log_check = QtWidgets.QCheckBox("log counts")
        self.log_check.setToolTip("Show the number of sites per bin on a logarithmic axis "
                                  "(makes the overlap between the two peaks visible)")
        self.log_check.toggled.connect(self._on_log_toggled)

        self.threshold_box = QtWidgets.QDoubleSpinBox()
        self.threshold_box.setRange(-1e9, 1e9)
        self.threshold_box.setDecimals(1)
        self.threshold_box.setKeyboardTracking(False)
        self.threshold_box.setToolTip("Occupancy threshold in the amplitude unit; type a value "
                                      "and press Enter to set it exactly")
        self.threshold_box.valueChanged.connect(self._on_box_changed)

        self.threshold_box.setSuffix(" photons")
        self.threshold_box.setMinimumWidth(110)
        # two rows, so the panel fits a narrow dock
        controls = QtWidgets.QGridLayout()
        controls.addWidget(QtWidgets.QLabel("method"), 0, 0)
        controls.addWidget(self.method_combo, 0, 1)
        controls.addWidget(QtWidgets.QLabel("threshold"), 1, 0)
        controls.addWidget(self.threshold_box, 1, 1)
        controls.addWidget(self.log_check, 1, 2)
        controls.setColumnStretch(3, 1)

        self.counts_label = QtWidgets.QLabel("occupied - · empty - · uncertain -")
        self.counts_label.setToolTip("Sites classified with the current threshold "
                                     "(uncertain: posterior probability far from 0 and 1)")
        self.counts_label.setWordWrap(True)
        self.rates_label = QtWidgets.QLabel("false positives - · false negatives -")
        self.rates_label.setWordWrap(True)
        self.rates_label.setToolTip(
            "Estimated from the overlap of the fitted components: false positive = an empty site "
            "read as occupied, false negative = an occupied site read as empty (per site of "
            "that kind)")
        self.summary_label = QtWidgets.QLabel("no amplitudes")
        self.summary_label.setToolTip("Number of sites in the histogram and the fitted component "
                                      "means and widths")
        self.summary_label.setWordWrap(True)
        self.warnings_label = QtWidgets.QLabel()
        self.warnings_label.setStyleSheet(WARNING_STYLE)
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setToolTip("Reasons why this threshold or its error rates may mislead")
        self.warnings_label.setVisible(False)

        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addLayout(controls)
        layout.addWidget(self.warnings_label)
        layout.addWidget(self.plot_widget, 1)
        layout.addWidget(self.counts_label)
        layout.addWidget(self.rates_label)
        layout.addWidget(self.summary_label)

    # ------------------------------------------------------------------ data in
    def set_amplitudes(self, amplitudes, *, unit: str = "photons") -> None:
        """Histogram (N,) site amplitudes (``unit``: photons or counts). NaN/inf are ignored."""
        a = np.asarray(amplitudes, dtype=float).ravel()
        finite = a[np.isfinite(a)]
        self._unit = str(unit)
        self.plot_widget.getPlotItem().setLabel("bottom", f"site amplitude ({self._unit})")
        self.threshold_box.setSuffix(f" {self._unit}")
        n_bad = a.size - finite.size
        self._n_finite = int(finite.size)
        if finite.size == 0:
            self._edges = self._counts = None
            self._hist_curve.setData([], [])
            self._update_component_curves(force=True)
            self.summary_label.setText("no finite amplitudes" + (f" ({n_bad} non-finite ignored)" if n_bad else ""))
            return
        lo, hi = _display_range(finite)
        nbins = int(np.clip(np.sqrt(finite.size) * 1.5, 20, 200))
        counts, edges = np.histogram(finite, bins=nbins, range=(lo, hi))
        self._edges, self._counts = edges, counts.astype(float)
        self._n_outside = int(finite.size - counts.sum())
        self._redraw_histogram()
        self._update_component_curves(force=True)
        self.plot_widget.getPlotItem().setXRange(lo, hi, padding=0.02)
        self._update_summary(n_bad)

    def set_threshold(self, value) -> None:
        """Move the threshold line and box to ``value`` (amplitude unit) without emitting."""
        if value is None or not math.isfinite(float(value)):
            self.threshold_line.setVisible(False)
            return
        value = float(value)
        self._last_dragged = None
        self._accepted = value
        self.threshold_line.setVisible(True)
        if not self.threshold_line.moving and abs(self.threshold_line.value() - value) > 1e-12:
            self._programmatic = True
            try:
                self.threshold_line.setValue(value)
            finally:
                self._programmatic = False
        self._set_box(value)

    def set_threshold_label(self, text: str | None) -> None:
        """Label of the threshold line: a format with ``{value}`` (e.g. naming the frame whose
        own fit it is), or None for the plain "threshold <value>"."""
        self.threshold_line.label.setFormat(text or THRESHOLD_LABEL)

    def set_threshold_result(self, result) -> None:
        """Show a threshold result (see the module docstring for the fields read)."""
        if result is None:
            self._components = None
            self._loss = 0.0
            self._update_component_curves(force=True)
            self.rates_label.setText("false positives - · false negatives -")
            show_warnings(self.warnings_label, ())
            return
        self.set_threshold(_get(result, "threshold"))
        method = _get(result, "method")
        if method is not None:
            self.set_method(str(method))
        fp = _get(result, "false_positive_rate")
        fn = _get(result, "false_negative_rate")
        self.rates_label.setText(
            f"false positives {self._pct(fp)} of empty sites · false negatives {self._pct(fn)} of occupied sites"
            + (f" · method: {method}" if method is not None else ""))
        comps = _components(result)
        loss = _get(result, "loss_fraction", default=0.0)
        loss = float(loss) if isinstance(loss, (int, float)) and math.isfinite(loss) and 0 < loss < 1 else 0.0
        if not _same(comps, self._components) or loss != self._loss:
            self._components = comps
            self._loss = loss
            self._update_component_curves(force=True)
            self._update_summary()
        show_warnings(self.warnings_label, _get(result, "warnings", default=()))

    def set_counts(self, n_occupied, n_empty, n_uncertain=0) -> None:
        """Show the numbers of occupied, empty and uncertain sites."""
        total = int(n_occupied) + int(n_empty)
        filling = f" · filling {100.0 * int(n_occupied) / total:.1f} %" if total else ""
        self.counts_label.setText(
            f"occupied {int(n_occupied)} · empty {int(n_empty)} · uncertain {int(n_uncertain)}{filling}")

    def set_method(self, name: str) -> None:
        """Select a threshold method in the box without emitting ``methodChanged``."""
        index = self.method_combo.findData(str(name))
        if index >= 0 and index != self.method_combo.currentIndex():
            self.method_combo.setCurrentIndex(index)

    def set_log_scale(self, on: bool) -> None:
        """Switch the logarithmic count axis without emitting ``logScaleToggled``."""
        blocked = self.log_check.blockSignals(True)
        self.log_check.setChecked(bool(on))
        self.log_check.blockSignals(blocked)
        self._apply_log(bool(on))

    def clear(self) -> None:
        """Remove amplitudes, components, threshold and labels."""
        self.set_amplitudes([])
        self.set_threshold_result(None)
        self.threshold_line.setVisible(False)
        self.counts_label.setText("occupied - · empty - · uncertain -")
        self.summary_label.setText("no amplitudes")

    # --------------------------------------------------------------- internals
    @staticmethod
    def _pct(rate) -> str:
        return rate_pct(rate)

    def _set_box(self, value: float) -> None:
        blocked = self.threshold_box.blockSignals(True)
        self.threshold_box.setValue(value)
        self.threshold_box.blockSignals(blocked)

    def _log(self) -> bool:
        return self.log_check.isChecked()

    def _redraw_histogram(self) -> None:
        if self._edges is None:
            return
        counts = self._counts
        if self._log():
            counts = np.maximum(counts, 0.5)  # empty bins drawn just below one site
            self._hist_curve.setFillLevel(math.log10(0.5))
        else:
            self._hist_curve.setFillLevel(0)
        self._hist_curve.setData(self._edges, counts)
        top = max(float(self._counts.max()), 1.0)
        item = self.plot_widget.getPlotItem()
        if self._log():
            item.setYRange(math.log10(0.5), math.log10(top * 2.0), padding=0)
        else:
            item.setYRange(0, top * 1.08, padding=0)

    def _update_component_curves(self, force: bool = False) -> None:
        curves = (self._empty_curve, self._occ_curve, self._sum_curve)
        if self._components is None or self._edges is None:
            for c in curves:
                c.setData([], [])
            return
        e_mu, e_sd, o_mu, o_sd, frac = self._components
        lo, hi = float(self._edges[0]), float(self._edges[-1])
        x = np.linspace(lo, hi, 400)
        scale = self._n_finite * float(self._edges[1] - self._edges[0])  # density -> sites per bin
        zeros = np.zeros_like(x)
        empty = scale * (1.0 - frac) * _gauss(x, e_mu, e_sd) if _valid(e_mu, e_sd) else zeros
        occ = scale * frac * _gauss(x, o_mu, o_sd) if _valid(o_mu, o_sd) else zeros
        if self._loss > 0 and _valid(e_mu, e_sd) and _valid(o_mu, o_sd) and o_mu > e_mu:
            # the occupied class holds the atoms lost during the exposure: a plateau between the peaks
            from latticeread.core.classify import lost_atom_density

            spread = lost_atom_density(x, empty_mean=e_mu, empty_std=e_sd, occupied_mean=o_mu, occupied_std=o_sd)
            occ = scale * frac * ((1.0 - self._loss) * _gauss(x, o_mu, o_sd) + self._loss * spread)
        total = empty + occ
        if not (_valid(e_mu, e_sd) and _valid(o_mu, o_sd)):
            total = zeros  # one component only: the sum adds nothing
        # hide the flat tails so a component does not run along the axis under the other peak
        floor = 0.05 if self._log() else 2e-3 * max(float(total.max()), 1e-12)
        empty, occ, total = (np.where(v > floor, v, np.nan) for v in (empty, occ, total))
        for c, y in zip(curves, (empty, occ, total)):
            c.setData(x, y, connect="finite")

    def _apply_log(self, on: bool) -> None:
        self.plot_widget.getPlotItem().setLogMode(x=False, y=on)
        self._redraw_histogram()
        self._update_component_curves(force=True)

    def _update_summary(self, n_bad: int | None = None) -> None:
        if n_bad is not None:
            self._n_bad = n_bad
        parts = [f"{self._n_finite} sites in histogram"]
        if getattr(self, "_n_bad", 0):
            parts.append(f"{self._n_bad} non-finite ignored")
        if getattr(self, "_n_outside", 0) and self._edges is not None:
            parts.append(f"{self._n_outside} outside the plotted range "
                         f"{fmt(self._edges[0])} … {fmt(self._edges[-1])} {self._unit}")
        if self._components is not None:
            e_mu, e_sd, o_mu, o_sd, frac = self._components
            u = self._unit
            parts.append(f"empty {fmt(e_mu)} ± {fmt(e_sd)} {u}" if _valid(e_mu, e_sd) else "no empty component")
            parts.append(f"occupied {fmt(o_mu)} ± {fmt(o_sd)} {u}" if _valid(o_mu, o_sd) else "no occupied component")
            parts.append(f"fitted filling {100 * frac:.1f} %")
            if self._loss > 0:
                parts.append(f"lost during the exposure {100 * self._loss:.1f} % of the atoms")
        self.summary_label.setText(" · ".join(parts))

    # ------------------------------------------------------------- user events
    def _on_line_moved(self, line) -> None:
        if self._programmatic:
            return
        value = float(line.value())
        last = self._last_dragged
        if last is not None and abs(value - last) <= 1e-9 * max(1.0, abs(last)):
            return  # pyqtgraph repeats the final position (up to rounding) on release
        if self._refusal(value):
            return  # outside the range: nothing is applied; the release says why
        self._last_dragged = self._accepted = value
        self._set_box(value)
        self.thresholdDragged.emit(value)

    def _on_line_released(self, line) -> None:
        if self._programmatic:
            return
        value = float(line.value())
        if self._refuse(value):
            return
        self._accepted = value
        self.thresholdCommitted.emit(value)

    def _on_box_changed(self, value: float) -> None:
        if self._refuse(float(value)):
            return
        self._accepted = float(value)
        self.threshold_line.setVisible(True)
        self._programmatic = True
        try:
            self.threshold_line.setValue(float(value))
        finally:
            self._programmatic = False
        self.thresholdCommitted.emit(float(value))

    def _refusal(self, value: float) -> str | None:
        """Why ``value`` cannot be a threshold (the one range check of every front end), or None."""
        from latticeread.core.classify import check_threshold
        from latticeread.errors import CalibrationError

        try:
            check_threshold(value, unit=self._unit)
        except CalibrationError as exc:
            return str(exc)
        return None

    def _refuse(self, value: float) -> bool:
        """Put the line and box back at the last accepted threshold and say why ``value`` is refused."""
        message = self._refusal(value)
        if message is None:
            return False
        self._programmatic = True
        try:
            if self._accepted is not None:
                self.threshold_line.setValue(self._accepted)
                self._set_box(self._accepted)
        finally:
            self._programmatic = False
        self.thresholdRefused.emit(message)
        return True

    def _on_method_activated(self, index: int) -> None:
        self.methodChanged.emit(str(self.method_combo.itemData(index)))

    def _on_log_toggled(self, on: bool) -> None:
        self._apply_log(bool(on))
        self.logScaleToggled.emit(bool(on))
