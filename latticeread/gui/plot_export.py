"""Save any panel or plot as PNG (raster) or SVG (vector), atomically.

pyqtgraph's own SVG exporter raises on Qt 6.11, so both formats are rendered here with a
``QPainter``: onto a ``QImage`` for PNG and onto a ``QtSvg.QSvgGenerator`` for SVG. The target
can be a ``QWidget`` (a whole panel, a ``pg.PlotWidget``) or a graphics item inside a scene
(a ``pg.PlotItem``, an ``ImageItem``...). Files are written to a temporary file in the same
folder and moved into place (:func:`latticeread.io.atomic.atomic_path`), so a failed export
never leaves a half-written file; errors are :class:`latticeread.errors.ExportError` with a
message naming the file and the reason.

Functions
---------
``export_widget_png(widget_or_plotitem, path, *, scale=1.0) -> Path``
``export_svg(widget_or_plotitem, path, *, title=None) -> Path``
``export_plot(view, path, *, size=None) -> Path``
    The plot of a pyqtgraph view only (axes, colour bar, legend; no buttons or boxes around
    it), laid out afresh at ``size`` pixels, as PNG or SVG by the file suffix.
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6 import QtCore, QtGui, QtSvg, QtWidgets

from latticeread.errors import ExportError
from latticeread.io.atomic import atomic_path

__all__ = ["export_widget_png", "export_svg", "export_plot"]


class _Source:
    """What to paint: a widget or a region of a graphics scene, and its size in pixels."""

    def __init__(self, target):
        if isinstance(target, QtWidgets.QWidget):
            self.widget, self.scene, self.rect = target, None, None
            self.size = target.size()
            self.background = target.palette().color(QtGui.QPalette.ColorRole.Window)
        elif isinstance(target, QtWidgets.QGraphicsItem):
            scene = target.scene()
            if scene is None:
                raise ExportError("cannot export the plot: it is not shown in any window yet")
            self.widget, self.scene = None, scene
            self.rect = target.sceneBoundingRect()
            self.size = self.rect.size().toSize()
            self.background = QtGui.QColor("white")
        else:
            raise TypeError(f"cannot export a {type(target).__name__}: give a QWidget or a plot item")
        if self.size.width() < 1 or self.size.height() < 1:
            raise ExportError("cannot export the plot: it has no size yet (is the window shown?)")

    def paint(self, painter: QtGui.QPainter, scale: float = 1.0) -> None:
        painter.setRenderHint(QtGui.QPainter.RenderHint.Antialiasing, True)
        painter.setRenderHint(QtGui.QPainter.RenderHint.TextAntialiasing, True)
        if scale != 1.0:
            painter.scale(scale, scale)
        if self.widget is not None:
            # QWidget.render explicitly: QGraphicsView overrides render() with another signature
            QtWidgets.QWidget.render(self.widget, painter, QtCore.QPoint(0, 0), QtGui.QRegion(),
                               QtWidgets.QWidget.RenderFlag.DrawChildren
                               | QtWidgets.QWidget.RenderFlag.DrawWindowBackground)
        else:
            target = QtCore.QRectF(0, 0, self.size.width(), self.size.height())
            self.scene.render(painter, target, self.rect)


def export_widget_png(widget_or_plotitem, path, *, scale: float = 1.0) -> Path:
    """Render a widget or plot item to a PNG file.

    Parameters
    ----------
    widget_or_plotitem : QWidget or QGraphicsItem
        A panel, a ``pg.PlotWidget`` or a ``pg.PlotItem`` that is part of a shown scene.
    path : str or PathLike
        Output file (overwritten atomically if it exists).
    scale : float
        Resolution factor: 2 gives an image twice as wide and high as on screen.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    ExportError
        Folder missing or read-only, disk full, nothing to render.
    """
    if not (scale > 0):
        raise ValueError(f"scale must be positive, got {scale}")
    return _write_png(_Source(widget_or_plotitem), path, scale)


def _write_png(source: _Source, path, scale: float = 1.0) -> Path:
    w = max(1, round(source.size.width() * scale))
    h = max(1, round(source.size.height() * scale))
    image = QtGui.QImage(w, h, QtGui.QImage.Format.Format_ARGB32)
    image.fill(source.background)
    painter = QtGui.QPainter(image)
    try:
        source.paint(painter, scale)
    finally:
        painter.end()
    path = Path(os.fspath(path))
    with atomic_path(path) as tmp:
        if not image.save(str(tmp), "PNG"):
            raise ExportError(f"cannot write {path}: Qt could not encode the PNG image")
    return path


def export_svg(widget_or_plotitem, path, *, title: str | None = None) -> Path:
    """Render a widget or plot item to an SVG (vector) file through ``QSvgGenerator``.

    Parameters
    ----------
    widget_or_plotitem : QWidget or QGraphicsItem
        A panel, a ``pg.PlotWidget`` or a ``pg.PlotItem`` that is part of a shown scene.
    path : str or PathLike
        Output file (overwritten atomically if it exists).
    title : str, optional
        Title stored in the SVG file.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    ExportError
        Folder missing or read-only, disk full, nothing to render.
    """
    return _write_svg(_Source(widget_or_plotitem), path, title)


def _write_svg(source: _Source, path, title: str | None = None) -> Path:
    path = Path(os.fspath(path))
    with atomic_path(path) as tmp:
        generator = QtSvg.QSvgGenerator()
        generator.setFileName(str(tmp))
        generator.setResolution(96)  # so the SVG opens at the on-screen size
        generator.setSize(source.size)
        generator.setViewBox(QtCore.QRect(0, 0, source.size.width(), source.size.height()))
        generator.setTitle(title or path.stem)
        generator.setDescription("plot exported by latticeread")
        painter = QtGui.QPainter()
        if not painter.begin(generator):
            raise ExportError(f"cannot write {path}: Qt could not start the SVG file")
        try:
            painter.fillRect(QtCore.QRectF(0, 0, source.size.width(), source.size.height()), source.background)
            source.paint(painter)
        finally:
            painter.end()
        del generator  # closes the file before it is moved into place
        if os.path.getsize(tmp) == 0:
            raise ExportError(f"cannot write {path}: Qt wrote an empty SVG file")
    return path


class _ViewSource(_Source):
    """The central item of a pyqtgraph GraphicsView (a PlotItem or a GraphicsLayout) only."""

    def __init__(self, view, size=None):
        central = getattr(view, "centralWidget", None)
        if central is None or central.scene() is None:
            raise ExportError("cannot export the plot: it is not shown in any window yet")
        self.widget, self.scene = None, central.scene()
        self.central = central
        self.old_geometry = central.geometry()
        if size is not None:
            w, h = (int(v) for v in size)
            if w < 50 or h < 50 or w > 20000 or h > 20000:
                raise ExportError(f"a plot of {w} x {h} pixels cannot be exported: choose 50 to 20000 pixels a side")
            # lay the plot out afresh at the chosen size: fonts and lines keep their size
            central.setGeometry(QtCore.QRectF(0, 0, w, h))
        self.rect = central.sceneBoundingRect()
        self.size = self.rect.size().toSize()
        brush = view.backgroundBrush()
        self.background = brush.color() if brush.style() != QtCore.Qt.BrushStyle.NoBrush else QtGui.QColor("white")
        if self.size.width() < 1 or self.size.height() < 1:
            raise ExportError("cannot export the plot: it has no size yet (is the window shown?)")

    def restore(self) -> None:
        self.central.setGeometry(self.old_geometry)


def export_plot(view, path, *, size=None) -> Path:
    """Save the plot of a pyqtgraph view (no surrounding widgets) as PNG or SVG.

    Parameters
    ----------
    view : pyqtgraph.GraphicsView
        A ``PlotWidget`` or ``GraphicsLayoutWidget`` shown in a window.
    path : str or PathLike
        ``.svg`` gives a vector file, anything else a PNG.
    size : (int, int), optional
        Width and height in pixels; the plot is laid out at that size (default: as on screen).

    Raises
    ------
    ExportError
        Size out of range, folder missing or read-only, nothing to render.
    """
    source = _ViewSource(view, size)
    try:
        if Path(os.fspath(path)).suffix.lower() == ".svg":
            return _write_svg(source, path)
        return _write_png(source, path)
    finally:
        source.restore()
