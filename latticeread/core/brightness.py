"""Uneven brightness: how many photons one atom gives, relative to the centre, across the field.

The imaging light (often a Gaussian beam) is not uniform over the atoms: an atom near the edge
of the field can scatter a third fewer photons than one at the centre. A single threshold then
calls dim edge atoms empty.

Model
-----
The relative brightness ``b(x, y)`` is ``exp(P(u, v))`` with ``P`` a polynomial of total degree
1 .. ``order`` in the normalised coordinates ``u = (x - cx) / s``, ``v = (y - cy) / s``, and
``b = 1`` at the centre ``(cx, cy)`` (the middle of the occupied sites). Degree 2 holds a
Gaussian beam profile (any waist, ellipticity, tilt, offset) exactly.

The map is used to classify: each site's amplitude is divided by ``b`` at the site before it is
compared with the threshold (the empty sites' amplitudes sit near zero photons once the
background is fitted, so this is the threshold scaled by the map); the histogram, the
threshold and the posteriors are computed on these normalised amplitudes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from latticeread.core._poly2d import poly_design, poly_terms
from latticeread.errors import CalibrationError

__all__ = ["BrightnessMap"]


@dataclass(frozen=True, eq=False)
class BrightnessMap:
    """A fitted relative-brightness map (dimensionless, 1 at the centre).

    Attributes
    ----------
    centre : (float, float)
        ``(x, y)`` in pixels where the brightness is 1.
    scale : float
        Normalisation length ``s``, pixels.
    order : int
        Highest total degree of the log-brightness polynomial (1 .. 4).
    coef : tuple of float
        Coefficients of the monomials ``poly_terms(order, min_degree=1)`` of ``log b``.
    applied : bool
        True when the map passed the significance test and classification uses it.
    n_sites : int
        Occupied sites (over the stack) in the fit.
    low, high : float
        Smallest and largest relative brightness over the calibrated sites.
    scatter : float
        RMS relative scatter of single-atom amplitudes about the map (dimensionless).
    p_value : float
        F-test p-value of the map against uniform brightness.
    """

    centre: tuple[float, float]
    scale: float
    order: int
    coef: tuple[float, ...]
    applied: bool = False
    n_sites: int = 0
    low: float = 1.0
    high: float = 1.0
    scatter: float = float("nan")
    p_value: float = float("nan")

    def __post_init__(self):
        order = int(self.order)
        if not 1 <= order <= 4:
            raise CalibrationError(f"the brightness map's order must be 1 .. 4, got {self.order!r}")
        n = len(poly_terms(order, min_degree=1))
        try:
            centre = tuple(float(v) for v in self.centre)
            coef = tuple(float(v) for v in self.coef)
            scale = float(self.scale)
        except (TypeError, ValueError) as exc:
            raise CalibrationError(f"the brightness map is malformed ({exc})") from exc
        if len(centre) != 2 or len(coef) != n or not np.all(np.isfinite(centre + coef)):
            raise CalibrationError(f"a brightness map of order {order} needs a centre (x, y) and {n} finite "
                                   f"coefficients, got {len(coef)}")
        if not np.isfinite(scale) or scale <= 0:
            raise CalibrationError(f"the brightness map's scale must be a positive length in pixels, got {self.scale!r}")
        for name, value in (("centre", centre), ("scale", scale), ("order", order), ("coef", coef),
                            ("applied", bool(self.applied)), ("n_sites", int(self.n_sites)),
                            ("low", float(self.low)), ("high", float(self.high)), ("scatter", float(self.scatter)),
                            ("p_value", float(self.p_value))):
            object.__setattr__(self, name, value)

    def _key(self):
        return (self.centre, self.scale, self.order, self.coef, self.applied, self.n_sites, repr(self.low),
                repr(self.high), repr(self.scatter), repr(self.p_value))

    def __eq__(self, other) -> bool:
        if not isinstance(other, BrightnessMap):
            return NotImplemented
        return self._key() == other._key()

    __hash__ = None  # type: ignore[assignment]

    @property
    def terms(self) -> tuple[tuple[int, int], ...]:
        return poly_terms(self.order, min_degree=1)

    def relative(self, x, y) -> np.ndarray:
        """Relative brightness at points ``(x, y)`` (pixels), whatever :attr:`applied` says."""
        x = np.asarray(x, float)
        design = poly_design(x, y, centre=self.centre, scale=self.scale, terms=self.terms)
        return np.exp(design @ np.asarray(self.coef)).reshape(x.shape)

    def factor(self, x, y) -> np.ndarray:
        """The factor classification divides amplitudes by: :meth:`relative` when applied, else 1."""
        x = np.asarray(x, float)
        return self.relative(x, y) if self.applied else np.ones(x.shape)

    def image(self, shape) -> np.ndarray:
        """The map over a frame of ``shape`` (height, width), for display."""
        yy, xx = np.mgrid[0:int(shape[0]), 0:int(shape[1])]
        return self.relative(xx, yy)

    def describe(self) -> str:
        """One line for the terminal, the window and exports."""
        state = "applied" if self.applied else "not applied (not significant or under 5 %)"
        return (f"atom brightness {self.low:.2f}-{self.high:.2f} of the centre's over the sites, {state}; "
                f"{self.n_sites} occupied sites, scatter {self.scatter:.1%}")

    def to_dict(self) -> dict:
        return {"centre": list(self.centre), "scale": self.scale, "order": self.order, "coef": list(self.coef),
                "applied": self.applied, "n_sites": self.n_sites, "low": self.low, "high": self.high,
                "scatter": self.scatter, "p_value": self.p_value}

    @classmethod
    def from_dict(cls, data) -> "BrightnessMap":
        if not isinstance(data, dict):
            raise CalibrationError(f"the brightness map must be an object, got {type(data).__name__}")
        known = {"centre", "scale", "order", "coef", "applied", "n_sites", "low", "high", "scatter", "p_value"}
        unknown = set(data) - known
        if unknown:
            raise CalibrationError(f"unknown brightness map entr(ies) {', '.join(sorted(unknown))}")
        missing = [k for k in ("centre", "scale", "order", "coef") if k not in data]
        if missing:
            raise CalibrationError(f"the brightness map is missing {', '.join(missing)}")
        return cls(**data)
