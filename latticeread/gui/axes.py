"""Plot axes for counted quantities (frame, shot): ticks on whole numbers only."""

from __future__ import annotations

import math

import pyqtgraph as pg

__all__ = ["IntegerAxis"]


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
