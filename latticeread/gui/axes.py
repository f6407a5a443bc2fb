"""Plot axes: whole-number ticks for counted quantities (frame, shot), and the one plot setup
the panels share (plain labels, no pyqtgraph buttons or context menu)."""

from __future__ import annotations

import math

import pyqtgraph as pg

__all__ = ["IntegerAxis", "plain_plot"]


class IntegerAxis(pg.AxisItem):
    """A pyqtgraph axis whose ticks sit on whole numbers (no "frame 2.5")."""

    def tickValues(self, minVal, maxVal, size):  # noqa: N802 - pyqtgraph's name
        levels = []
        for spacing, values in super().tickValues(minVal, maxVal, size):
            if spacing < 1:
                continue
            levels.append((spacing, [v for v in values if float(v).is_integer()]))
        if not levels and maxVal - minVal < 1e6:
            levels = [(1.0, [float(v) for v in range(math.ceil(minVal), math.floor(maxVal) + 1)])]
        return levels


def plain_plot(widget: pg.PlotWidget, *, bottom: str, left: str, grid: float | None = None,
               image: bool = False) -> pg.PlotItem:
    """Set up a panel's plot: axis labels as given (no SI prefix such as "x0.001"), no buttons
    or context menu, an optional grid of the given opacity; ``image`` locks the aspect ratio
    and puts row 0 at the top, as in the camera frame. Returns the plot item."""
    item = widget.getPlotItem()
    if image:
        item.setAspectLocked(True)
        item.invertY(True)
    if grid is not None:
        item.showGrid(x=True, y=True, alpha=grid)
    item.setLabel("bottom", bottom)
    item.setLabel("left", left)
    item.hideButtons()
    item.setMenuEnabled(False)
    for axis in ("left", "bottom"):
        item.getAxis(axis).enableAutoSIPrefix(False)
    return item
