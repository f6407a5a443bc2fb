"""Occupancy classification: a threshold on the histogram of site amplitudes.

Site amplitudes (photons) form a bimodal histogram: empty sites scatter around 0, occupied
sites around the number of photons detected per atom. :func:`select_threshold` fits two
components to that histogram and picks the threshold; :func:`classify` applies it.

Models
------
Both components are normal distributions, fitted by maximum likelihood with the
expectation-maximisation (EM) algorithm. Two physical constraints keep the fit sensible when
occupied sites are rare:

* the occupied component is never narrower than the empty one (an atom adds shot noise on
  top of the noise every site has);
* when a :class:`~latticeread.core.camera.CameraModel` is given (``model="camera"``), the
  occupied variance is at least ``empty_var + F^2 * mean / QE`` photons^2, the shot noise of
  ``mean`` photons at the sensor after the gain register (``F^2`` = 2 for an EMCCD at high
  gain, Robbins & Hadwen, IEEE Trans. Electron Devices 50, 1227 (2003); 1 for sCMOS). Extra
  spread (atom-to-atom brightness variation) is fitted on top of that floor.

Skewed peaks
------------
Real peaks are skewed to the right: the background photons of an EMCCD pass the gain
register (an exponential-like output), and atoms differ in brightness. A normal fit then
misjudges the tails that set the error rates (on site amplitudes of simulated EMCCD frames
the false-positive rate came out 3-5 times too small). ``peak_shape="skewed"`` refines the
normal fit by binned maximum likelihood with

* empty    = empty level + normal noise + (gamma-distributed noise - its mean),
* occupied = empty + gamma-distributed atom signal + normal spread of that signal,

so both peaks share the background noise and each can be skewed; error rates and
posteriors then come from these shapes (tabulated numerically).

The ``"mixture"`` threshold is where the two weighted component densities cross (posterior
0.5): it minimises the expected number of misclassified sites.

Atoms lost during the exposure
------------------------------
An atom lost (or hopping away) at a random moment of the exposure gives the light of the
fraction of the exposure it stayed: with the moment uniform over the exposure, its amplitude
is spread uniformly between the empty level and a full atom (the standard picture of loss
during imaging, common practice, no source). Such sites were occupied at the start of the
exposure, which is what an occupation matrix reports. For normal peaks and the ``"mixture"``
method the fit adds this third component to the occupied class: its density ``lam`` (sites per
photon) is counted in the band between :data:`LOSS_BAND_EMPTY` empty widths above the empty
level and :data:`LOSS_BAND_OCCUPIED` occupied widths below the atom level, where the two peaks
hold almost no sites. The threshold then minimises the expected number of misclassified sites
under the full model: ``errors(t) = (empty sites above t) + (occupied sites below t)``, with the
empty sites above ``t`` counted on the histogram itself (the number of sites above ``t`` minus
the lost atoms there), because a normal peak underestimates an EMCCD's upper tail several
times (see "Skewed peaks"); up to a constant that is ``N(above t) + 2 lam t``, minimised over
the sites between two empty widths and the two-peak crossing. Without sites between the peaks
(``lam`` = 0) the threshold is the two-peak crossing. A minimum of the counted errors is where
the empty density equals the occupied one; the posterior follows the same model: above two
empty widths the empty peak's tail is taken as exponential (an EMCCD register's output has an
exponential tail; for sCMOS it only widens the tail), with the decay that makes the two
densities equal at the chosen threshold. The false-negative rate includes the lost atoms below
the threshold (``loss_fraction x`` the share of a uniform spread below it).
 ``"otsu"`` maximises the
between-class variance of the histogram; ``"minimum"`` takes the lowest bin between the two
peaks of the smoothed histogram. For every method the fitted components give the error rates
at the chosen threshold.

Fallbacks when the histogram is not bimodal
-------------------------------------------
If the two fitted components are not separated (separation below
:data:`BIMODAL_SEPARATION`), the amplitudes are described by one robust location (median)
and width (1.4826 x median absolute deviation). Amplitudes are background-subtracted, so a
location within :data:`NO_ATOM_Z` widths of 0 means *no atoms*: the threshold is put
:data:`FALLBACK_Z` widths above the location (a per-site false-positive rate of ~3e-7 for a
normal distribution), widened by the excess-noise factor ``F`` when a camera model is given
(an EMCCD's multiplied noise has a heavier tail than a normal distribution). Otherwise all
sites are taken as *occupied* and the threshold is put halfway between 0 and the location.
The missing component's parameters and its error rate are NaN, and the posterior becomes a
step at the threshold.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import warnings as _warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, special

from latticeread.core.camera import CameraModel
from latticeread.core.flags import SATURATED
from latticeread.errors import CalibrationError, LatticeReadWarning, ReconstructionError

__all__ = [
    "ThresholdResult",
    "select_threshold",
    "classify",
    "oracle_threshold",
    "otsu_threshold",
    "minimum_threshold",
    "THRESHOLD_METHODS",
    "check_threshold",
    "MAX_THRESHOLD_PHOTONS",
    "lost_atom_density",
]

logger = logging.getLogger(__name__)

#: Methods accepted by :func:`select_threshold`.
THRESHOLD_METHODS = ("mixture", "otsu", "minimum")
#: Components closer than this many combined standard deviations,
#: ``(m1 - m0) / sqrt(v0 + v1)``, are "not bimodal" (two equal normal components give a
#: density with two peaks only above ~1.4).
BIMODAL_SEPARATION = 2.0
#: A unimodal histogram whose median lies within this many robust widths of 0 has no atoms.
NO_ATOM_Z = 3.0
#: Fallback threshold for a histogram without atoms, in robust widths above the median.
FALLBACK_Z = 5.0
#: Fewer finite sites than this gives a "too few sites" warning.
MIN_SITES = 50
#: Fewer sites in the occupied component than this gives a "few atoms" warning.
MIN_ATOMS = 10
#: The band where the sites of atoms lost during the exposure are counted: from this many empty
#: widths above the empty level (a normal peak holds 3e-7 of its sites beyond; the same
#: number as :data:`FALLBACK_Z`) ...
LOSS_BAND_EMPTY = 5.0
#: ... to this many occupied widths below the atom level (3e-5 of the atoms below).
LOSS_BAND_OCCUPIED = 4.0
#: The exponential tail of the empty peak starts this many empty widths above the empty level.
TAIL_START = 2.0

_MAD_TO_STD = 1.482602218505602  # 1 / Phi^-1(3/4) for a normal distribution


@dataclass(frozen=True)
class ThresholdResult:
    """A chosen occupancy threshold with the two fitted histogram components.

    Attributes
    ----------
    threshold : float
        Sites with amplitude strictly above this value (photons) are called occupied.
    method : str
        How the threshold was chosen: ``"mixture"``, ``"otsu"``, ``"minimum"``,
        ``"user"`` (set with :meth:`with_threshold`) or ``"fallback"`` (histogram not
        bimodal; see the module notes).
    empty_mean, empty_std : float
        Mean and standard deviation of the empty-site component (photons). NaN if there
        is no empty component (all sites occupied).
    occupied_mean, occupied_std : float
        Same for the occupied component (photons). NaN if there are no atoms.
    occupied_fraction : float
        Weight of the occupied component (fraction of sites, 0..1).
    false_positive_rate : float
        P(called occupied | empty) at ``threshold`` from the empty component (0..1).
    false_negative_rate : float
        P(called empty | occupied) at ``threshold`` from the occupied component (0..1).
    n_sites : int
        Number of finite amplitudes used.
    warnings : tuple of str
        Reasons why the result may mislead (not bimodal, few sites, no atoms, all
        occupied, saturated, NaN amplitudes); empty when all is well.
    model : str
        ``"gaussian"`` (free variances) or ``"camera"`` (occupied variance bounded below by
        the camera's shot-noise model).
    skew : tuple of float
        Empty for normal peaks. For ``peak_shape="skewed"``: ``(noise_sd, noise_shape,
        noise_scale, signal_shape, signal_scale, signal_sd)`` -- the empty amplitude is
        ``empty_mean + N(0, noise_sd^2) + (Gamma(noise_shape, noise_scale) - mean)`` (a
        ``noise_shape`` of inf means no gamma part) and the occupied one adds
        ``Gamma(signal_shape, signal_scale) + N(0, signal_sd^2)`` (photons). ``empty_std``, ``occupied_mean``
        and ``occupied_std`` are the moments of these distributions.
    loss_fraction : float
        Share of the occupied sites whose atom was lost (or hopped away) during the exposure:
        amplitudes spread uniformly between ``empty_mean`` and ``occupied_mean`` (see the module
        notes, "Atoms lost during the exposure"); 0 when none were seen or not modelled. Counted
        in ``occupied_fraction``; the occupied peak (``occupied_mean``, ``occupied_std``) holds the
        rest.
    empty_tail : float
        Decay length (photons) of the exponential upper tail of the empty peak beyond
        ``TAIL_START`` empty widths; 0 when the tail is the normal one.
    """

    threshold: float
    method: str
    empty_mean: float
    empty_std: float
    occupied_mean: float
    occupied_std: float
    occupied_fraction: float
    false_positive_rate: float
    false_negative_rate: float
    n_sites: int
    warnings: tuple[str, ...] = ()
    model: str = "gaussian"
    skew: tuple = ()
    loss_fraction: float = 0.0
    empty_tail: float = 0.0

    # --- derived ---------------------------------------------------------------------
    @property
    def has_components(self) -> bool:
        """True when both components are defined (the histogram was bimodal)."""
        return bool(np.isfinite([self.empty_mean, self.empty_std, self.occupied_mean, self.occupied_std]).all())

    @property
    def error_rate(self) -> float:
        """Expected fraction of misclassified sites at ``threshold`` (0..1); NaN if unknown."""
        w = self.occupied_fraction
        return float((1 - w) * self.false_positive_rate + w * self.false_negative_rate)

    @property
    def is_skewed(self) -> bool:
        """True when the peaks are the skewed ones (see ``skew``)."""
        return len(self.skew) == 6 and self.has_components

    def _pair(self) -> "_SkewedPair":
        # tabulated once per result (the dataclass is frozen; the cache is not a field)
        pair = self.__dict__.get("_pair_cache")
        if pair is None:
            pair = _SkewedPair(self.empty_mean, *self.skew)
            object.__setattr__(self, "_pair_cache", pair)
        return pair

    @property
    def is_reliable(self) -> bool:
        """True when no warning was raised."""
        return len(self.warnings) == 0

    def posterior(self, amplitudes) -> np.ndarray:
        """Probability that each site is occupied, from the fitted components.

        Parameters
        ----------
        amplitudes : array_like of float
            Site amplitudes in photons (any shape).

        Returns
        -------
        ndarray of float64, same shape
            P(occupied | amplitude) in 0..1; NaN where the amplitude is NaN. The posterior
            does not depend on ``threshold``; when a component is missing (see the module
            notes) it is a step: 1 above ``threshold``, 0 at or below.
        """
        a = np.asarray(amplitudes, dtype=float)
        if not self.has_components:
            p = (a > self.threshold).astype(float)
        elif self.is_skewed:
            w = min(max(self.occupied_fraction, 1e-300), 1 - 1e-16)
            pair = self._pair()
            occ = w * pair.pdf1(a)
            total = occ + (1 - w) * pair.pdf0(a)
            # outside the tabulated range both densities are 0: the nearer peak wins
            mid = 0.5 * (self.empty_mean + self.occupied_mean)
            with np.errstate(divide="ignore", invalid="ignore"):
                p = np.where(total > 0, occ / total, (a > mid).astype(float))
        elif self.loss_fraction > 0 or self.empty_tail > 0:
            w = min(max(self.occupied_fraction, 1e-300), 1 - 1e-16)
            with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
                log0 = math.log(1 - w) + self._log_empty(a)
                log1 = math.log(w) + np.log(self._occupied_density(a))
                p = special.expit(log1 - log0)
        else:
            w = min(max(self.occupied_fraction, 1e-300), 1 - 1e-16)
            z0 = (a - self.empty_mean) / self.empty_std
            z1 = (a - self.occupied_mean) / self.occupied_std
            log_odds = (math.log(w) - math.log(1 - w) + math.log(self.empty_std) - math.log(self.occupied_std)
                        + 0.5 * (z0 * z0 - z1 * z1))
            p = special.expit(log_odds)
        p = np.where(np.isnan(a), np.nan, p)
        return p

    def _log_empty(self, a) -> np.ndarray:
        """Log density of the empty peak (per photon): normal, with the exponential upper tail."""
        return _log_empty_density(a, self.empty_mean, self.empty_std, self.empty_tail)

    def _occupied_density(self, a) -> np.ndarray:
        """Density of the occupied class (per photon): the atom peak plus the atoms lost in the exposure."""
        return _occupied_density(a, self.empty_mean, self.empty_std, self.occupied_mean, self.occupied_std,
                                 self.loss_fraction)

    def with_threshold(self, threshold: float) -> "ThresholdResult":
        """Same components, a new threshold (e.g. dragged by the user) and its error rates.

        Parameters
        ----------
        threshold : float
            New threshold in photons.
        """
        t = float(threshold)
        if not np.isfinite(t):
            raise ReconstructionError(f"the threshold must be a finite number of photons, got {threshold}")
        fp, fn = _error_rates(t, self.empty_mean, self.empty_std, self.occupied_mean, self.occupied_std,
                              loss=self.loss_fraction, tail=self.empty_tail)
        if self.is_skewed:
            pair = self._pair()
            fp, fn = _tail_rates(pair, t)
        moved = dataclasses.replace(self, threshold=t, method="user", false_positive_rate=fp, false_negative_rate=fn)
        if "_pair_cache" in self.__dict__:  # same peaks: reuse the tabulation
            object.__setattr__(moved, "_pair_cache", self.__dict__["_pair_cache"])
        return moved

    def to_dict(self) -> dict:
        """Plain dict (NaN written as None so that it is valid JSON)."""
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if f.name == "warnings":
                v = list(v)
            elif f.name == "skew":
                v = [None if not np.isfinite(x) else float(x) for x in v]
            elif isinstance(v, (float, np.floating)):
                v = None if not np.isfinite(v) else float(v)
            elif isinstance(v, (np.integer,)):
                v = int(v)
            out[f.name] = v
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "ThresholdResult":
        """Inverse of :meth:`to_dict`; raises ReconstructionError on missing keys."""
        names = [f.name for f in dataclasses.fields(cls)]
        required = [n for n in names if n not in ("warnings", "model", "skew", "loss_fraction", "empty_tail")]
        missing = [n for n in required if n not in data]
        if missing:
            raise ReconstructionError(f"threshold record is missing {', '.join(missing)}")
        kw = {}
        for n in names:
            if n not in data:
                continue
            v = data[n]
            if n == "warnings":
                v = tuple(str(s) for s in v)
            elif n == "skew":
                v = tuple(float("inf") if x is None else float(x) for x in v)
            elif n in ("method", "model"):
                v = str(v)
            elif n == "n_sites":
                v = int(v)
            else:
                v = float("nan") if v is None else float(v)
            kw[n] = v
        return cls(**kw)


# --- public functions -------------------------------------------------------------------
def select_threshold(
    amplitudes,
    *,
    method: str = "mixture",
    camera: CameraModel | None = None,
    nbins: int = 256,
    hist: tuple | None = None,
    flags=None,
    peak_shape: str = "normal",
    max_iter: int = 300,
    exposure_loss: bool = True,
) -> ThresholdResult:
    """Choose the occupancy threshold from the histogram of site amplitudes.

    Parameters
    ----------
    amplitudes : array_like of float or None
        Site amplitudes in photons (any shape; flattened). NaN values are ignored with a
        warning. May be None when ``hist`` is given.
    method : {"mixture", "otsu", "minimum"}
        ``"mixture"``: where the fitted component densities cross (fewest expected errors);
        ``"otsu"``: Otsu's between-class-variance maximum on the ``nbins`` histogram;
        ``"minimum"``: lowest point between the two peaks of the smoothed histogram.
    camera : CameraModel, optional
        Enables the noise-model-aware mixture (see the module notes).
    nbins : int
        Number of histogram bins for ``"otsu"`` and ``"minimum"`` (and the EM start).
    hist : (counts, bin_centers), optional
        A precomputed histogram (photons); used instead of ``amplitudes``. The mixture is
        then fitted to the binned data.
    flags : array_like of uint8, optional
        Per-site flags (:mod:`latticeread.core.flags`), same size as ``amplitudes``; sites
        flagged SATURATED produce a warning (their amplitude is underestimated).
    peak_shape : {"normal", "skewed"}
        ``"normal"``: two normal peaks fitted by EM (fast: ~1-3 ms for 10,000 sites).
        ``"skewed"``: the EM result is refined by binned maximum likelihood with skewed
        peaks (see the module notes) so that the error rates follow the real tails
        (slower: one to three seconds; meant for calibration runs, not for every frame). With a
        camera model the signal variance is kept >= ``F^2 / QE`` x its mean.
    max_iter : int
        Maximum number of EM iterations.
    exposure_loss : bool
        With normal peaks and ``"mixture"``: model the atoms lost during the exposure (module
        notes, "Atoms lost during the exposure"), which moves the threshold to the fewest
        expected errors under that model and puts them in the false-negative rate. False gives
        the two-peak fit alone (rates of reading a full atom, e.g. to correct loss counts that
        already include the atoms lost during an image).

    Returns
    -------
    ThresholdResult

    Raises
    ------
    ReconstructionError
        Unknown method, fewer than 3 finite amplitudes, or a malformed histogram.
    """
    if method not in THRESHOLD_METHODS:
        raise ReconstructionError(f"unknown threshold method {method!r}; use one of {', '.join(THRESHOLD_METHODS)}")
    if peak_shape not in ("normal", "skewed"):
        raise ReconstructionError(f"unknown peak shape {peak_shape!r}; use 'normal' or 'skewed'")
    nbins = int(nbins)
    if nbins < 8:
        raise ReconstructionError(f"the histogram needs at least 8 bins, got nbins={nbins}")
    warn: list[str] = []

    if hist is not None:
        x, c = _check_hist(hist)
        binwidth = float(np.median(np.diff(x))) if x.size > 1 else 0.0
        counts, centers = c, x
        n_sites = int(round(c.sum()))
    else:
        if amplitudes is None:
            raise ReconstructionError("give either site amplitudes or a histogram (hist=)")
        a = np.asarray(amplitudes, dtype=float).ravel()
        finite = np.isfinite(a)
        n_bad = int(a.size - np.count_nonzero(finite))
        if n_bad:
            warn.append(f"{n_bad} of {a.size} sites have NaN or infinite amplitudes and were ignored")
        x = a[finite]
        c = None
        binwidth = 0.0
        n_sites = int(x.size)
        if n_sites >= 3:
            counts, edges = np.histogram(x, bins=nbins)
            centers = 0.5 * (edges[1:] + edges[:-1])
    if n_sites < 3:
        raise ReconstructionError(
            f"only {n_sites} sites have a finite amplitude; at least 3 are needed to choose a threshold")
    if n_sites < MIN_SITES:
        warn.append(f"only {n_sites} sites: the threshold and error rates are poorly determined "
                    f"(at least {MIN_SITES} recommended)")
    if flags is not None:
        fl = np.asarray(flags).ravel().astype(np.uint8)
        n_sat = int(np.count_nonzero(fl & SATURATED))
        if n_sat:
            warn.append(f"{n_sat} sites touch saturated pixels: their amplitudes are underestimated")

    kappa = None
    if camera is not None:
        kappa = camera.excess_noise_factor_squared / camera.quantum_efficiency
    model = "gaussian" if kappa is None else "camera"

    skew: tuple = ()
    loss, tail = 0.0, 0.0
    t_otsu = otsu_threshold(None, hist=(counts, centers))
    fit = _fit_two_normals(x, c, t_init=t_otsu, kappa=kappa, binwidth=binwidth, max_iter=max_iter)
    m0, s0, m1, s1, w1, converged = fit
    separation = (m1 - m0) / math.sqrt(s0 * s0 + s1 * s1)
    if not converged and separation >= BIMODAL_SEPARATION:
        warn.append(f"the mixture fit did not converge in {max_iter} iterations")

    if not (separation >= BIMODAL_SEPARATION) or w1 * n_sites < 0.5:
        # --- not bimodal: one component only ----------------------------------------
        loc, scale = _robust_location(x, c)
        not_bimodal = (f"the amplitude histogram is not bimodal (component separation {separation:.2f} < "
                       f"{BIMODAL_SEPARATION})")
        method_used = "fallback"
        if loc <= NO_ATOM_Z * scale:
            widen = math.sqrt(camera.excess_noise_factor_squared) if camera is not None else 1.0
            t = loc + FALLBACK_Z * widen * scale
            above = x > t
            n_above = int(above.sum() if c is None else c[above].sum())
            if n_above == 0:
                warn.append(not_bimodal)
                warn.append(f"no atoms found: threshold set {FALLBACK_Z:g} noise widths above the empty level "
                            f"({t:.4g} photons)")
                m0, s0, m1, s1, w1 = loc, scale, float("nan"), float("nan"), 0.0
            else:
                # a few bright outliers on an empty histogram: isolated atoms. The empty
                # component is the robust fit; the occupied one is made of the outliers.
                wts = np.ones(int(above.sum())) if c is None else c[above]
                m0, s0 = loc, scale
                m1 = float(np.average(x[above], weights=wts))
                v1 = float(np.average((x[above] - m1) ** 2, weights=wts))
                s1 = math.sqrt(_floor_occupied(v1, s0 * s0, m1, kappa))
                w1 = n_above / n_sites
                t = _crossing(m0, s0, m1, s1, w1)
                warn.append(f"only {n_above} sites look occupied: the occupied component is poorly determined")
                method_used = "mixture"
        else:
            t = 0.5 * loc
            warn.append(not_bimodal)
            warn.append(f"all sites look occupied: threshold set halfway between 0 and the occupied level "
                        f"({t:.4g} photons)")
            m0, s0, m1, s1, w1 = float("nan"), float("nan"), loc, scale, 1.0
    else:
        n_occ = w1 * n_sites
        if n_occ < MIN_ATOMS:
            warn.append(f"only about {n_occ:.0f} sites look occupied: the occupied component is poorly "
                        f"determined")
        if w1 * n_sites > n_sites - MIN_ATOMS:
            warn.append(f"only about {n_sites - n_occ:.0f} sites look empty: the empty component is poorly "
                        f"determined")
        pair = None
        if peak_shape == "skewed" and n_occ >= MIN_ATOMS and n_sites - n_occ >= MIN_ATOMS:
            fit = _fit_skewed(counts, centers, m0=m0, s0=s0, m1=m1, s1=s1, w1=w1, kappa=kappa)
            if fit is None:
                warn.append("the skewed-peak fit failed; normal peaks were used")
            else:
                w1, params = fit
                pair = _SkewedPair(*params)
                skew = tuple(params[1:])
                m0, s0, m1, s1 = pair.moments()
        elif peak_shape == "skewed":
            warn.append("too few sites in one of the peaks for skewed shapes; normal peaks were used")
        if method == "mixture":
            t = _crossing(m0, s0, m1, s1, w1)
            if pair is not None:
                t = _crossing_skewed(pair, w1, t, m0, m1)
            elif exposure_loss:
                t, loss, tail = _loss_threshold(x, c, m0=m0, s0=s0, m1=m1, s1=s1, w1=w1, t_mix=t,
                                                n_sites=n_sites)
        elif method == "otsu":
            t = t_otsu
        else:
            t = minimum_threshold(None, hist=(counts, centers))
            if t is None:
                warn.append("the smoothed histogram never shows two peaks; used Otsu's threshold instead")
                t = t_otsu
        method_used = method

    fp, fn = _error_rates(t, m0, s0, m1, s1, loss=loss, tail=tail)
    if skew:
        pair = _SkewedPair(m0, *skew)
        fp, fn = _tail_rates(pair, t)
    for text in warn:
        logger.info("threshold: %s", text)
    for text in warn:
        if "NaN" in text:
            _warnings.warn(text, LatticeReadWarning, stacklevel=2)
    return ThresholdResult(
        threshold=float(t), method=method_used, empty_mean=float(m0), empty_std=float(s0),
        occupied_mean=float(m1), occupied_std=float(s1), occupied_fraction=float(w1),
        false_positive_rate=fp, false_negative_rate=fn, n_sites=n_sites, warnings=tuple(warn), model=model,
        skew=skew, loss_fraction=float(loss), empty_tail=float(tail))


#: Largest threshold a user may set, in detected photons per site and exposure (or counts when
#: the camera is not calibrated); no atom in an imaging pulse scatters anywhere near this many
#: detected photons (common practice, no source).
MAX_THRESHOLD_PHOTONS = 1e7


def check_threshold(value, *, where: str = "the threshold", unit: str = "photons") -> float:
    """Return a threshold a user set (typed, dragged, given on the command line or in a file).

    The one range check of every front end: a threshold must be a finite number in
    ``[0, MAX_THRESHOLD_PHOTONS]``. Below zero nearly every empty site (amplitudes scatter
    around 0 after background subtraction) would read as an atom; above the range no atom
    would. Thresholds chosen from the histogram are not checked here.

    Parameters
    ----------
    value : float or str
        The threshold in ``unit``.
    where : str
        What the value is, for the message ("the threshold", "cal.json: threshold").
    unit : str
        "photons", or "counts" for an uncalibrated camera.

    Raises
    ------
    CalibrationError
        Not a number, NaN or infinite, negative, or above the range.
    """
    try:
        t = float(value)
    except (TypeError, ValueError):
        raise CalibrationError(f"{where} must be a number of {unit}, got {value!r}") from None
    if not math.isfinite(t) or t < 0 or t > MAX_THRESHOLD_PHOTONS:
        raise CalibrationError(
            f"{where} is {value!r} {unit}; it must be a finite number between 0 and {MAX_THRESHOLD_PHOTONS:g} "
            f"{unit} (an empty site gives about 0, an atom its detected {unit} per exposure)")
    return t


def classify(amplitudes, threshold) -> tuple[np.ndarray, np.ndarray]:
    """Call each site occupied or empty.

    Parameters
    ----------
    amplitudes : array_like of float
        Site amplitudes in photons (any shape).
    threshold : ThresholdResult or float
        Sites with amplitude strictly above the threshold (photons) are occupied.

    Returns
    -------
    occupied : ndarray of uint8, same shape
        1 = occupied, 0 = empty (also 0 where the amplitude is NaN).
    p_occupied : ndarray of float64, same shape
        Posterior probability of occupation from the fitted components
        (:meth:`ThresholdResult.posterior`); for a plain float threshold, 1.0 above and 0.0
        at or below it. NaN where the amplitude is NaN.
    """
    a = np.asarray(amplitudes, dtype=float)
    if isinstance(threshold, ThresholdResult):
        t = threshold.threshold
        p = threshold.posterior(a)
    else:
        t = float(threshold)
        if not np.isfinite(t):
            raise ReconstructionError(f"the threshold must be a finite number of photons, got {threshold}")
        with np.errstate(invalid="ignore"):
            p = (a > t).astype(float)
        p[np.isnan(a)] = np.nan
    with np.errstate(invalid="ignore"):
        occupied = (a > t).astype(np.uint8)
    return occupied, p


def oracle_threshold(amplitudes, truth_occupied) -> float:
    """The threshold that makes the fewest errors given the true occupation (benchmarks only).

    Parameters
    ----------
    amplitudes : array_like of float
        Site amplitudes (photons); NaN sites are ignored.
    truth_occupied : array_like of bool or 0/1
        True occupation of the same sites.

    Returns
    -------
    float
        Threshold (photons) midway between the two sorted amplitudes that bracket the best
        split; ties are broken by the widest gap. Sites above it are called occupied.
    """
    a = np.asarray(amplitudes, dtype=float).ravel()
    truth = np.asarray(truth_occupied).ravel().astype(bool)
    if a.shape != truth.shape:
        raise ReconstructionError(f"{a.size} amplitudes but {truth.size} truth values")
    keep = np.isfinite(a)
    a, truth = a[keep], truth[keep]
    if a.size == 0:
        raise ReconstructionError("no finite amplitudes to place an oracle threshold")
    order = np.argsort(a, kind="stable")
    a, truth = a[order], truth[order]
    # errors when the first k sorted sites (k = 0..n) are called empty
    occ_below = np.concatenate([[0], np.cumsum(truth)])
    empty_above = (~truth).sum() - np.concatenate([[0], np.cumsum(~truth)])
    errors = occ_below + empty_above
    # a split is only possible between distinct values
    valid = np.ones(a.size + 1, dtype=bool)
    valid[1:-1] = a[1:] > a[:-1]
    errors = np.where(valid, errors, np.iinfo(np.int64).max)
    best = np.flatnonzero(errors == errors.min())
    lo = np.concatenate([[a[0] - 1.0], a])[best]
    hi = np.concatenate([a, [a[-1] + 1.0]])[best]
    k = int(np.argmax(hi - lo))
    return float(0.5 * (lo[k] + hi[k]))


def otsu_threshold(amplitudes=None, *, nbins: int = 256, hist: tuple | None = None) -> float:
    """Otsu's threshold: the split of the histogram with the largest between-class variance.

    Parameters
    ----------
    amplitudes : array_like of float, optional
        Site amplitudes (photons); NaN ignored. Not needed when ``hist`` is given.
    nbins : int
        Number of bins over the amplitude range.
    hist : (counts, bin_centers), optional
        Precomputed histogram.

    Returns
    -------
    float
        Centre of the last bin of the lower class (photons).

    Notes
    -----
    With cumulative weights ``w0(k)``, ``w1(k)`` and means ``m0(k)``, ``m1(k)`` of the bins
    up to and after ``k``, the split maximises ``w0 w1 (m0 - m1)^2`` (Otsu, IEEE Trans.
    Syst. Man Cybern. 9, 62 (1979)).
    """
    centers, counts = _histogram(amplitudes, nbins=nbins, hist=hist, what="Otsu's threshold")
    if centers.size == 1:
        return float(centers[0])
    w0 = np.cumsum(counts)[:-1]
    w1 = np.cumsum(counts[::-1])[::-1][1:]
    s0 = np.cumsum(counts * centers)[:-1]
    s1 = np.cumsum((counts * centers)[::-1])[::-1][1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        between = w0 * w1 * (s0 / w0 - s1 / w1) ** 2
    between = np.where(np.isfinite(between), between, -1.0)
    return float(centers[int(np.argmax(between))])


def minimum_threshold(amplitudes=None, *, nbins: int = 256, hist: tuple | None = None,
                      max_smoothing: float | None = None) -> float | None:
    """The lowest point between the two peaks of the smoothed histogram.

    The histogram is smoothed with a Gaussian of increasing width (0.5, 1, 1.5 ... bins)
    until it has exactly two local maxima; the threshold is the centre of the lowest bin
    between them.

    Parameters
    ----------
    amplitudes : array_like of float, optional
        Site amplitudes (photons); NaN ignored. Not needed when ``hist`` is given.
    nbins : int
        Number of bins over the amplitude range.
    hist : (counts, bin_centers), optional
        Precomputed histogram.
    max_smoothing : float, optional
        Largest Gaussian width tried, in bins (default ``nbins / 8``).

    Returns
    -------
    float or None
        Threshold in photons, or None when no smoothing gives two peaks.
    """
    centers, counts = _histogram(amplitudes, nbins=nbins, hist=hist, what="the minimum threshold")
    top = counts.size / 8 if max_smoothing is None else float(max_smoothing)
    sigma = 0.5
    while sigma <= top:
        sm = ndimage.gaussian_filter1d(counts, sigma, mode="constant")
        # local maxima with plateaus reduced to their first bin
        d = np.diff(sm)
        d = np.where(np.abs(d) <= 1e-12 * sm.max(), 0.0, d)
        sign = np.sign(d)
        # carry the last non-zero slope over flat parts
        nz = np.flatnonzero(sign)
        if nz.size:
            idx = np.maximum.accumulate(np.where(sign != 0, np.arange(sign.size), 0))
            sign = sign[idx]
        peaks = np.flatnonzero((np.concatenate([[1.0], sign]) > 0) & (np.concatenate([sign, [-1.0]]) < 0))
        if peaks.size == 2:
            lo, hi = peaks
            return float(centers[lo + int(np.argmin(sm[lo:hi + 1]))])
        if peaks.size < 2:
            return None
        sigma += 0.5
    return None


# --- helpers ----------------------------------------------------------------------------
def _histogram(amplitudes, *, nbins: int, hist, what: str) -> tuple[np.ndarray, np.ndarray]:
    """(bin centres, float counts) of the finite amplitudes, or of a precomputed ``hist``."""
    if hist is not None:
        centers, counts = _check_hist(hist)
        return centers, counts.astype(float)
    a = np.asarray(amplitudes, dtype=float).ravel()
    a = a[np.isfinite(a)]
    if a.size == 0:
        raise ReconstructionError(f"no finite amplitudes for {what}")
    counts, edges = np.histogram(a, bins=int(nbins))
    return 0.5 * (edges[1:] + edges[:-1]), counts.astype(float)


def _check_hist(hist):
    try:
        counts, centers = hist
        counts = np.asarray(counts, dtype=float).ravel()
        centers = np.asarray(centers, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise ReconstructionError("hist must be a pair (counts, bin_centers)") from exc
    if counts.shape != centers.shape or counts.size == 0:
        raise ReconstructionError(
            f"hist counts ({counts.size} values) and bin centres ({centers.size} values) must have the same "
            f"non-zero length")
    if not (np.all(np.isfinite(counts)) and np.all(counts >= 0) and np.all(np.isfinite(centers))):
        raise ReconstructionError("hist counts must be finite and >= 0, bin centres finite")
    if centers.size > 1 and np.any(np.diff(centers) <= 0):
        raise ReconstructionError("hist bin centres must increase")
    return centers, counts


def _robust_location(x, c):
    """Median and 1.4826 x MAD of (possibly weighted) data."""
    if c is None:
        med = float(np.median(x))
        mad = float(np.median(np.abs(x - med)))
        if mad == 0:
            mad = float(np.std(x)) / _MAD_TO_STD
    else:
        med = _weighted_median(x, c)
        mad = _weighted_median(np.abs(x - med), c)
        if mad == 0:
            mad = math.sqrt(np.average((x - med) ** 2, weights=c)) / _MAD_TO_STD
    scale = _MAD_TO_STD * mad
    if scale <= 0:
        scale = max(abs(med), 1.0) * 1e-6
    return med, scale


def _weighted_median(x, w):
    order = np.argsort(x)
    cw = np.cumsum(w[order])
    return float(x[order][np.searchsorted(cw, 0.5 * cw[-1])])


def _fit_two_normals(x, c, *, t_init, kappa, binwidth, max_iter, tol=1e-9):
    """EM for two normal components; returns (m0, s0, m1, s1, w1, converged).

    ``c`` are counts per value (histogram input) or None (one count per value).
    """
    weights = np.ones_like(x) if c is None else c
    total = float(weights.sum())
    span = float(x.max() - x.min())
    v_min = (1e-6 * span) ** 2 + (binwidth**2 / 12.0) + 1e-300
    sheppard = binwidth**2 / 12.0  # binned data overestimate the variance by h^2/12

    def stats(r):
        n = float((weights * r).sum())
        if n <= 0:
            return 0.0, float(np.average(x, weights=weights)), v_min
        m = float((weights * r * x).sum() / n)
        v = float((weights * r * (x - m) ** 2).sum() / n) - sheppard
        return n, m, max(v, v_min)

    upper = (x > t_init).astype(float)
    n1, m1, v1 = stats(upper)
    n0, m0, v0 = stats(1.0 - upper)
    if n1 == 0 or n0 == 0:
        # everything on one side: split at the median instead
        upper = (x > np.median(x)).astype(float)
        n1, m1, v1 = stats(upper)
        n0, m0, v0 = stats(1.0 - upper)
    w1 = min(max(n1 / total, 1.0 / total), 1 - 1.0 / total) if total > 1 else 0.5
    v1 = _floor_occupied(v1, v0, m1, kappa)
    old = -np.inf
    converged = False
    for _ in range(int(max_iter)):
        l0 = math.log(1 - w1) - 0.5 * math.log(v0) - 0.5 * (x - m0) ** 2 / v0
        l1 = math.log(w1) - 0.5 * math.log(v1) - 0.5 * (x - m1) ** 2 / v1
        top = np.maximum(l0, l1)
        lse = top + np.log(np.exp(l0 - top) + np.exp(l1 - top))
        loglik = float((weights * lse).sum())
        r = np.exp(l1 - lse)
        n1, m1n, v1n = stats(r)
        n0, m0n, v0n = stats(1.0 - r)
        if n1 < 1e-9 or n0 < 1e-9:
            break
        m0, v0, m1, v1 = m0n, v0n, m1n, v1n
        if m1 < m0:  # keep the labels: component 1 is the brighter one
            m0, v0, m1, v1, n0, n1 = m1, v1, m0, v0, n1, n0
        v1 = _floor_occupied(v1, v0, m1, kappa)
        w1 = min(max(n1 / total, 1e-300), 1 - 1e-16)
        if abs(loglik - old) <= tol * max(1.0, abs(loglik)):
            converged = True
            break
        old = loglik
    return m0, math.sqrt(v0), m1, math.sqrt(v1), w1, converged


def _floor_occupied(v1, v0, m1, kappa):
    floor = v0
    if kappa is not None:
        floor = v0 + kappa * max(m1, 0.0)
    return max(v1, floor)


def _crossing(m0, s0, m1, s1, w1):
    """Amplitude between the means where the weighted normal densities are equal (photons)."""
    w1 = min(max(w1, 1e-300), 1 - 1e-16)
    # log((1-w1) N(t; m0, s0)) = log(w1 N(t; m1, s1))  ->  a t^2 + b t + c = 0
    a = 0.5 / s1**2 - 0.5 / s0**2
    b = m0 / s0**2 - m1 / s1**2
    c = (0.5 * m1**2 / s1**2 - 0.5 * m0**2 / s0**2 + math.log(s1 / s0)
         + math.log((1 - w1) / w1))
    if abs(a) < 1e-14 * (abs(b) + 1e-300) ** 2 or a == 0:
        roots = np.array([-c / b]) if b != 0 else np.array([])
    else:
        disc = b * b - 4 * a * c
        if disc < 0:
            roots = np.array([])
        else:
            sq = math.sqrt(disc)
            roots = np.array([(-b - sq) / (2 * a), (-b + sq) / (2 * a)])
    inside = roots[(roots >= m0) & (roots <= m1)] if roots.size else roots
    if inside.size:
        return float(inside[np.argmin(np.abs(inside - 0.5 * (m0 + m1)))])
    if roots.size:
        # the dominant component wins everywhere between the means: take the nearest crossing
        return float(roots[np.argmin(np.abs(roots - 0.5 * (m0 + m1)))])
    return 0.5 * (m0 + m1)


def _error_rates(t, m0, s0, m1, s1, *, loss=0.0, tail=0.0):
    """(FP, FN) at threshold ``t``: the empty peak above it (with its exponential tail), the occupied
    class below it (atom peak and the atoms lost during the exposure)."""
    fp = float(special.ndtr(-(t - m0) / s0)) if np.isfinite(m0) and s0 > 0 else float("nan")
    fn = float(special.ndtr((t - m1) / s1)) if np.isfinite(m1) and s1 > 0 else float("nan")
    if tail > 0 and np.isfinite(fp):
        knee = m0 + TAIL_START * s0
        if t > knee:  # the exponential tail beyond the knee, from the normal density at the knee
            fp = max(fp, float(_normal_pdf(knee, m0, s0)) * tail * math.exp(-(t - knee) / tail))
    if loss > 0 and np.isfinite(fn):
        fn = (1.0 - loss) * fn + loss * _loss_cdf(t, m0, s0, m1, s1)
    return fp, fn


def _normal_pdf(a, m, s):
    return np.exp(-0.5 * ((np.asarray(a, float) - m) / s) ** 2) / (s * math.sqrt(2 * math.pi))


def lost_atom_density(a, *, empty_mean: float, empty_std: float, occupied_mean: float,
                      occupied_std: float) -> np.ndarray:
    """Density (per photon) of the amplitude of an atom lost at a uniformly random moment of the exposure.

    Uniform between the empty level and a full atom, its lower edge blurred by the empty width
    and its upper edge by the occupied one (module notes, "Atoms lost during the exposure");
    it integrates to 1. Amplitudes and parameters in photons.
    """
    a = np.asarray(a, float)
    return _uniform_spread((a - empty_mean) / empty_std, (a - occupied_mean) / occupied_std, empty_std,
                           occupied_std, occupied_mean - empty_mean)


def _uniform_spread(z0, z1, s0, s1, m1_minus_m0):
    """Density of a uniform spread between two levels, its lower edge blurred by ``s0`` and its
    upper edge by ``s1`` (per photon; ``z0``, ``z1`` the amplitude in units of each edge)."""
    return (special.ndtr(z0) - special.ndtr(z1)) / m1_minus_m0


def _loss_cdf(t, m0, s0, m1, s1) -> float:
    """P(amplitude <= t) of an atom lost at a uniformly random moment of the exposure.

    The amplitude is uniform between the empty level ``m0`` and the atom level ``m1``; its lower
    edge carries the empty sites' noise ``s0`` and its upper edge the atoms' noise ``s1``. The
    integral of ``Phi((a - m) / s)`` is ``s (z Phi(z) + phi(z))``.
    """
    def ramp(m, s):
        z = (t - m) / s
        return s * (z * special.ndtr(z) + math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi))

    return float(min(max((ramp(m0, s0) - ramp(m1, s1)) / (m1 - m0), 0.0), 1.0))


def _occupied_density(a, m0, s0, m1, s1, loss):
    """Density (per photon) of the occupied class: (1 - loss) x atom peak + loss x uniform spread."""
    a = np.asarray(a, float)
    dens = (1.0 - loss) * _normal_pdf(a, m1, s1)
    if loss > 0:
        dens = dens + loss * _uniform_spread((a - m0) / s0, (a - m1) / s1, s0, s1, m1 - m0)
    return dens


def _log_empty_density(a, m0, s0, tail):
    """Log density of the empty peak: normal, beyond ``TAIL_START`` widths the larger of it and the
    exponential tail of decay ``tail`` (photons) that starts from the normal density there."""
    a = np.asarray(a, float)
    z = (a - m0) / s0
    log_n = -0.5 * z * z - math.log(s0) - 0.5 * math.log(2 * math.pi)
    if tail <= 0:
        return log_n
    knee = m0 + TAIL_START * s0
    log_knee = -0.5 * TAIL_START**2 - math.log(s0) - 0.5 * math.log(2 * math.pi)
    log_t = log_knee - (a - knee) / tail
    return np.where(a > knee, np.maximum(log_n, log_t), log_n)


def _loss_threshold(x, c, *, m0, s0, m1, s1, w1, t_mix, n_sites):
    """The fewest-errors threshold with the atoms lost during the exposure (module notes).

    Returns ``(threshold, loss_fraction, empty_tail)``; ``(t_mix, 0, 0)`` when no site lies
    between the peaks.
    """
    lo, hi = m0 + LOSS_BAND_EMPTY * s0, m1 - LOSS_BAND_OCCUPIED * s1
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo or not (m1 > m0):
        return t_mix, 0.0, 0.0
    values = np.asarray(x, float)
    counts = np.ones(values.size) if c is None else np.asarray(c, float)
    order = np.argsort(values, kind="stable")
    values, counts = values[order], counts[order]
    in_band = (values > lo) & (values <= hi)
    n_band = float(counts[in_band].sum())
    if n_band <= 0:
        return t_mix, 0.0, 0.0
    lam = n_band / (hi - lo)  # lost atoms per photon of amplitude
    n_occ = w1 * n_sites
    loss = min(lam * (m1 - m0) / n_occ, 0.5) if n_occ > 0 else 0.0
    # errors(t) up to a constant = sites above t + 2 lam t, for t just above each candidate
    above = counts.sum() - np.cumsum(counts)
    cand = (values > m0 + TAIL_START * s0) & (values < t_mix)
    if not cand.any():
        return t_mix, loss, 0.0
    idx = np.flatnonzero(cand)
    cost = above[idx] + 2.0 * lam * values[idx]
    cost_mix = float(counts[values > t_mix].sum()) + 2.0 * lam * t_mix
    k = int(np.argmin(cost))
    if not cost[k] < cost_mix:
        t = t_mix
    else:
        i = idx[k]
        nxt = values[i + 1] if i + 1 < values.size else t_mix
        t = 0.5 * (values[i] + min(nxt, t_mix))
    # the posterior of the same model: the empty density equals the occupied one at t
    knee = m0 + TAIL_START * s0
    occ = w1 * float(_occupied_density(t, m0, s0, m1, s1, loss))
    empty_knee = (1.0 - w1) * float(_normal_pdf(knee, m0, s0))
    tail = 0.0
    if t > knee and occ > 0 and empty_knee > occ:
        tail = (t - knee) / math.log(empty_knee / occ)
        if (1.0 - w1) * float(_normal_pdf(t, m0, s0)) >= occ:
            tail = 0.0  # the normal tail is the heavier one already
    return float(t), float(loss), float(tail)


# --- skewed peaks: gamma-shaped background noise and gamma-shaped atom signal -------------
def _log_normal_pdf(a, m, sd):
    z = (np.asarray(a, float) - m) / sd
    return -0.5 * z * z - math.log(sd) - 0.5 * math.log(2 * math.pi)


_MAX_GAMMA_SHAPE = 1e4  # above this a gamma distribution is treated as normal


def _gamma_cells(k, theta, h, n):
    """Probabilities of Gamma(k, theta) in grid cells centred at 0, h, 2h, ... (n cells)."""
    edges = (np.arange(n + 1) - 0.5) * h
    return np.diff(special.gammainc(k, np.clip(edges, 0, None) / theta))


class _SkewedPair:
    """Empty and occupied amplitude distributions with skewed shapes, tabulated on a grid.

    empty    = m0 + N(0, s^2) + (Ge - ke*te),   Ge ~ Gamma(ke, te)   (background noise)
    occupied = empty + Gs + N(0, ss^2),          Gs ~ Gamma(k, ts)    (atom signal)

    ``ke`` = inf means a normal background (no gamma part). Amplitudes in photons.
    """

    def __init__(self, m0, s, ke, te, k, ts, ss=0.0):
        self.params = (float(m0), float(s), float(ke), float(te), float(k), float(ts), float(ss))
        gauss_bg = not (np.isfinite(ke) and ke < _MAX_GAMMA_SHAPE)
        mean_e, sd_e = (0.0, 0.0) if gauss_bg else (ke * te, math.sqrt(ke) * te)
        mean_s, sd_s = k * ts, math.sqrt(k) * ts
        sd_noise = math.sqrt(s * s + sd_e * sd_e)
        h = 0.1 * min(s if gauss_bg else min(s, sd_noise), sd_noise)
        h = max(h, (10 * sd_noise + 14 * sd_e + mean_s + 12 * sd_s + 10 * sd_noise) / 20000)
        # background gamma part, centred on its mean: cells at (i - c) h - delta
        if gauss_bg:
            pe, c, delta = np.array([1.0]), 0, 0.0
        else:
            ne = int(math.ceil((mean_e + 14 * sd_e) / h)) + 2
            pe = _gamma_cells(ke, te, h, ne)
            c = int(math.floor(mean_e / h))
            delta = mean_e - c * h
        # normal part (its variance reduced by the h^2/12 that binning the gamma adds)
        s_eff = math.sqrt(max(s * s - (0.0 if gauss_bg else h * h / 12.0), 0.25 * s * s))
        m = int(math.ceil(10.0 * s_eff / h)) + 1
        pn = np.diff(special.ndtr(((np.arange(-m, m + 2) - 0.5) * h + delta) / s_eff))  # cells q = -m..m
        noise = np.convolve(pe, pn)  # cells at m0 + (j - c - m) h
        self.h = h
        self.x0 = m0 + (np.arange(noise.size) - c - m) * h
        self.p0 = noise / noise.sum()
        ns = int(math.ceil((mean_s + 12 * sd_s) / h)) + 2
        ps = _gamma_cells(k, ts, h, ns)
        occ = np.convolve(self.p0, ps)
        if ss > 0:  # symmetric spread of the signal on top of its gamma shape
            ms = int(math.ceil(8.0 * ss / h)) + 1
            occ = np.convolve(occ, np.diff(special.ndtr((np.arange(-ms, ms + 2) - 0.5) * h / ss)))
            self._occ_start = self.x0[0] - ms * h
        else:
            self._occ_start = self.x0[0]
        self.x1 = self._occ_start + np.arange(occ.size) * h
        self.p1 = occ / occ.sum()

        # densities at the cell centres, CDFs at the cell edges (for interpolation)
        self._d0, self._d1 = self.p0 / h, self.p1 / h
        self._e0 = np.concatenate([self.x0 - 0.5 * h, [self.x0[-1] + 0.5 * h]])
        self._e1 = np.concatenate([self.x1 - 0.5 * h, [self.x1[-1] + 0.5 * h]])
        self._c0 = np.concatenate([[0.0], np.cumsum(self.p0)])
        self._c1 = np.concatenate([[0.0], np.cumsum(self.p1)])

    def pdf0(self, a):
        return _interp_uniform(a, self.x0[0], self.h, self._d0, 0.0, 0.0)

    def pdf1(self, a):
        return _interp_uniform(a, self.x1[0], self.h, self._d1, 0.0, 0.0)

    def cdf0(self, a):
        return _interp_uniform(a, self._e0[0], self.h, self._c0, 0.0, 1.0)

    def cdf1(self, a):
        return _interp_uniform(a, self._e1[0], self.h, self._c1, 0.0, 1.0)

    def moments(self):
        """(empty mean, empty sd, occupied mean, occupied sd) in photons."""
        m0, s, ke, te, k, ts, ss = self.params
        var_e = s * s + (ke * te * te if np.isfinite(ke) and ke < _MAX_GAMMA_SHAPE else 0.0)
        return m0, math.sqrt(var_e), m0 + k * ts, math.sqrt(var_e + k * ts * ts + ss * ss)


def _interp_uniform(a, start, h, values, left, right):
    """Linear interpolation in a table sampled every ``h`` from ``start`` (fast for unsorted input).

    Below the table gives ``left``, above it ``right``; NaN gives NaN.
    """
    a = np.asarray(a, dtype=float)
    u = (a - start) / h
    # fmax/fmin send a NaN to index 0 (its result is NaN through f below)
    i = np.fmin(np.fmax(np.floor(u), 0.0), values.size - 2)
    f = u - i
    i = i.astype(np.intp)
    out = values[i] * (1.0 - f) + values[i + 1] * f
    out = np.where(u < 0, left, out)
    return np.where(u > values.size - 1, right, out)


def _fit_skewed(counts, centers, *, m0, s0, m1, s1, w1, kappa):
    """Binned maximum likelihood of the two skewed peaks, started from the normal fit.

    Returns (w1, (m0, s, ke, te, k, ts, ss)) or None when the fit fails.
    """
    from scipy import optimize

    counts = np.asarray(counts, float)
    centers = np.asarray(centers, float)
    if centers.size < 8 or not (m1 > m0):
        return None
    h = np.diff(centers)
    edges = np.concatenate([[centers[0] - 0.5 * h[0]], 0.5 * (centers[1:] + centers[:-1]),
                            [centers[-1] + 0.5 * h[-1]]])
    mean_sig = m1 - m0
    var_sig = max(s1 * s1 - s0 * s0, 1e-4 * mean_sig * mean_sig)
    theta_min = 0.0 if kappa is None else kappa
    k0 = float(np.clip(mean_sig**2 / var_sig, 0.5, 1e4))
    ts0 = max(var_sig / mean_sig - theta_min, 1e-3 * mean_sig / k0)
    # start: background mostly normal with a mild gamma part (skewness ~0.3)
    ke0, frac0 = 40.0, 0.3
    te0 = math.sqrt(frac0 * s0 * s0 / ke0)
    sn0 = math.sqrt((1 - frac0) * s0 * s0)

    def unpack(p):
        return (special.expit(p[0]), p[1] * s0 + m0, s0 * math.exp(p[2]), math.exp(p[3]), s0 * math.exp(p[4]),
                math.exp(p[5]), theta_min + mean_sig * math.exp(p[6]), s0 * math.exp(p[7]))

    def nll(p):
        w, mm0, sn, ke, te, k, ts, ss = unpack(p)
        if not (np.isfinite([w, mm0, sn, ke, te, k, ts, ss]).all() and 1e-3 < ke and 1e-3 < k < 1e6):
            return 1e300
        try:
            pair = _SkewedPair(mm0, sn, ke, te, k, ts, ss)
        except (ValueError, MemoryError, OverflowError):
            return 1e300
        c0, c1 = pair.cdf0(edges), pair.cdf1(edges)
        prob = (1 - w) * np.diff(c0) + w * np.diff(c1)
        # mass outside the histogram range goes to the two end bins
        prob[0] += (1 - w) * c0[0] + w * c1[0]
        prob[-1] += (1 - w) * (1 - c0[-1]) + w * (1 - c1[-1])
        return float(-np.sum(counts * np.log(np.clip(prob, 1e-300, None))))

    p0 = np.array([special.logit(min(max(w1, 1e-6), 1 - 1e-6)), 0.0, math.log(sn0 / s0), math.log(ke0),
                   math.log(te0 / s0), math.log(k0), math.log(max(ts0, 1e-12) / mean_sig), math.log(0.1)])
    with np.errstate(all="ignore"):
        start = nll(p0)
        res = optimize.minimize(nll, p0, method="Nelder-Mead",
                                options={"xatol": 1e-4, "fatol": 1e-2, "maxiter": 4000, "maxfev": 6000,
                                         "adaptive": True})
    if not (np.isfinite(res.fun) and res.fun <= start):
        return None
    w, mm0, sn, ke, te, k, ts, ss = unpack(res.x)
    if ke >= _MAX_GAMMA_SHAPE:
        ke = float("inf")
    return w, (mm0, sn, ke, te, k, ts, ss)


def _tail_rates(pair, t):
    """(FP, FN) of skewed peaks at threshold ``t``, clipped to 0..1 (the tabulated CDFs can
    overshoot 1 by a rounding error, which would make a tail probability of -2e-16)."""
    fp = min(max(1.0 - float(pair.cdf0(t)), 0.0), 1.0)
    fn = min(max(float(pair.cdf1(t)), 0.0), 1.0)
    return fp, fn


def _crossing_skewed(pair, w1, t_guess, lo, hi):
    """Where (1 - w1) p_empty(t) = w1 p_occupied(t), searched between ``lo`` and ``hi`` (photons)."""
    from scipy import optimize

    w1 = min(max(w1, 1e-300), 1 - 1e-16)

    def f(t):
        with np.errstate(divide="ignore"):
            return (math.log(1 - w1) + float(np.log(pair.pdf0(t)))
                    - math.log(w1) - float(np.log(pair.pdf1(t))))

    grid = np.linspace(lo, hi, 401)
    vals = np.array([f(t) for t in grid])
    ok = np.isfinite(vals)
    sign = np.flatnonzero(ok[:-1] & ok[1:] & (np.diff(np.sign(vals)) != 0))
    if sign.size == 0:
        return t_guess
    i = sign[np.argmin(np.abs(grid[sign] - t_guess))]
    return float(optimize.brentq(f, grid[i], grid[i + 1], xtol=1e-9 * max(1.0, abs(hi))))
