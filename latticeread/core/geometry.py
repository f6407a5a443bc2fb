"""Lattice geometry: two primitive vectors and an offset, and the sites of a frame.

Conventions
-----------
Vectors and positions are ``(x, y)`` pairs in pixels, ``x`` = column, ``y`` = row, the
centre of pixel (0, 0) at (0, 0). Site ``(row, col)`` (``row`` counts along ``a1``, ``col``
along ``a2``) sits at ``offset + row * a1 + col * a2``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

__all__ = ["LatticeGeometry", "LatticeQuality", "SiteGrid", "lattice_sites"]


@dataclass(frozen=True)
class LatticeQuality:
    """How much an estimated geometry can be trusted.

    Attributes
    ----------
    peak_to_background : float
        Height of the weaker of the two Fourier peaks over the median spectral
        background around it (dimensionless; below ~5 the lattice is doubtful).
    residual : float
        RMS residual of the refinement, in pixels (vectors) or lattice spacings (phase).
    n_sites_used : int
        Number of bright sites that entered the phase/vector fit.
    warnings : tuple of str
        Human-readable reasons why the estimate may mislead; empty when all is well.
    spacing_sigma : float
        1-sigma statistical uncertainty of the lattice spacings, relative (dimensionless),
        where the method provides one (the image-model fit); NaN otherwise.
    """

    peak_to_background: float = float("nan")
    residual: float = float("nan")
    n_sites_used: int = 0
    warnings: tuple[str, ...] = ()
    spacing_sigma: float = float("nan")

    @property
    def is_reliable(self) -> bool:
        """True when no warning was raised."""
        return len(self.warnings) == 0

    def to_dict(self) -> dict:
        return {
            "peak_to_background": float(self.peak_to_background),
            "residual": float(self.residual),
            "n_sites_used": int(self.n_sites_used),
            "warnings": list(self.warnings),
            "spacing_sigma": float(self.spacing_sigma),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "LatticeQuality":
        return cls(
            peak_to_background=float(data.get("peak_to_background", float("nan"))),
            residual=float(data.get("residual", float("nan"))),
            n_sites_used=int(data.get("n_sites_used", 0)),
            warnings=tuple(data.get("warnings", ())),
            spacing_sigma=float(data.get("spacing_sigma", float("nan"))),
        )


@dataclass(frozen=True)
class LatticeGeometry:
    """A 2-D Bravais lattice in camera pixels.

    Attributes
    ----------
    a1, a2 : (2,) tuple of float
        Primitive lattice vectors ``(x, y)`` in pixels.
    offset : (2,) tuple of float
        Position ``(x, y)`` in pixels of site ``(0, 0)``.
    quality : LatticeQuality
        Diagnostics of the estimate that produced this geometry.
    """

    a1: tuple[float, float]
    a2: tuple[float, float]
    offset: tuple[float, float] = (0.0, 0.0)
    quality: LatticeQuality = field(default_factory=LatticeQuality, compare=False)

    def __post_init__(self):
        a1 = tuple(float(v) for v in np.asarray(self.a1, dtype=float).reshape(2))
        a2 = tuple(float(v) for v in np.asarray(self.a2, dtype=float).reshape(2))
        offset = tuple(float(v) for v in np.asarray(self.offset, dtype=float).reshape(2))
        if not all(np.isfinite(a1 + a2 + offset)):
            raise ValueError(f"lattice vectors and offset must be finite, got a1={a1}, a2={a2}, offset={offset}")
        if abs(a1[0] * a2[1] - a1[1] * a2[0]) < 1e-9:
            raise ValueError(f"lattice vectors a1={a1} and a2={a2} are collinear")
        object.__setattr__(self, "a1", a1)
        object.__setattr__(self, "a2", a2)
        object.__setattr__(self, "offset", offset)

    # --- derived quantities -------------------------------------------------------
    @property
    def basis(self) -> np.ndarray:
        """(2, 2) matrix whose columns are a1 and a2 (pixels)."""
        return np.array([self.a1, self.a2], dtype=float).T

    @property
    def spacings(self) -> tuple[float, float]:
        """Lengths of a1 and a2 in pixels."""
        return float(np.hypot(*self.a1)), float(np.hypot(*self.a2))

    @property
    def angles(self) -> tuple[float, float]:
        """Directions of a1 and a2 in radians, measured from +x towards +y (image down)."""
        return float(np.arctan2(self.a1[1], self.a1[0])), float(np.arctan2(self.a2[1], self.a2[0]))

    @property
    def angle_between(self) -> float:
        """Angle between a1 and a2 in radians (pi/2 for a square lattice)."""
        a1, a2 = np.asarray(self.a1), np.asarray(self.a2)
        return float(np.arccos(np.clip(a1 @ a2 / (np.linalg.norm(a1) * np.linalg.norm(a2)), -1, 1)))

    @property
    def cell_area(self) -> float:
        """Area of the unit cell in pixel^2."""
        return float(abs(np.linalg.det(self.basis)))

    @property
    def reciprocal(self) -> np.ndarray:
        """(2, 2) array whose rows b1, b2 satisfy a_i . b_j = delta_ij (cycles per pixel)."""
        return np.linalg.inv(self.basis)

    def site_positions(self, rows, cols) -> tuple[np.ndarray, np.ndarray]:
        """Pixel coordinates ``(x, y)`` of sites ``(rows, cols)`` (arrays broadcast)."""
        rows = np.asarray(rows, dtype=float)
        cols = np.asarray(cols, dtype=float)
        x = self.offset[0] + rows * self.a1[0] + cols * self.a2[0]
        y = self.offset[1] + rows * self.a1[1] + cols * self.a2[1]
        return x, y

    def fractional_indices(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Fractional lattice indices ``(row, col)`` of pixel positions ``(x, y)``."""
        d = np.stack([np.asarray(x, float) - self.offset[0], np.asarray(y, float) - self.offset[1]])
        frac = np.tensordot(self.reciprocal, d, axes=1)
        return frac[0], frac[1]

    def with_offset(self, offset, quality: LatticeQuality | None = None) -> "LatticeGeometry":
        """Same vectors, new offset (and optionally new quality)."""
        return dataclasses.replace(self, offset=tuple(offset), quality=quality if quality is not None else self.quality)

    def to_dict(self) -> dict:
        return {
            "a1": list(self.a1),
            "a2": list(self.a2),
            "offset": list(self.offset),
            "quality": self.quality.to_dict(),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "LatticeGeometry":
        return cls(
            a1=tuple(data["a1"]),
            a2=tuple(data["a2"]),
            offset=tuple(data.get("offset", (0.0, 0.0))),
            quality=LatticeQuality.from_dict(data.get("quality", {})),
        )


@dataclass(frozen=True)
class SiteGrid:
    """The lattice sites that fall inside a frame.

    Attributes
    ----------
    rows, cols : (N,) ndarray of int
        Site indices along a1 and a2.
    x, y : (N,) ndarray of float
        Site centres in pixels.
    row_min, col_min : int
        Smallest indices; the occupation matrix element ``[row - row_min, col - col_min]``
        belongs to site ``(row, col)``.
    n_rows, n_cols : int
        Shape of the bounding matrix that holds every site.
    """

    rows: np.ndarray
    cols: np.ndarray
    x: np.ndarray
    y: np.ndarray
    row_min: int
    col_min: int
    n_rows: int
    n_cols: int

    def __len__(self) -> int:
        return int(self.rows.size)

    @property
    def matrix_shape(self) -> tuple[int, int]:
        return (self.n_rows, self.n_cols)

    def to_matrix(self, values, *, fill=0, dtype=None) -> np.ndarray:
        """Place per-site ``values`` (N,) into the (n_rows, n_cols) matrix; other entries = ``fill``."""
        values = np.asarray(values)
        out = np.full(self.matrix_shape, fill, dtype=dtype or values.dtype)
        out[self.rows - self.row_min, self.cols - self.col_min] = values
        return out

    def from_matrix(self, matrix) -> np.ndarray:
        """Per-site values (N,) read out of an (n_rows, n_cols) matrix."""
        return np.asarray(matrix)[self.rows - self.row_min, self.cols - self.col_min]


def lattice_sites(
    geometry: LatticeGeometry,
    frame_shape: tuple[int, int],
    *,
    margin: float = 0.0,
    mask: np.ndarray | None = None,
    index_bounds: tuple[int, int, int, int] | None = None,
) -> SiteGrid:
    """List the lattice sites whose centre lies inside a frame.

    Parameters
    ----------
    geometry : LatticeGeometry
        Lattice vectors and offset (pixels).
    frame_shape : (int, int)
        ``(height, width)`` of the frame in pixels.
    margin : float, optional
        Keep only sites at least this many pixels inside the frame border.
    mask : (H, W) ndarray of bool, optional
        Region of interest; a site is kept when the pixel under its centre is True.
    index_bounds : (row_min, row_max, col_min, col_max), optional
        Keep only sites with indices in these inclusive bounds (a fixed region).

    Returns
    -------
    SiteGrid
        Sites sorted by (row, col).
    """
    height, width = int(frame_shape[0]), int(frame_shape[1])
    # Fractional indices of the frame corners bound the index range.
    cx = np.array([-0.5, width - 0.5, -0.5, width - 0.5])
    cy = np.array([-0.5, -0.5, height - 0.5, height - 0.5])
    fr, fc = geometry.fractional_indices(cx, cy)
    r0, r1 = int(np.floor(fr.min())) - 1, int(np.ceil(fr.max())) + 1
    c0, c1 = int(np.floor(fc.min())) - 1, int(np.ceil(fc.max())) + 1
    if index_bounds is not None:
        r0, r1 = max(r0, index_bounds[0]), min(r1, index_bounds[1])
        c0, c1 = max(c0, index_bounds[2]), min(c1, index_bounds[3])
    rr, cc = np.meshgrid(np.arange(r0, r1 + 1), np.arange(c0, c1 + 1), indexing="ij")
    rr, cc = rr.ravel(), cc.ravel()
    x, y = geometry.site_positions(rr, cc)
    keep = (x >= margin - 0.5) & (x <= width - 0.5 - margin) & (y >= margin - 0.5) & (y <= height - 0.5 - margin)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != (height, width):
            raise ValueError(f"mask shape {mask.shape} does not match frame shape {(height, width)}")
        xi = np.clip(np.rint(x).astype(int), 0, width - 1)
        yi = np.clip(np.rint(y).astype(int), 0, height - 1)
        keep &= mask[yi, xi]
    rr, cc, x, y = rr[keep], cc[keep], x[keep], y[keep]
    if rr.size == 0:
        return SiteGrid(rr.astype(int), cc.astype(int), x, y, 0, 0, 0, 0)
    return SiteGrid(
        rows=rr.astype(int),
        cols=cc.astype(int),
        x=x,
        y=y,
        row_min=int(rr.min()),
        col_min=int(cc.min()),
        n_rows=int(rr.max() - rr.min() + 1),
        n_cols=int(cc.max() - cc.min() + 1),
    )
