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

Fit (:func:`fit_brightness`): the amplitudes of the occupied sites of the calibration stack
(photons), in logarithm, are fitted by linear least squares
(:func:`numpy.linalg.lstsq`) with a free constant (the centre's photons); amplitudes more than
3.5 robust standard deviations off the map are left out and the fit repeated.

When is the map used?  It is **applied** when an F-test of the map against uniform brightness
(nested linear models, :func:`scipy.stats.f`) gives p < 1e-6 and the map departs from 1 by at
least :data:`MIN_CHANGE` somewhere over the sites; otherwise the brightness counts as uniform.

Use: each site's amplitude is divided by ``b`` at the site (the photons the atom would give at
the centre) before it is compared with the threshold. Empty sites' amplitudes sit near zero
photons once the background is fitted, so this is the threshold scaled by the map; the
histogram, the threshold, the posteriors and the error rates are computed on these
normalised amplitudes, and every output says so.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scipy import stats

from latticeread.core._poly2d import poly_design, poly_terms
from latticeread.errors import CalibrationError, ReconstructionError

__all__ = ["BrightnessMap", "fit_brightness", "MIN_CHANGE", "MIN_BRIGHTNESS_SITES"]

#: The map is applied only where it departs from 1 by at least this much somewhere.
#: Smallest factor amplitudes are divided by (the map's extrapolation beyond the atoms is not trusted lower).
MIN_FACTOR = 0.3
MIN_CHANGE = 0.05
#: Fewest occupied sites (over the stack) for a fit.
MIN_BRIGHTNESS_SITES = 50
#: F-test p-value below which the map counts as real.
P_VALUE_LIMIT = 1e-6


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
        """The factor classification divides amplitudes by: :meth:`relative` when applied, else 1.

        Never below :data:`MIN_FACTOR`: far from the atoms the smooth map is an extrapolation,
        and dividing the empty sites' noise there by a tiny factor would make atoms of it.
        """
        x = np.asarray(x, float)
        return np.maximum(self.relative(x, y), MIN_FACTOR) if self.applied else np.ones(x.shape)

    def image(self, shape) -> np.ndarray:
        """The map over a frame of ``shape`` (height, width), for display."""
        yy, xx = np.mgrid[0:int(shape[0]), 0:int(shape[1])]
        return self.relative(xx, yy)

    def describe(self) -> str:
        """One line for the terminal, the window and exports."""
        state = "applied" if self.applied else f"not applied (not significant or under {MIN_CHANGE:.0%})"
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


def fit_brightness(x, y, amplitudes, *, frame_shape, sites_x=None, sites_y=None, order: int = 2) -> BrightnessMap:
    """Fit a smooth relative-brightness map to the amplitudes of occupied sites.

    Parameters
    ----------
    x, y : (M,) array_like
        Positions of the occupied sites (pooled over frames), pixels.
    amplitudes : (M,) array_like
        Their amplitudes, photons (or counts: only ratios matter).
    frame_shape : (int, int)
        ``(height, width)``, pixels (sets the normalisation length).
    sites_x, sites_y : array_like, optional
        All sites the map will be used on (for :attr:`BrightnessMap.low`/``high``; default
        the occupied sites).
    order : int
        Highest degree of the log-brightness polynomial (2 holds a Gaussian beam).

    Returns
    -------
    BrightnessMap

    Raises
    ------
    ReconstructionError
        Fewer than :data:`MIN_BRIGHTNESS_SITES` occupied sites with a positive amplitude.
    """
    x, y, a = (np.asarray(v, float).ravel() for v in (x, y, amplitudes))
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(a) & (a > 0)
    if ok.sum() < MIN_BRIGHTNESS_SITES:
        raise ReconstructionError(f"only {int(ok.sum())} occupied sites to measure the brightness across the field; "
                                  f"at least {MIN_BRIGHTNESS_SITES} are needed")
    x, y, log_a = x[ok], y[ok], np.log(a[ok])
    centre = (float(np.mean(x)), float(np.mean(y)))
    scale = 0.5 * float(np.hypot(*frame_shape))
    terms = poly_terms(order, min_degree=1)
    design = np.column_stack([np.ones_like(x), poly_design(x, y, centre=centre, scale=scale, terms=terms)])
    use = np.ones(x.size, bool)
    coef = np.zeros(design.shape[1])
    for _ in range(5):
        coef, *_ = np.linalg.lstsq(design[use], log_a[use], rcond=None)
        resid = log_a - design @ coef
        robust = 1.4826 * float(np.median(np.abs(resid[use] - np.median(resid[use]))))
        keep = np.abs(resid) <= 3.5 * max(robust, 1e-9)
        if np.array_equal(keep, use) or keep.sum() < MIN_BRIGHTNESS_SITES:
            break
        use = keep
    resid = log_a[use] - design[use] @ coef
    rss1 = float(resid @ resid)
    flat = log_a[use] - np.mean(log_a[use])
    rss0 = float(flat @ flat)
    n, extra = int(use.sum()), len(terms)
    dof = n - 1 - extra
    p_value = 1.0
    if dof > 0 and rss1 > 0:
        p_value = float(stats.f.sf(((rss0 - rss1) / extra) / (rss1 / dof), extra, dof))
    field = BrightnessMap(centre=centre, scale=scale, order=order, coef=coef[1:], n_sites=n,
                          scatter=float(np.sqrt(rss1 / max(n, 1))), p_value=p_value)
    sx = x if sites_x is None else np.asarray(sites_x, float).ravel()
    sy = y if sites_y is None else np.asarray(sites_y, float).ravel()
    rel = field.relative(sx, sy)
    low, high = float(rel.min()), float(rel.max())
    applied = p_value < P_VALUE_LIMIT and max(1.0 - low, high - 1.0) >= MIN_CHANGE
    return BrightnessMap(centre=centre, scale=scale, order=order, coef=coef[1:], applied=applied, n_sites=n,
                         low=low, high=high, scatter=field.scatter, p_value=p_value)
