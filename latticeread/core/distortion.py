"""Lens distortion: a smooth displacement of the sites from the perfect lattice.

An imaging system with barrel or pincushion distortion maps a point at distance ``r`` from its
optical axis to ``r (1 + k1 r^2 + ...)`` (Seidel distortion; Born & Wolf, Principles of Optics,
ch. 5.3, from memory): on the camera the sites of a perfect lattice lie on a smoothly bent grid.
The constant and linear parts of any such map are a shift, rotation, scaling and shear of the
lattice and belong to the lattice geometry; what is left is a displacement field of degree 2
and higher.

Model
-----
Site ``n`` of a frame sits at ``p_n + D(p_n)``, where ``p_n = offset + row a1 + col a2`` is the
perfect-lattice position (:class:`LatticeGeometry`) and ``D`` is a polynomial in the normalised
coordinates ``u = (x - cx) / s``, ``v = (y - cy) / s`` (frame centre, half the frame diagonal)
with only the terms of total degree 2 .. ``order`` (degree 3 holds the radial ``k1`` term about
any centre exactly; the part of it that is constant or linear is taken up by the geometry).

Fit (:func:`fit_distortion`): atoms that stand apart are located in every frame
(:func:`latticeread.core.atoms.locate_atoms`), each is given the indices of its nearest site,
and one linear least-squares problem (:func:`scipy.linalg.lstsq`) gives the lattice vectors, one
offset per frame and the coefficients of ``D`` together; the indices are re-assigned with the
fitted model and the fit repeated. Atoms more than 4 robust standard deviations off the model
are dropped.

When is the field used?  The field is **applied** only when it is both real and large enough
to matter: an F-test of the fit with ``D`` against the perfect lattice (the same atoms; the
usual nested-model test of linear least squares, :func:`scipy.stats.f`) must give p < 1e-6,
and the field must move some site of the frame by at least :data:`MIN_SHIFT_SPACINGS` of a
lattice spacing. Otherwise the field is kept for display but the sites stay on the perfect
lattice.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from latticeread.core._poly2d import poly_design, poly_terms
from latticeread.errors import CalibrationError

__all__ = ["DistortionField", "MIN_SHIFT_SPACINGS", "P_VALUE_LIMIT"]

log = logging.getLogger(__name__)

#: The smallest largest-site-displacement (fraction of a lattice spacing) for which a
#: significant field is applied; below it the sites stay on the perfect lattice.
MIN_SHIFT_SPACINGS = 0.01
#: F-test p-value below which the field counts as real.
P_VALUE_LIMIT = 1e-6


def _floats(values, name: str) -> tuple[float, ...]:
    try:
        out = tuple(float(v) for v in values)
    except (TypeError, ValueError) as exc:
        raise CalibrationError(f"the distortion field's {name} must be numbers, got {values!r}") from exc
    if not all(np.isfinite(out)):
        raise CalibrationError(f"the distortion field's {name} must be finite, got {values!r}")
    return out


@dataclass(frozen=True, eq=False)
class DistortionField:
    """A fitted distortion field (displacement from the perfect lattice, pixels).

    Attributes
    ----------
    centre : (float, float)
        ``(x, y)`` of the normalisation centre, pixels.
    scale : float
        Normalisation length ``s``, pixels.
    order : int
        Highest total degree of the polynomial (2 .. 4).
    coef_x, coef_y : tuple of float
        Coefficients (pixels) of the monomials ``poly_terms(order, min_degree=2)`` for the
        x and y displacement.
    applied : bool
        True when the fit passed the significance test (module notes) and the sites are
        placed with it.
    n_atoms : int
        Atoms in the fit.
    rms_lattice : float
        RMS distance of those atoms from the best perfect lattice, pixels.
    rms_residual : float
        RMS distance from the distorted model, pixels.
    p_value : float
        F-test p-value of the field against the perfect lattice.
    max_shift : float
        Largest displacement over the frame's sites, pixels.
    spacing : float
        Smallest lattice spacing, pixels (for messages in spacings).
    binned : (K, 4) ndarray
        Measured displacement of the atoms from the perfect lattice averaged in blocks of the
        frame: columns ``x, y, dx, dy`` in pixels (for the geometry view).
    """

    centre: tuple[float, float]
    scale: float
    order: int
    coef_x: tuple[float, ...]
    coef_y: tuple[float, ...]
    applied: bool = False
    n_atoms: int = 0
    rms_lattice: float = float("nan")
    rms_residual: float = float("nan")
    p_value: float = float("nan")
    max_shift: float = 0.0
    spacing: float = float("nan")
    binned: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)), repr=False)

    def __post_init__(self):
        order = int(self.order)
        if not 2 <= order <= 4:
            raise CalibrationError(f"the distortion field's order must be 2, 3 or 4, got {self.order!r}")
        n = len(poly_terms(order, min_degree=2))
        cx, cy = _floats(self.centre, "centre")
        coef_x, coef_y = _floats(self.coef_x, "x coefficients"), _floats(self.coef_y, "y coefficients")
        if len(coef_x) != n or len(coef_y) != n:
            raise CalibrationError(f"a distortion field of order {order} needs {n} coefficients per axis, got "
                                   f"{len(coef_x)} and {len(coef_y)}")
        scale = float(self.scale)
        if not np.isfinite(scale) or scale <= 0:
            raise CalibrationError(f"the distortion field's scale must be a positive length in pixels, got "
                                   f"{self.scale!r}")
        binned = np.asarray(self.binned, float).reshape(-1, 4).copy()
        binned.setflags(write=False)
        for name, value in (("centre", (cx, cy)), ("scale", scale), ("order", order), ("coef_x", coef_x),
                            ("coef_y", coef_y), ("applied", bool(self.applied)), ("n_atoms", int(self.n_atoms)),
                            ("rms_lattice", float(self.rms_lattice)), ("rms_residual", float(self.rms_residual)),
                            ("p_value", float(self.p_value)), ("max_shift", float(self.max_shift)),
                            ("spacing", float(self.spacing)), ("binned", binned)):
            object.__setattr__(self, name, value)

    def _key(self):
        return (self.centre, self.scale, self.order, self.coef_x, self.coef_y, self.applied, self.n_atoms,
                repr(self.rms_lattice), repr(self.rms_residual), repr(self.p_value), repr(self.max_shift),
                repr(self.spacing), self.binned.tobytes())

    def __eq__(self, other) -> bool:
        if not isinstance(other, DistortionField):
            return NotImplemented
        return self._key() == other._key()

    __hash__ = None  # type: ignore[assignment]

    @property
    def terms(self) -> tuple[tuple[int, int], ...]:
        return poly_terms(self.order, min_degree=2)

    def shift(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Displacement ``(dx, dy)`` in pixels of perfect-lattice points ``(x, y)`` (pixels)."""
        x = np.asarray(x, float)
        design = poly_design(x, y, centre=self.centre, scale=self.scale, terms=self.terms)
        return (design @ np.asarray(self.coef_x)).reshape(x.shape), (design @ np.asarray(self.coef_y)).reshape(x.shape)

    def place(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Where perfect-lattice points land on the camera: ``(x, y) + D(x, y)`` when applied, else unchanged."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not self.applied:
            return x.copy(), y.copy()
        dx, dy = self.shift(x, y)
        return x + dx, y + dy

    def unplace(self, x, y, *, n_iter: int = 4) -> tuple[np.ndarray, np.ndarray]:
        """Inverse of :meth:`place` (fixed-point iteration; the field is smooth and small)."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not self.applied:
            return x.copy(), y.copy()
        px, py = x.copy(), y.copy()
        for _ in range(n_iter):
            dx, dy = self.shift(px, py)
            px, py = x - dx, y - dy
        return px, py

    def describe(self) -> str:
        """One line for the terminal, the window and exports."""
        spacing = self.spacing if np.isfinite(self.spacing) and self.spacing > 0 else float("nan")
        state = "applied" if self.applied else "not applied (not significant or too small)"
        return (f"lens distortion up to {self.max_shift:.2f} px ({self.max_shift / spacing:.3f} spacing) at the "
                f"frame's sites, {state}; {self.n_atoms} atoms, off the perfect lattice {self.rms_lattice:.3f} px rms, "
                f"off the distorted one {self.rms_residual:.3f} px rms")

    def to_dict(self) -> dict:
        return {"centre": list(self.centre), "scale": self.scale, "order": self.order, "coef_x": list(self.coef_x),
                "coef_y": list(self.coef_y), "applied": self.applied, "n_atoms": self.n_atoms,
                "rms_lattice": self.rms_lattice, "rms_residual": self.rms_residual, "p_value": self.p_value,
                "max_shift": self.max_shift, "spacing": self.spacing, "binned": self.binned.tolist()}

    @classmethod
    def from_dict(cls, data) -> "DistortionField":
        if not isinstance(data, dict):
            raise CalibrationError(f"the distortion field must be an object, got {type(data).__name__}")
        known = {"centre", "scale", "order", "coef_x", "coef_y", "applied", "n_atoms", "rms_lattice",
                 "rms_residual", "p_value", "max_shift", "spacing", "binned"}
        unknown = set(data) - known
        if unknown:
            raise CalibrationError(f"unknown distortion field entr(ies) {', '.join(sorted(unknown))}")
        missing = [k for k in ("centre", "scale", "order", "coef_x", "coef_y") if k not in data]
        if missing:
            raise CalibrationError(f"the distortion field is missing {', '.join(missing)}")
        try:
            return cls(**{**data, "binned": np.asarray(data.get("binned", []), float).reshape(-1, 4)})
        except (TypeError, ValueError) as exc:
            raise CalibrationError(f"the distortion field is malformed ({exc})") from exc
