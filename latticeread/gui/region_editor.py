"""Draw and edit the analysed region on the image: pyqtgraph ROIs <-> :class:`SiteRegion`.

Each shape of the calibration's region is one ROI in the image's view box, in pixel
coordinates (x = column, y = row, centre of pixel (0, 0) at (0, 0)): analysed areas in
cyan, masked areas in red (dashed). Dragging, resizing or turning a shape, moving a polygon
vertex, adding one (click an edge) or removing a shape (right-click > Remove) ends in one
``regionEdited`` signal with the new region: one undo step per edit. Single excluded sites
are drawn as grey crosses.

Signals
-------
regionEdited(object)   the SiteRegion after a user edit
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore

from latticeread.core.region import RegionShape, SiteRegion

__all__ = ["RegionEditor", "roi_shape", "shape_roi", "INCLUDE_PEN", "EXCLUDE_PEN"]

INCLUDE_PEN = pg.mkPen((0, 220, 255), width=2)
EXCLUDE_PEN = pg.mkPen((255, 70, 70), width=2, style=QtCore.Qt.PenStyle.DashLine)
#: Kinds the user can add, with the label of their button.
ADD_KINDS = {"polygon": "polygon", "disk": "disk", "rectangle": "rectangle"}


def roi_shape(roi) -> RegionShape:
    """The :class:`RegionShape` (pixels) of a pyqtgraph ROI made by :func:`shape_roi`."""
    if isinstance(roi, pg.PolyLineROI):
        pts = [roi.mapToParent(p) for _name, p in roi.getLocalHandlePositions()]
        return RegionShape.polygon([(float(p.x()), float(p.y())) for p in pts])
    pos, size = roi.pos(), roi.size()
    kind = "rectangle" if isinstance(roi, pg.RectROI) else "ellipse"
    return RegionShape(kind, origin=(float(pos.x()), float(pos.y())), width=float(size.x()),
                       height=float(size.y()), angle=float(roi.angle()))


def shape_roi(shape: RegionShape, *, excluded: bool):
    """A pyqtgraph ROI showing ``shape``; editable, removable from its context menu."""
    pen = EXCLUDE_PEN if excluded else INCLUDE_PEN
    hover = pg.mkPen((255, 255, 0), width=2)
    if shape.kind == "polygon":
        roi = pg.PolyLineROI([list(p) for p in shape.points], closed=True, pen=pen, hoverPen=hover,
                             removable=True)
    elif shape.kind == "ellipse" and math.isclose(shape.width, shape.height) and shape.angle == 0.0:
        roi = pg.CircleROI(shape.origin, (shape.width, shape.height), pen=pen, hoverPen=hover, removable=True)
    elif shape.kind == "ellipse":
        roi = pg.EllipseROI(shape.origin, (shape.width, shape.height), angle=shape.angle, pen=pen,
                            hoverPen=hover, removable=True)
    else:
        roi = pg.RectROI(shape.origin, (shape.width, shape.height), angle=shape.angle, pen=pen, hoverPen=hover,
                         removable=True)
        roi.addRotateHandle([1, 0], [0.5, 0.5])
    roi.setZValue(8)
    roi.excluded = excluded
    return roi


class RegionEditor(QtCore.QObject):
    """Keeps the ROIs of one view box in step with a :class:`SiteRegion`."""

    regionEdited = QtCore.Signal(object)

    def __init__(self, view: pg.ViewBox, parent=None):
        super().__init__(parent)
        self.view = view
        self._region = SiteRegion()
        self._rois: list = []
        self._enabled = True
        self.cross_item = pg.ScatterPlotItem(size=5, symbol="x", pen=pg.mkPen((190, 190, 190, 120), width=1),
                                             brush=pg.mkBrush(None))
        self.cross_item.setZValue(7)
        view.addItem(self.cross_item)

    @property
    def region(self) -> SiteRegion:
        return self._region

    @property
    def rois(self) -> list:
        """The ROIs on the image, analysed areas first, then masked areas."""
        return list(self._rois)

    def set_enabled(self, enabled: bool) -> None:
        """Show (and allow editing of) the shapes, or hide them (live shots, no calibration)."""
        self._enabled = bool(enabled)
        for roi in self._rois:
            roi.setVisible(self._enabled)
        self.cross_item.setVisible(self._enabled)

    def set_region(self, region: SiteRegion | None, *, excluded_xy=None) -> None:
        """Show ``region`` (no signal). ``excluded_xy`` ((N,), (N,)) pixels marks the sites left out."""
        region = region or SiteRegion()
        if region != self._region or len(self._rois) != len(region.include) + len(region.exclude):
            for roi in self._rois:
                self.view.removeItem(roi)
            self._rois = []
            for excluded, shapes in ((False, region.include), (True, region.exclude)):
                for shape in shapes:
                    self._add_roi(shape_roi(shape, excluded=excluded))
            self._region = region
        if excluded_xy is None:
            self.cross_item.setData([], [])
        else:
            self.cross_item.setData(np.asarray(excluded_xy[0], float), np.asarray(excluded_xy[1], float))

    def _add_roi(self, roi) -> None:
        roi.setVisible(self._enabled)
        self.view.addItem(roi)
        roi.sigRegionChangeFinished.connect(lambda *_: self._edited())
        roi.sigRemoveRequested.connect(self._remove)
        self._rois.append(roi)

    def add_shape(self, kind: str, *, excluded: bool = False, center=None, size: float | None = None) -> None:
        """Add a shape in the middle of the visible image (or at ``center``, pixels) and emit the new region.

        Parameters
        ----------
        kind : {"polygon", "disk", "rectangle"}
        excluded : bool
            A masked area (True) or an analysed area.
        center : (x, y), optional
        size : float, optional
            Diameter / side, pixels (default: a third of the visible width).
        """
        if kind not in ADD_KINDS:
            raise ValueError(f"unknown region shape {kind!r}; use polygon, disk or rectangle")
        (x0, x1), (y0, y1) = self.view.viewRange()
        cx, cy = center if center is not None else ((x0 + x1) / 2, (y0 + y1) / 2)
        d = float(size) if size is not None else max(4.0, min(x1 - x0, y1 - y0) / 3)
        r = d / 2
        if kind == "disk":
            shape = RegionShape.disk((cx, cy), r)
        elif kind == "rectangle":
            shape = RegionShape.rectangle((cx - r, cy - r), d, d)
        else:  # a hexagon to start from: drag its corners, click an edge to add one
            angles = np.radians(np.arange(0, 360, 60) + 30)
            shape = RegionShape.polygon(list(zip(cx + r * np.cos(angles), cy + r * np.sin(angles))))
        self._add_roi(shape_roi(shape, excluded=excluded))
        self._order()
        self._edited()

    def clear(self) -> None:
        """Remove every shape and every single excluded site (one edit)."""
        if self._region.is_everything:
            return
        for roi in self._rois:
            self.view.removeItem(roi)
        self._rois = []
        self._region = SiteRegion()
        self.regionEdited.emit(self._region)

    def _order(self) -> None:
        self._rois.sort(key=lambda r: bool(r.excluded))

    def _remove(self, roi) -> None:
        if roi in self._rois:
            self._rois.remove(roi)
            # removed after the context menu has closed (the ROI owns the menu being handled)
            QtCore.QTimer.singleShot(0, lambda: self.view.removeItem(roi))
            self._edited()

    def _edited(self) -> None:
        include = tuple(roi_shape(r) for r in self._rois if not r.excluded)
        exclude = tuple(roi_shape(r) for r in self._rois if r.excluded)
        region = SiteRegion(include, exclude, self._region.excluded_sites)
        if region != self._region:
            self._region = region
            self.regionEdited.emit(region)
