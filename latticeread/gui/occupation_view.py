"""Occupation matrix of the current frame and the mean occupation over the stack.

A pure view. Rows of the matrices count along lattice vector a1 (downwards), columns along
a2 (to the right); entries outside the reconstructed region are drawn grey.

Methods
-------
set_current(matrix, *, frame_index)
    (n_rows, n_cols) uint8: 0 empty, 1 occupied, 255 outside the region; None clears.
set_mean(mean, *, n_frames)
    (n_rows, n_cols) float in [0, 1], NaN outside; None clears.
clear()

Signals
-------
siteHovered(object)   dict(row, col, which="current"|"mean", value) under the cursor, or None
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

__all__ = ["OccupationView"]

_OUTSIDE = (70, 70, 70, 255)
_EMPTY = (20, 24, 60, 255)
_OCCUPIED = (255, 170, 40, 255)


class OccupationView(QtWidgets.QWidget):
    """Two matrices side by side: this frame (binary) and the mean over reconstructed frames."""

    siteHovered = QtCore.Signal(object)

    def __init__(self, parent=None):
        super().__init__(parent)
        self._current = None
        self._mean = None
        self._row_min = 0
        self._col_min = 0
        self._current_title = ""
        self._mean_title = ""
        self.graphics = pg.GraphicsLayoutWidget()
        self.graphics.setToolTip("Occupation matrices: rows along lattice vector a1, columns along a2; "
                                 "scroll to zoom, drag to pan")
        self.current_plot = self.graphics.addPlot(row=0, col=0, title="This frame")
        self.mean_plot = self.graphics.addPlot(row=0, col=1, title="Mean over frames")
        for plot in (self.current_plot, self.mean_plot):
            plot.invertY(True)
            plot.setAspectLocked(True)
            plot.setLabel("left", "row (a1)")
            plot.setLabel("bottom", "col (a2)")
            plot.hideButtons()
        self.mean_plot.setXLink(self.current_plot)
        self.mean_plot.setYLink(self.current_plot)
        self.current_item = pg.ImageItem(axisOrder="row-major")
        self.current_plot.addItem(self.current_item)
        self.mean_item = pg.ImageItem(axisOrder="row-major")
        self.mean_plot.addItem(self.mean_item)
        self.colorbar = pg.ColorBarItem(values=(0, 1), colorMap=pg.colormap.get("viridis"), width=12,
                                        interactive=False, label="mean occupation")
        self.colorbar.setImageItem(self.mean_item, insert_in=self.mean_plot)
        # what the colours of the frame's matrix mean, in one row under it
        self.legend = pg.LegendItem(labelTextColor=(220, 220, 220), colCount=3)
        for color, text in ((_OCCUPIED, "occupied"), (_EMPTY, "empty"), (_OUTSIDE, "outside the region")):
            sample = pg.PlotDataItem([0], [0], pen=None, symbol="s", symbolSize=10, symbolBrush=color,
                                     symbolPen=pg.mkPen(150, 150, 150))
            self.legend.addItem(sample, text)
        self.graphics.addItem(self.legend, row=1, col=0, colspan=2)
        self.summary = QtWidgets.QLabel("no occupation yet: reconstruct the frames")
        self.summary.setToolTip("Atoms counted in this frame, sites in the region and the filling fraction")
        self.summary.setWordWrap(True)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.graphics, 1)
        layout.addWidget(self.summary)
        self.graphics.scene().sigMouseMoved.connect(self._mouse_moved)

    def set_current(self, matrix, *, frame_index: int = 0, row_min: int = 0, col_min: int = 0,
                    check=None) -> None:
        """Show the binary occupation matrix of one frame (255 = outside the region), and below
        it the frame's model check (:class:`~latticeread.core.frame_check.FrameCheck`) if given."""
        self._row_min, self._col_min = int(row_min), int(col_min)
        if matrix is None:
            self._current = None
            self.current_item.clear()
            self.summary.setText("no occupation yet: reconstruct the frames")
            return
        m = np.asarray(matrix, dtype=np.uint8)
        self._current = m
        rgba = np.empty(m.shape + (4,), dtype=np.uint8)
        rgba[:] = _OUTSIDE
        rgba[m == 0] = _EMPTY
        rgba[m == 1] = _OCCUPIED
        new_shape = self.current_item.image is None or self.current_item.image.shape[:2] != m.shape
        self.current_item.setImage(rgba, autoLevels=False, levels=(0, 255))
        self._place(self.current_item, m.shape)
        if new_shape:
            self.current_plot.autoRange(padding=0.02)
        inside = int(np.count_nonzero(m != 255))
        atoms = int(np.count_nonzero(m == 1))
        filling = atoms / inside if inside else float("nan")
        title = f"Frame {frame_index}"
        if title != self._current_title:
            self._current_title = title
            self.current_plot.setTitle(title)
        text = f"frame {frame_index}: {atoms} atoms on {inside} sites (filling {filling:.3f})"
        if check is not None:
            from latticeread.core.frame_check import limits_text

            text += "\n" + check.describe()
            self.summary.setToolTip(limits_text())
        self.summary.setText(text)

    @property
    def has_current(self) -> bool:
        """True when a frame's occupation matrix is shown."""
        return self._current is not None

    def set_mean(self, mean, *, n_frames: int = 0) -> None:
        """Show the mean occupation over ``n_frames`` reconstructed frames (NaN outside)."""
        if mean is None:
            self._mean = None
            self.mean_item.clear()
            self._mean_title = "Mean over frames"
            self.mean_plot.setTitle(self._mean_title)
            return
        self._mean = np.asarray(mean, dtype=float)
        self.mean_item.setImage(self._mean, autoLevels=False, levels=(0.0, 1.0))
        self._place(self.mean_item, self._mean.shape)
        title = f"Mean over {n_frames} frame{'s' if n_frames != 1 else ''}"
        if title != self._mean_title:
            self._mean_title = title
            self.mean_plot.setTitle(title)

    def _place(self, item, shape) -> None:
        # pixel (i, j) of the matrix covers site (row_min + i, col_min + j), centred on the index
        item.setRect(QtCore.QRectF(self._col_min - 0.5, self._row_min - 0.5, shape[1], shape[0]))

    def clear(self) -> None:
        self.set_current(None)
        self.set_mean(None)

    def _mouse_moved(self, pos) -> None:
        for which, plot, data in (("current", self.current_plot, self._current), ("mean", self.mean_plot, self._mean)):
            if data is None or not plot.sceneBoundingRect().contains(pos):
                continue
            p = plot.vb.mapSceneToView(pos)
            row, col = int(np.rint(p.y())), int(np.rint(p.x()))
            i, j = row - self._row_min, col - self._col_min
            if 0 <= i < data.shape[0] and 0 <= j < data.shape[1]:
                self.siteHovered.emit({"row": row, "col": col, "which": which, "value": float(data[i, j])})
                return
        self.siteHovered.emit(None)
