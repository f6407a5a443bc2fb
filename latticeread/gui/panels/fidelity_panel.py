"""Fidelity panel: loss and hopping per image with intervals, per-shot trend, warnings.

A pure view of an imaging-fidelity report (from consecutive images of the same atoms).
Loss is marked "typical" when it lies within 1-2 % per image (common practice, no source).
A label under the table says what "loss per image" and "hopping per image" count
(:data:`MEANING`), and the summary names the interval and the histogram peak shape used.
Misread rates below 1e-6 % are shown as "< 1e-6 %".

Methods (data in)
-----------------
``set_report(report)``
    A :class:`latticeread.core.fidelity.FidelityReport`, or any object/dict with the same
    field names. Probabilities are fractions 0..1 per image; every estimate may be an
    ``Estimate``-like object (``value``, ``low``, ``high``), a dict with those keys, or a
    plain number with the interval in a ``<name>_ci`` (low, high) field. Fields read
    (missing ones are shown as "-"):

    * ``loss``, ``hop`` (or ``hopping``) -- model estimates per atom and image;
    * ``read_correctly`` (or ``p_correct``) -- P(site read correctly), all errors combined;
    * ``false_positive_rate``, ``false_negative_rate`` -- misread rates used;
    * ``loss_counted``, ``hop_counted`` -- plain counting estimates (no misread correction);
    * ``loss_is_typical`` (bool; if absent, the loss value is compared with 1-2 %);
    * ``settings["confidence"]`` or ``confidence`` -- level of the intervals (default 0.95);
    * ``n_atom_images`` (or ``n_atoms``), ``n_shots``, ``n_images``;
    * ``per_shot`` -- per-shot points for the trend plot: a sequence of objects/dicts with
      ``shot`` and a ``vanished`` estimate (atoms read occupied then empty, counted), or a
      dict with arrays ``loss``/``hop`` (optional ``shot``), or an (n_shots,) array of loss,
      or an (n_shots, 2) array of (loss, hop);
    * ``blocks`` -- model estimates on blocks of consecutive shots (objects/dicts with
      ``first_shot``, ``last_shot``, ``loss``, ``hop``), drawn as the trend lines;
    * ``warnings`` -- tuple of str, shown prominently in red.

    ``None`` clears.
``clear()``
    Remove the report.

Signals (user actions out)
--------------------------
``estimateRequested()``
    "Estimate fidelity" pressed: estimate loss and hopping from the loaded stack.

Attribute for the owner: ``trend_plot`` (pyqtgraph PlotWidget, for plot export) and
``table`` (the QTableWidget of estimates).
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from latticeread.gui.axes import plain_plot
from latticeread.gui.panels import SMALLEST_PERCENT, WARNING_STYLE, rate_pct, show_warnings

__all__ = ["FidelityPanel", "TYPICAL_LOSS", "MEANING", "loss_note"]

#: Loss per image regarded as typical for fluorescence imaging in a deep lattice
#: (fraction; common practice, no source).
TYPICAL_LOSS = (0.01, 0.02)

#: (row title, report field names tried in order)
_ROWS = (
    ("loss per image", ("loss",)),
    ("hopping per image", ("hop", "hopping")),
    ("P(site read correctly)", ("read_correctly", "p_correct", "p_site_correct")),
    ("empty read as occupied", ("false_positive_rate",)),
    ("occupied read as empty", ("false_negative_rate",)),
    ("vanished, counted", ("loss_counted",)),
    ("hopped, counted", ("hop_counted",)),
)
#: Rows whose values are misread rates (shown with significant figures, not two decimals).
_RATE_ROWS = (3, 4)

#: What the loss and hopping rows count, and how they relate to a forward model.
MEANING = (
    "Loss per image: share of the atoms read in one image that are gone in the next with no "
    "appearance beside them. Hopping per image: share that reappears on an empty neighbouring "
    "site. Both are what two consecutive images show, corrected for misreads, so they are below "
    "a simulation's per-image probabilities: an event at a random moment of the exposure is "
    "partly invisible (an early hop is read on the new site in the same image, a hop onto an "
    "atom is a pair loss, an atom lost early is never read)."
)
_ROW_TIPS = {
    0: "Fraction of the atoms read occupied in image n that are gone in image n+1 with no appearance "
       "next to them (model fit, corrected for misreads)",
    1: "Fraction of the atoms read occupied in image n that reappear on an empty neighbouring site in "
       "image n+1 (model fit, corrected for misreads); hops within one exposure are partly invisible",
    2: "1 - (false positives + false negatives + loss + hopping), per site and image",
    3: "False positives: an empty site read as occupied, per empty site and image",
    4: "False negatives: an atom read as empty, per atom and image",
    5: "Atoms read occupied then empty, without misread correction",
    6: "Appearances next to a vanished atom, without misread correction",
}
_LOSS_PEN = pg.mkPen((200, 40, 40), width=2)
_VANISHED_PEN = pg.mkPen((120, 120, 120), width=1)
_HOP_PEN = pg.mkPen((40, 90, 200), width=2)


def _get(report, *names, default=None):
    for name in names:
        value = report.get(name) if isinstance(report, dict) else getattr(report, name, None)
        if value is not None:
            return value
    return default


def _estimate(report, *names):
    """(value, (low, high) or None) of the first field present among ``names``."""
    for name in names:
        est = _get(report, name)
        if est is None:
            continue
        if isinstance(est, dict):
            return est.get("value"), (est.get("low"), est.get("high"))
        if hasattr(est, "value"):
            return est.value, (getattr(est, "low", None), getattr(est, "high", None))
        return est, _get(report, f"{name}_ci")
    return None, None


def _finite(value) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _pct(value, digits: int = 2) -> str:
    v = _finite(value)
    if v is None:
        return "-"
    if 0 < abs(100 * v) < SMALLEST_PERCENT:
        return rate_pct(v)
    return f"{100 * v:.{digits}f} %"


def _interval(ci, *, significant: bool = False) -> str:
    if ci is None:
        return "-"
    try:
        lo, hi = (_finite(c) for c in ci)
    except (TypeError, ValueError):
        return "-"
    if lo is None or hi is None:
        return "-"
    if significant:
        return f"{rate_pct(lo).removesuffix(' %')} – {rate_pct(hi)}"
    return f"{_pct(lo).removesuffix(' %')} – {_pct(hi)}"


def loss_note(loss, *, typical: bool | None = None) -> str:
    """Compare a loss fraction per image with the typical 1-2 % (common practice, no source).

    ``typical`` overrides the comparison of the value (e.g. a report that checked whether
    the whole interval overlaps 1-2 %); the note still says whether the value is below or
    above the range when it is not typical.
    """
    v = _finite(loss)
    if v is None:
        return ""
    lo, hi = TYPICAL_LOSS
    if typical is None:
        typical = lo <= v <= hi
    if typical:
        return "typical (1–2 %)"
    if v < lo:
        return "below typical (1–2 %)"
    return "above typical (1–2 %): check imaging"


class FidelityPanel(QtWidgets.QWidget):
    """Imaging fidelity: loss, hopping, P(site read correctly), per-shot trend, warnings."""

    estimateRequested = QtCore.Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        self.warnings_label = QtWidgets.QLabel()
        self.warnings_label.setStyleSheet(WARNING_STYLE)
        self.warnings_label.setWordWrap(True)
        self.warnings_label.setToolTip("Reasons why these estimates may mislead (too few atoms, "
                                       "too dense a filling, ...): read before quoting them")
        self.warnings_label.setVisible(False)

        # two columns, so the table fits a 1366-px-wide window's side dock; the comparison of the
        # loss with the typical range is the coloured line under it (``loss_note_label``)
        self.table = QtWidgets.QTableWidget(len(_ROWS), 2)
        self.table.setHorizontalHeaderLabels(["estimate", "interval"])
        self.table.setVerticalHeaderLabels([title for title, _ in _ROWS])
        self.table.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.NoSelection)
        self.table.setFocusPolicy(QtCore.Qt.FocusPolicy.NoFocus)
        self.table.horizontalHeader().setStretchLastSection(True)
        # rows of one line each: the table's fixed height stays right whatever the column widths
        self.table.verticalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeMode.Fixed)
        self.table.verticalHeader().setDefaultSectionSize(self.table.fontMetrics().height() + 6)
        # row titles with a narrow margin: title, estimate and interval fit the side dock of a
        # 1366-px window (the header's own size hint leaves room for a sort mark never shown)
        fm = self.table.verticalHeader().fontMetrics()
        self.table.verticalHeader().setFixedWidth(max(fm.horizontalAdvance(t) for t, _ in _ROWS) + 12)
        self.table.setToolTip(
            "Loss: an atom seen in one image is missing in the next. Hopping: it reappears on "
            "another site. Both per image, corrected for misclassified sites; the interval is the "
            "confidence interval from the number of atoms counted.")
        self.table.setSizePolicy(QtWidgets.QSizePolicy.Policy.Expanding, QtWidgets.QSizePolicy.Policy.Fixed)
        self.table.setVerticalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.table.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)

        for row, tip in _ROW_TIPS.items():
            self.table.verticalHeaderItem(row).setToolTip(tip)
        self.meaning_label = QtWidgets.QLabel(MEANING)
        self.meaning_label.setWordWrap(True)
        self.meaning_label.setStyleSheet("QLabel { color: #444; font-size: 90%; }")

        self.summary_label = QtWidgets.QLabel("no fidelity estimate")
        self.summary_label.setWordWrap(True)
        self.summary_label.setToolTip("Atoms and shots that entered the estimate, and the "
                                      "classification error rates it was corrected for")

        self.trend_plot = pg.PlotWidget(background="w")
        self.trend_plot.setToolTip("Loss (red) and hopping (blue) over the run (blocks of "
                                   "consecutive shots or single shots), grey: fraction of atoms "
                                   "that vanished in each shot, counted, with its interval; the "
                                   "green band marks the typical loss of 1–2 % per image")
        self.trend_plot.setMinimumSize(300, 160)
        tp = plain_plot(self.trend_plot, bottom="shot", left="per image (%)", grid=0.25)
        self._band = pg.LinearRegionItem(values=(100 * TYPICAL_LOSS[0], 100 * TYPICAL_LOSS[1]),
                                         orientation="horizontal", movable=False,
                                         brush=pg.mkBrush(80, 200, 80, 45), pen=pg.mkPen(None))
        tp.addItem(self._band)
        self._legend = tp.addLegend(offset=(-10, 10), labelTextColor=(40, 40, 40),
                                    brush=pg.mkBrush(255, 255, 255, 210))
        self._loss_curve = pg.PlotDataItem(pen=_LOSS_PEN, symbol="o", symbolSize=5,
                                           symbolBrush=(200, 40, 40), symbolPen=None, name="loss")
        self._hop_curve = pg.PlotDataItem(pen=_HOP_PEN, symbol="s", symbolSize=5,
                                          symbolBrush=(40, 90, 200), symbolPen=None, name="hopping")
        self._vanished_curve = pg.PlotDataItem(pen=None, symbol="o", symbolSize=4,
                                               symbolBrush=(130, 130, 130), symbolPen=None,
                                               name="vanished per shot (counted)")
        self._vanished_bars = pg.ErrorBarItem(pen=_VANISHED_PEN, beam=0.0)
        tp.addItem(self._vanished_bars)
        tp.addItem(self._vanished_curve)
        tp.addItem(self._loss_curve)
        tp.addItem(self._hop_curve)

        self.estimate_button = QtWidgets.QPushButton("Estimate fidelity")
        self.estimate_button.setToolTip("Estimate loss and hopping from consecutive images of the "
                                        "same atoms in the loaded stack")
        self.estimate_button.clicked.connect(self.estimateRequested)
        self.loss_note_label = QtWidgets.QLabel("")
        self.loss_note_label.setWordWrap(True)
        self.loss_note_label.setToolTip("The loss per image compared with the 1–2 % typical of fluorescence "
                                        "imaging in a deep lattice (common practice)")

        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addWidget(self.warnings_label)
        layout.addWidget(self.table)
        layout.addWidget(self.loss_note_label)
        layout.addWidget(self.meaning_label)
        layout.addWidget(self.summary_label)
        layout.addWidget(self.trend_plot, 1)
        layout.addWidget(self.estimate_button)
        self.clear()

    # ------------------------------------------------------------------ data in
    def set_report(self, report) -> None:
        """Show a fidelity report (see the module docstring for the fields read); None clears."""
        if report is None:
            self.clear()
            return
        settings = _get(report, "settings", default={}) or {}
        conf = _finite(_get(report, "confidence")) or _finite(settings.get("confidence")) or 0.95
        self.table.setHorizontalHeaderLabels(["estimate", f"{100 * conf:.0f} % interval"])
        note = ""
        for row, (_title, names) in enumerate(_ROWS):
            value, ci = _estimate(report, *names)
            if row == 0:
                typical = _get(report, "loss_is_typical")
                note = loss_note(value, typical=None if typical is None else bool(typical))
            self._set_row(row, value, ci)
        colour = "#007828" if note.startswith("typical") else "#b00020" if note.startswith("above") else "#785a00"
        self.loss_note_label.setText(f"<span style='color:{colour}'>loss per image: {note}</span>" if note else "")
        self.loss_note_label.setVisible(bool(note))

        parts = []
        n_atoms = _get(report, "n_atom_images", "n_atoms")
        n_shots, n_images = _get(report, "n_shots"), _get(report, "n_images")
        if n_atoms is not None:
            parts.append(f"{int(n_atoms)} atom-images")
        if n_shots is not None:
            parts.append(f"{int(n_shots)} shots" + (f" × {int(n_images)} images" if n_images else ""))
        if settings.get("interval"):
            parts.append(f"intervals: {settings['interval']}")
        if settings.get("peak_shape"):
            parts.append(f"misread rates from {settings['peak_shape']} histogram peaks")
        self.summary_label.setText(" · ".join(parts) if parts else "no counts given")
        show_warnings(self.warnings_label, _get(report, "warnings", default=()))
        self._set_trend(_get(report, "per_shot"), _get(report, "blocks"))

    def clear(self) -> None:
        """Remove the report."""
        for r in range(len(_ROWS)):
            self._set_row(r, None, None)
        self.loss_note_label.setText("")
        self.loss_note_label.setVisible(False)
        self.summary_label.setText("no fidelity estimate")
        show_warnings(self.warnings_label, ())
        for curve in (self._loss_curve, self._hop_curve, self._vanished_curve):
            curve.setData([], [])
        self._vanished_bars.setData(x=np.zeros(0), y=np.zeros(0), top=np.zeros(0), bottom=np.zeros(0))

    # --------------------------------------------------------------- internals
    def _set_row(self, row: int, value, ci) -> None:
        significant = row in _RATE_ROWS
        shown = (rate_pct(value) if significant and value is not None else _pct(value),
                 _interval(ci, significant=significant))
        for col, text in enumerate(shown):
            item = QtWidgets.QTableWidgetItem(text)
            item.setTextAlignment(QtCore.Qt.AlignmentFlag.AlignRight | QtCore.Qt.AlignmentFlag.AlignVCenter)
            self.table.setItem(row, col, item)
        if row == 0 and value is not None:
            font = self.table.item(0, 0).font()
            font.setBold(True)
            self.table.item(0, 0).setFont(font)
        self._fit_table()

    def _fit_table(self) -> None:
        self.table.resizeColumnToContents(0)
        height = self.table.horizontalHeader().height() + 2 * self.table.frameWidth()
        height += sum(self.table.rowHeight(r) for r in range(self.table.rowCount()))
        self.table.setFixedHeight(height)

    def _set_trend(self, per_shot, blocks=None) -> None:
        loss = hop = shots = None
        vanished = []  # (shot, value, low, high) counted per shot
        if isinstance(per_shot, dict):
            loss = per_shot.get("loss")
            hop = per_shot.get("hop", per_shot.get("hopping"))
            shots = per_shot.get("shot", per_shot.get("shots"))
        elif per_shot is not None and len(per_shot) and _get(per_shot[0], "vanished") is not None:
            for i, item in enumerate(per_shot):
                value, ci = _estimate(item, "vanished")
                lo, hi = ci if ci is not None else (None, None)
                shot = _get(item, "shot", default=i)
                vanished.append((float(shot), *(np.nan if _finite(v) is None else float(v) for v in (value, lo, hi))))
        elif per_shot is not None and np.size(per_shot):
            arr = np.asarray(per_shot, dtype=float)
            if arr.ndim == 1:
                loss = arr
            elif arr.ndim == 2 and arr.shape[1] >= 2:
                loss, hop = arr[:, 0], arr[:, 1]
        if blocks is not None and len(blocks) and loss is None:
            # model estimates per block of consecutive shots, drawn at the block centre
            shots = [0.5 * (float(_get(b, "first_shot", default=0)) + float(_get(b, "last_shot", default=0)))
                     for b in blocks]
            loss = [_finite(_get(b, "loss")) for b in blocks]
            hop = [_finite(_get(b, "hop")) for b in blocks]
            loss = np.array([np.nan if v is None else v for v in loss])
            hop = np.array([np.nan if v is None else v for v in hop])
        for curve, values in ((self._loss_curve, loss), (self._hop_curve, hop)):
            if values is None or np.size(values) == 0:
                curve.setData([], [])
                continue
            v = 100.0 * np.asarray(values, dtype=float).ravel()
            x = np.arange(v.size) if shots is None else np.asarray(shots, dtype=float).ravel()[: v.size]
            curve.setData(x, v, connect="finite")
        if vanished:
            a = np.asarray(vanished, dtype=float)
            self._vanished_curve.setData(a[:, 0], 100 * a[:, 1])
            ok = np.isfinite(a[:, 2]) & np.isfinite(a[:, 3])
            self._vanished_bars.setData(x=a[ok, 0], y=100 * a[ok, 1], top=100 * (a[ok, 3] - a[ok, 1]),
                                        bottom=100 * (a[ok, 1] - a[ok, 2]))
        else:
            self._vanished_curve.setData([], [])
            self._vanished_bars.setData(x=np.zeros(0), y=np.zeros(0), top=np.zeros(0), bottom=np.zeros(0))
        self._legend.clear()  # list only the curves that have data
        for curve, name in ((self._vanished_curve, "vanished per shot (counted)"), (self._loss_curve, "loss"),
                            (self._hop_curve, "hopping")):
            x, _y = curve.getData()
            if x is not None and len(x):
                self._legend.addItem(curve, name)
        self.trend_plot.getPlotItem().autoRange()
