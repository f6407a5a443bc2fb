"""The analysed region: shapes drawn on the frame -> which lattice sites are analysed.

A :class:`SiteRegion` holds shapes in pixel coordinates (``x`` = column, ``y`` = row, the
centre of pixel (0, 0) at (0, 0)) and single sites the user excluded:

* ``include`` shapes: when there is at least one, only sites whose centre lies inside one of
  them are analysed; with none, every site of the calibration is;
* ``exclude`` shapes (masked areas): sites whose centre lies inside one of them are not
  analysed;
* ``excluded_sites``: ``(row, col)`` lattice indices left out one by one.

A site belongs to the region by the position of its centre in the calibration's lattice
(reference offset), not in each frame's re-fitted lattice: the site set stays the same in
every frame, so pairs of images and means over a stack compare the same sites. Excluded
sites are still part of the image model (their light is fitted, so it does not leak into
their neighbours); they are only left out of the results.

Shapes (:class:`RegionShape`):

* ``"polygon"``: vertices ``points`` ((x, y) pixels, at least 3, closed implicitly);
* ``"rectangle"`` and ``"ellipse"``: a box of ``width`` x ``height`` pixels with one corner at
  ``origin`` = (x0, y0), turned by ``angle`` degrees about that corner
  (x = x0 + u cos(angle) - v sin(angle), y = y0 + u sin(angle) + v cos(angle) for the box
  coordinates 0 <= u <= width, 0 <= v <= height); the ellipse is the one inscribed in that
  box (a disk when width == height).

Point-in-polygon uses :func:`skimage.measure.points_in_poly`; points exactly on an edge may
fall either way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from latticeread.errors import CalibrationError

__all__ = ["RegionShape", "SiteRegion", "SHAPE_KINDS", "shape_contains", "sites_in_region"]

#: Shapes a region is made of.
SHAPE_KINDS = ("polygon", "rectangle", "ellipse")


def _finite_pair(value, name: str) -> tuple[float, float]:
    try:
        x, y = (float(v) for v in value)
    except (TypeError, ValueError) as exc:
        raise CalibrationError(f"{name} must be two numbers (x, y) in pixels, got {value!r}") from exc
    if not (math.isfinite(x) and math.isfinite(y)):
        raise CalibrationError(f"{name} must be finite pixel coordinates, got {value!r}")
    return x, y


@dataclass(frozen=True)
class RegionShape:
    """One shape of a region, in pixel coordinates.

    Attributes
    ----------
    kind : {"polygon", "rectangle", "ellipse"}
    points : tuple of (x, y)
        Polygon vertices, pixels (polygon only).
    origin : (x, y)
        Corner of the box, pixels (rectangle and ellipse).
    width, height : float
        Sides of the box along its own axes, pixels (> 0).
    angle : float
        Rotation of the box about ``origin``, degrees (from +x towards +y).
    """

    kind: str
    points: tuple = ()
    origin: tuple[float, float] = (0.0, 0.0)
    width: float = 0.0
    height: float = 0.0
    angle: float = 0.0

    def __post_init__(self):
        if self.kind not in SHAPE_KINDS:
            raise CalibrationError(f"unknown region shape {self.kind!r}; use one of {', '.join(SHAPE_KINDS)}")
        if self.kind == "polygon":
            pts = tuple(_finite_pair(p, "a polygon vertex") for p in (self.points or ()))
            if len(pts) < 3:
                raise CalibrationError(f"a region polygon needs at least 3 vertices, got {len(pts)}")
            object.__setattr__(self, "points", pts)
            return
        object.__setattr__(self, "points", ())
        object.__setattr__(self, "origin", _finite_pair(self.origin, f"the {self.kind}'s corner"))
        for name in ("width", "height", "angle"):
            try:
                v = float(getattr(self, name))
            except (TypeError, ValueError) as exc:
                raise CalibrationError(f"the {self.kind}'s {name} must be a number, got "
                                       f"{getattr(self, name)!r}") from exc
            if not math.isfinite(v):
                raise CalibrationError(f"the {self.kind}'s {name} must be finite, got {v!r}")
            object.__setattr__(self, name, v)
        if self.width <= 0 or self.height <= 0:
            raise CalibrationError(f"a region {self.kind} needs a positive width and height in pixels, got "
                                   f"{self.width:g} x {self.height:g}")

    @classmethod
    def polygon(cls, points) -> "RegionShape":
        return cls("polygon", points=tuple(points))

    @classmethod
    def rectangle(cls, origin, width, height, angle=0.0) -> "RegionShape":
        return cls("rectangle", origin=tuple(origin), width=width, height=height, angle=angle)

    @classmethod
    def ellipse(cls, origin, width, height, angle=0.0) -> "RegionShape":
        return cls("ellipse", origin=tuple(origin), width=width, height=height, angle=angle)

    @classmethod
    def disk(cls, center, radius) -> "RegionShape":
        """A disk of ``radius`` pixels about ``center`` (x, y)."""
        cx, cy = _finite_pair(center, "the disk's centre")
        r = float(radius)
        return cls("ellipse", origin=(cx - r, cy - r), width=2 * r, height=2 * r)

    def to_dict(self) -> dict:
        if self.kind == "polygon":
            return {"kind": "polygon", "points": [list(p) for p in self.points]}
        return {"kind": self.kind, "origin": list(self.origin), "width": self.width, "height": self.height,
                "angle": self.angle}

    @classmethod
    def from_dict(cls, data) -> "RegionShape":
        if not isinstance(data, dict):
            raise CalibrationError(f"a region shape must be an object, got {type(data).__name__}")
        unknown = set(data) - {"kind", "points", "origin", "width", "height", "angle"}
        if unknown:
            raise CalibrationError(f"unknown region shape key(s) {', '.join(sorted(unknown))}")
        if "kind" not in data:
            raise CalibrationError("a region shape has no 'kind' (polygon, rectangle or ellipse)")
        return cls(**data)


def shape_contains(shape: RegionShape, x, y) -> np.ndarray:
    """True where the points (x, y), pixels, lie inside ``shape``.

    Parameters
    ----------
    shape : RegionShape
    x, y : array_like of float
        Point coordinates in pixels (same shape).

    Returns
    -------
    ndarray of bool
        Same shape as ``x``.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if shape.kind == "polygon":
        from skimage.measure import points_in_poly

        pts = np.column_stack([x.ravel(), y.ravel()])
        if pts.shape[0] == 0:
            return np.zeros(x.shape, dtype=bool)
        return np.asarray(points_in_poly(pts, np.asarray(shape.points, dtype=float)), dtype=bool).reshape(x.shape)
    a = math.radians(shape.angle)
    dx, dy = x - shape.origin[0], y - shape.origin[1]
    u = dx * math.cos(a) + dy * math.sin(a)      # box coordinates: rotate back by -angle
    v = -dx * math.sin(a) + dy * math.cos(a)
    if shape.kind == "rectangle":
        return (u >= 0) & (u <= shape.width) & (v >= 0) & (v <= shape.height)
    hw, hh = shape.width / 2, shape.height / 2
    return ((u - hw) / hw) ** 2 + ((v - hh) / hh) ** 2 <= 1.0


@dataclass(frozen=True)
class SiteRegion:
    """The analysed region of a calibration (see the module notes).

    Attributes
    ----------
    include : tuple of RegionShape
        Sites inside any of these are analysed (none = every site).
    exclude : tuple of RegionShape
        Masked areas: sites inside any of these are not analysed.
    excluded_sites : tuple of (row, col)
        Single sites not analysed (lattice indices along a1, a2), sorted, no repeats.
    """

    include: tuple = ()
    exclude: tuple = ()
    excluded_sites: tuple = field(default=())

    def __post_init__(self):
        for name in ("include", "exclude"):
            shapes = tuple(s if isinstance(s, RegionShape) else RegionShape.from_dict(s)
                           for s in (getattr(self, name) or ()))
            object.__setattr__(self, name, shapes)
        try:
            sites = sorted({(int(r), int(c)) for r, c in (self.excluded_sites or ())})
        except (TypeError, ValueError) as exc:
            raise CalibrationError(f"excluded sites must be [row, col] pairs of whole numbers, got "
                                   f"{self.excluded_sites!r}") from exc
        object.__setattr__(self, "excluded_sites", tuple(sites))

    @property
    def is_everything(self) -> bool:
        """True when the region analyses every site (no shape, no excluded site)."""
        return not (self.include or self.exclude or self.excluded_sites)

    def describe(self) -> str:
        """One line for the status bar, the terminal and exports."""
        if self.is_everything:
            return "every site"
        parts = []
        if self.include:
            parts.append(f"inside {len(self.include)} shape{'s' if len(self.include) > 1 else ''}")
        if self.exclude:
            parts.append(f"{len(self.exclude)} masked area{'s' if len(self.exclude) > 1 else ''}")
        if self.excluded_sites:
            n = len(self.excluded_sites)
            parts.append(f"{n} excluded site{'s' if n > 1 else ''}")
        return ", ".join(parts)

    def with_sites_excluded(self, sites, *, excluded: bool = True) -> "SiteRegion":
        """The same region with ``sites`` ((row, col) pairs) excluded, or let back in."""
        sites = {(int(r), int(c)) for r, c in sites}
        now = set(self.excluded_sites)
        now = now | sites if excluded else now - sites
        return SiteRegion(self.include, self.exclude, tuple(now))

    def to_dict(self) -> dict:
        return {"include": [s.to_dict() for s in self.include], "exclude": [s.to_dict() for s in self.exclude],
                "excluded_sites": [list(p) for p in self.excluded_sites]}

    @classmethod
    def from_dict(cls, data) -> "SiteRegion":
        if data is None:
            return cls()
        if not isinstance(data, dict):
            raise CalibrationError(f"the analysed region must be an object, got {type(data).__name__}")
        unknown = set(data) - {"include", "exclude", "excluded_sites"}
        if unknown:
            raise CalibrationError(f"unknown analysed-region key(s) {', '.join(sorted(unknown))}")
        for key in ("include", "exclude", "excluded_sites"):
            if not isinstance(data.get(key, []), (list, tuple)):
                raise CalibrationError(f"the analysed region's {key!r} must be a list")
        return cls(include=tuple(RegionShape.from_dict(s) for s in data.get("include", [])),
                   exclude=tuple(RegionShape.from_dict(s) for s in data.get("exclude", [])),
                   excluded_sites=tuple(tuple(p) for p in data.get("excluded_sites", [])))


def sites_in_region(region: SiteRegion | None, *, x, y, rows, cols) -> np.ndarray:
    """Which sites are analysed.

    Parameters
    ----------
    region : SiteRegion or None
        None analyses every site.
    x, y : (N,) array_like of float
        Site centres, pixels (the calibration's lattice).
    rows, cols : (N,) array_like of int
        Site indices along a1 and a2.

    Returns
    -------
    (N,) ndarray of bool
        True for an analysed site.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    keep = np.ones(x.shape, dtype=bool)
    if region is None or region.is_everything:
        return keep
    if region.include:
        inside = np.zeros(x.shape, dtype=bool)
        for s in region.include:
            inside |= shape_contains(s, x, y)
        keep &= inside
    for s in region.exclude:
        keep &= ~shape_contains(s, x, y)
    if region.excluded_sites:
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        ex = np.asarray(region.excluded_sites, dtype=np.int64)
        # one integer key per site: rows and cols are small lattice indices
        span = int(max(np.abs(cols).max(initial=0), np.abs(ex[:, 1]).max(initial=0))) * 2 + 3
        keyed = rows * span + cols
        keep &= ~np.isin(keyed, ex[:, 0] * span + ex[:, 1])
    return keep
