"""One site and its evidence: image, model and residual around it, and its amplitude and
posterior in every reconstructed frame.

A pure view: the main window fills it from :meth:`latticeread.session.Session.site_evidence`
when the user clicks a site in the image.

Methods
-------
set_evidence(evidence)
    The dict of ``Session.site_evidence`` (None clears).
clear()

Signals
-------
frameRequested(int)   the user clicked a frame in the amplitude plot
excludeRequested(int, int, bool)   (row, col, exclude): leave the site out of the analysed
                      region (True) or let it back in (False)
maskRequested(float, float, float)   (x, y, radius in pixels): mask a disk around the site
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.gui.axes import IntegerAxis

__all__ = ["SiteInspector"]

_PATCHES = (("image", "frame"), ("model", "model"), ("residual", "frame \u2212 model"))


class SiteInspector(QtWidgets.QWidget):
    """Patches around one site and its amplitude / posterior over the stack."""

    frameRequested = QtCore.Signal(int)
    excludeRequested = QtCore.Signal(int, int, bool)
    maskRequested = QtCore.Signal(float, float, float)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._evidence = None
        self._site = None  # (row, col, x, y, excluded) of the site shown
        self.exclude_button = QtWidgets.QPushButton("Exclude this site")
        self.exclude_button.setToolTip("Leave this site out of the analysed region in every frame: it is still "
                                       "fitted but gets no result (occupation 255 and flag 128 'excluded' in "
                                       "exports). Stored in the calibration; one undo step")
        self.exclude_button.clicked.connect(self._exclude_clicked)
        self.mask_button = QtWidgets.QPushButton("Mask the area around it")
        self.mask_button.setToolTip("Add a masked disk of one and a half lattice spacings around this site "
                                    "(red, dashed, in the image; drag or resize it there)")
        self.mask_button.clicked.connect(self._mask_clicked)
        self.spacing = 4.0  # pixels, for the masked disk; the main window sets the lattice's
        self.title = QtWidgets.QLabel("click a site in the image to inspect it")
        self.title.setWordWrap(True)
        self.title.setToolTip("The site shown: indices (row along a1, col along a2) and position in pixels")
        self.patches = pg.GraphicsLayoutWidget()
        self.patches.setToolTip("Around the site in the frame shown, in photons: the frame, the model rebuilt "
                                "from the fitted amplitudes and the PSF, and their difference (what the model "
                                "misses; own colour scale, white = 0)")
        self.patches.setMinimumHeight(150)
        self._items = {}
        for col, (key, title) in enumerate(_PATCHES):
            plot = self.patches.addPlot(row=0, col=col)
            plot.setTitle(title, size="9pt")
            plot.setAspectLocked(True)
            plot.invertY(True)
            plot.hideAxis("left")
            plot.hideAxis("bottom")
            plot.hideButtons()
            plot.setMenuEnabled(False)
            plot.setMouseEnabled(False, False)
            item = pg.ImageItem(axisOrder="row-major")
            item.setColorMap(pg.colormap.get("CET-D1" if key == "residual" else "inferno"))
            plot.addItem(item)
            marker = pg.ScatterPlotItem(size=8, symbol="+", pen=pg.mkPen((0, 230, 255), width=1.5))
            plot.addItem(marker)
            self._items[key] = (plot, item, marker)
        self.series = pg.PlotWidget(background="w", axisItems={"bottom": IntegerAxis("bottom")})
        self.series.setToolTip("Amplitude of this site in every reconstructed frame (dots) against the "
                               "threshold (red line); the colour of a dot is its posterior P(atom). "
                               "Click a dot to show that frame")
        self.series.setMinimumHeight(140)
        plot = self.series.getPlotItem()
        plot.setLabel("bottom", "frame")
        plot.setLabel("left", "amplitude (photons)")
        plot.showGrid(x=True, y=True, alpha=0.25)
        plot.hideButtons()
        self._points = pg.ScatterPlotItem(size=8, pen=pg.mkPen((60, 60, 60)))
        self._points.sigClicked.connect(self._point_clicked)
        plot.addItem(self._points)
        self._threshold = pg.InfiniteLine(angle=0, pen=pg.mkPen((190, 0, 0), width=1.5))
        plot.addItem(self._threshold)
        self._current = pg.InfiniteLine(angle=90, pen=pg.mkPen((120, 120, 120), style=QtCore.Qt.PenStyle.DashLine))
        plot.addItem(self._current)
        self.details = QtWidgets.QLabel("")
        self.details.setWordWrap(True)
        self.details.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        self.details.setToolTip("Amplitude, P(atom) and flags of the site in the frame shown, and how often "
                                "it was read as occupied over the stack")
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addWidget(self.title)
        buttons = QtWidgets.QHBoxLayout()  # at the top: visible however short the dock is
        buttons.addWidget(self.exclude_button)
        buttons.addWidget(self.mask_button)
        buttons.addStretch(1)
        layout.addLayout(buttons)
        layout.addWidget(self.patches, 2)
        layout.addWidget(self.series, 2)
        layout.addWidget(self.details)
        self._set_buttons()

    @property
    def evidence(self):
        return self._evidence

    def _set_buttons(self) -> None:
        site = self._site
        self.exclude_button.setEnabled(site is not None)
        self.mask_button.setEnabled(site is not None)
        self.exclude_button.setText("Include this site again" if site is not None and site[4]
                                    else "Exclude this site")

    def _exclude_clicked(self) -> None:
        if self._site is not None:
            row, col, _x, _y, excluded = self._site
            self.excludeRequested.emit(row, col, not excluded)

    def _mask_clicked(self) -> None:
        if self._site is not None:
            _row, _col, x, y, _excluded = self._site
            self.maskRequested.emit(float(x), float(y), 1.5 * float(self.spacing))

    def show_excluded(self, row: int, col: int, x: float, y: float) -> None:
        """Show a site left out of the analysed region (it has no result to inspect)."""
        self.clear()
        self._site = (int(row), int(col), float(x), float(y), True)
        self.title.setText(f"site ({row}, {col}) at x {x:.1f}, y {y:.1f} px is excluded from the analysed region")
        self.details.setText("fitted with its neighbours but given no result; 'Include this site again' "
                             "brings it back")
        self._set_buttons()

    def clear(self) -> None:
        self._evidence = None
        self._site = None
        self._set_buttons()
        self.title.setText("click a site in the image to inspect it")
        for _plot, item, marker in self._items.values():
            item.clear()
            marker.setData([], [])
        self._points.setData([], [])
        self.details.setText("")

    def set_evidence(self, evidence) -> None:
        """Show ``Session.site_evidence(...)`` (None clears)."""
        if evidence is None:
            self.clear()
            return
        from latticeread.core.flags import decode_flags

        self._evidence = evidence
        e = evidence
        self._site = (int(e["row"]), int(e["col"]), float(e["x"]), float(e["y"]), False)
        self._set_buttons()
        x0, y0 = e["origin"]
        self.title.setText(f"site ({e['row']}, {e['col']}) at x {e['x']:.1f}, y {e['y']:.1f} px in frame {e['index']}")
        finite = np.concatenate([np.ravel(e["image"]), np.ravel(e["model"])])
        finite = finite[np.isfinite(finite)]
        lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        for key, (plot, item, marker) in self._items.items():
            data = np.asarray(e[key], dtype=float)
            if key == "residual":
                span = float(np.nanmax(np.abs(data))) if np.isfinite(data).any() else 1.0
                levels = (-span, span) if span > 0 else (-1.0, 1.0)  # own, symmetric scale
            else:
                levels = (lo, hi if hi > lo else lo + 1.0)  # frame and model on one scale
            item.setImage(np.nan_to_num(data, nan=levels[0]), levels=levels)
            marker.setData([e["x"] - x0 + 0.5], [e["y"] - y0 + 0.5])
            plot.autoRange(padding=0)
        frames = np.asarray(e["frames"])
        amps = np.asarray(e["amplitude"], dtype=float)
        p = np.nan_to_num(np.asarray(e["p_occupied"], dtype=float))
        cmap = pg.colormap.get("viridis")
        brushes = [pg.mkBrush(c) for c in cmap.map(p, mode="qcolor")]
        ok = np.isfinite(amps)
        self._points.setData(frames[ok], amps[ok], brush=[b for b, k in zip(brushes, ok) if k],
                             data=frames[ok])
        thr = e.get("threshold")
        self._threshold.setVisible(thr is not None)
        if thr is not None:
            self._threshold.setValue(float(thr))
        self._current.setValue(int(e["index"]))
        where = np.flatnonzero(frames == e["index"])
        lines = []
        if where.size:
            j = int(where[0])
            flags = decode_flags(int(e["flags"][j]))
            lines.append(f"frame {e['index']}: amplitude {amps[j]:.0f} photons, P(atom) {p[j]:.3f}; "
                         f"flags: {', '.join(flags) if flags else 'none'}")
        occupied = int(np.count_nonzero(p > 0.5))
        any_flags = sorted({name for f in np.asarray(e["flags"]) for name in decode_flags(int(f))})
        lines.append(f"read as occupied in {occupied} of {frames.size} frames; flags seen over the stack: "
                     f"{', '.join(any_flags) if any_flags else 'none'}")
        self.details.setText("\n".join(lines))

    def _point_clicked(self, _item, points, *_args) -> None:
        if len(points):
            self.frameRequested.emit(int(points[0].data()))
