"""Imaging fidelity: loss and hopping from consecutive images, and misreads from the histogram.

Input are occupation matrices of repeated images of the same atoms,
``occupations[shot, image, row, col]`` (0 empty, 1 occupied, a fill value such as 255 for
sites that were not read out). From every pair of consecutive images ``n -> n + 1`` of a
shot we estimate, per atom and per image:

* **loss**: the atom is gone in image ``n + 1`` and the disappearance is not explained by a
  hop (heating out of the trap, a collision with background gas, ...);
* **hop**: the atom moved to a neighbouring site (it appears on a site that was empty, next
  to a site that emptied); a hop onto an occupied site loses both atoms (pair loss);

taking into account that every image misreads empty sites as occupied (false positives) and
occupied sites as empty (false negatives) at the rates given by the histogram fit.

How the numbers are obtained
----------------------------
*Counting* estimates (``loss_counted``, ``hop_counted``): among the atoms seen in image
``n``, the fraction that vanished without an appearance next to them, and the fraction of
appearances next to a vanished atom. Their 95 % intervals are Wilson score intervals
(:func:`wilson_interval`). They ignore misreads, so they are biased by roughly the
false-negative and false-positive rates; they are reported for transparency.

*Model* estimates (``loss``, ``hop``): the maximum of a composite likelihood of the pattern
of every site in both images given the patterns of its neighbours (see
:mod:`latticeread.core._markov` for the model and its approximations). The filling, loss,
hop and (optionally) pair-loss probabilities are fitted; the false-negative rate is held at
the histogram value because two images alone cannot tell a false negative in image
``n + 1`` from a loss.

Intervals come from a bootstrap with a seeded generator (Efron & Tibshirani, *An
Introduction to the Bootstrap*, 1993, percentile interval). With
:data:`MIN_SHOTS_FOR_SHOT_BOOTSTRAP` shots or more the resampled unit is the shot (the unit
that is really independent). With fewer shots -- down to a single pair of images -- a
bootstrap over shots has nothing to resample (every replicate is the data itself, and the
interval collapses onto the value), so square blocks of ``site_block x site_block`` sites of
every shot are resampled instead (a moving-block idea: Kunsch, Ann. Stat. 17, 1217 (1989));
a block is several hop ranges wide, so an atom and the site it hopped to mostly stay
together. The report says which unit was used (``Estimate.method`` and
``settings["interval"]``). Measured with one pair of images of 50x50 sites (about 750
atoms, 3 % loss, 1.5 % hopping; ``bench/bench_fidelity.py --one-shot``, 100 data sets):
the 95 % site-block interval covered the true loss in 88 % and the true hopping in 89 % of
the data sets (mean widths 3.4 and 2.3 percentage points); blocks of 8x8 sites gave the same
(88 %), so the shortfall is the percentile bootstrap's with so few events, not the block
size. When the uncertainty of the false-negative rate is given, every replicate also draws
the rate from a normal distribution with that standard deviation, so the interval includes
it.

Misread rates
-------------
Front ends call :func:`fidelity_from_frames`: it takes the occupations together with the
site amplitudes and the thresholds that produced them, derives the misread rates once with
:func:`latticeread.core.misread.misread_rates` (one pooled histogram fit, skewed peaks for an
EMCCD) and records in ``settings["misread"]`` and ``settings["peak_shape"]`` how.

Combined figure
---------------
``read_correctly = 1 - (false_positive + false_negative + loss + hop)``: the probability
that one site of one image reflects the atom that was there at the start of the image, to
first order in the small error rates (it treats the four error channels as additive and is
slightly pessimistic when they overlap). Its interval is the bootstrap percentile interval
of the same expression evaluated in every replicate, which keeps the correlations between
the fitted loss and hop and includes the misread-rate uncertainty when it is given.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from latticeread.core import _markov
from latticeread.errors import FidelityError

__all__ = [
    "Estimate",
    "HistogramFidelity",
    "ShotFidelity",
    "BlockFidelity",
    "FidelityReport",
    "wilson_interval",
    "histogram_fidelity",
    "estimate_fidelity",
    "fidelity_from_frames",
    "simulate_occupations",
    "neighbour_offsets",
]

log = logging.getLogger(__name__)

simulate_occupations = _markov.simulate_occupations
neighbour_offsets = _markov.neighbour_offsets

#: Fewer atom-images than this behind an estimate raises a warning.
MIN_ATOM_IMAGES = 1000
#: Above this filling an appearance next to a vacated site is no longer a clear hop.
MAX_CLEAR_FILLING = 0.5
#: Loss per image of 1-2 % is typical for fluorescence imaging (common practice, no source).
TYPICAL_LOSS = (0.01, 0.02)
#: Version of the dictionary written by FidelityReport.to_dict.
FORMAT_VERSION = 1
#: With fewer shots than this the intervals resample blocks of sites instead of shots.
MIN_SHOTS_FOR_SHOT_BOOTSTRAP = 10
#: Side of the blocks of sites resampled when there are few shots (sites).
SITE_BLOCK = 4
INTERVAL_UNITS = ("auto", "shots", "sites")


def _num(x):
    """JSON-ready float (NaN and inf become None)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _float(x):
    """Inverse of :func:`_num`: None becomes NaN."""
    return float("nan") if x is None else float(x)


def _record(data, cls_name: str, keys) -> dict:
    """``data`` as a dict holding ``keys``, or a FidelityError naming what is missing."""
    if not isinstance(data, dict):
        raise FidelityError(f"a stored {cls_name} must be a dictionary, got {type(data).__name__}")
    missing = [k for k in keys if k not in data]
    if missing:
        raise FidelityError(f"the stored {cls_name} is missing {', '.join(missing)}")
    return data


# --------------------------------------------------------------------------- intervals
def wilson_interval(k, n, *, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion.

    Parameters
    ----------
    k : int
        Number of successes (e.g. atoms lost).
    n : int
        Number of trials (e.g. atoms seen in the first image).
    confidence : float, optional
        Two-sided confidence level.

    Returns
    -------
    (low, high) : tuple of float
        Interval of the proportion (dimensionless); ``(nan, nan)`` when ``n == 0``.

    Notes
    -----
    With ``z`` the ``(1 + confidence) / 2`` normal quantile and ``p = k / n``:
    ``(p + z^2/2n +- z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n)``
    (Newcombe, Statistics in Medicine 17, 857 (1998), method 3).
    """
    k, n = float(k), float(n)
    if n <= 0:
        return float("nan"), float("nan")
    if not 0 <= k <= n:
        raise FidelityError(f"a proportion needs 0 <= k <= n, got k={k:g}, n={n:g}")
    z = float(special.ndtri(0.5 + confidence / 2))
    p = k / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return max(0.0, centre - half), min(1.0, centre + half)


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class Estimate:
    """One probability with its interval and what it rests on.

    Attributes
    ----------
    value : float
        Point estimate, probability per atom per image (dimensionless).
    low, high : float
        Confidence interval (NaN when not available).
    n_atoms : int
        Atom-images behind the estimate (atoms seen in the first image of each pair).
    n_shots : int
        Shots behind the estimate.
    method : str
        How the value and interval were obtained.
    """

    value: float
    low: float = float("nan")
    high: float = float("nan")
    n_atoms: int = 0
    n_shots: int = 0
    method: str = ""

    def covers(self, truth: float) -> bool:
        """True when ``low <= truth <= high``."""
        return bool(self.low <= truth <= self.high)

    def to_dict(self) -> dict:
        return {"value": _num(self.value), "low": _num(self.low), "high": _num(self.high),
                "n_atoms": int(self.n_atoms), "n_shots": int(self.n_shots), "method": self.method}

    @classmethod
    def from_dict(cls, data: dict) -> "Estimate":
        """Inverse of :meth:`to_dict` (null becomes NaN)."""
        d = _record(data, "estimate", ("value",))
        return cls(value=_float(d["value"]), low=_float(d.get("low")), high=_float(d.get("high")),
                   n_atoms=int(d.get("n_atoms", 0)), n_shots=int(d.get("n_shots", 0)), method=str(d.get("method", "")))


@dataclass(frozen=True)
class HistogramFidelity:
    """Misread rates implied by the overlap of the two fitted histogram components.

    Attributes
    ----------
    threshold : float
        Occupancy threshold, photons.
    false_positive_rate : float
        P(empty site read as occupied) = P(empty-site amplitude > threshold).
    false_negative_rate : float
        P(occupied site read as empty) = P(atom amplitude <= threshold).
    filling : float
        Weight of the occupied component (fraction of sites holding an atom).
    misread_fraction : float
        Expected fraction of sites misread: ``(1 - filling) FP + filling FN``.
    fidelity : float
        ``1 - misread_fraction``.
    """

    threshold: float
    false_positive_rate: float
    false_negative_rate: float
    filling: float
    misread_fraction: float
    fidelity: float

    def to_dict(self) -> dict:
        return {k: _num(getattr(self, k)) for k in
                ("threshold", "false_positive_rate", "false_negative_rate", "filling",
                 "misread_fraction", "fidelity")}

    @classmethod
    def from_dict(cls, data: dict) -> "HistogramFidelity":
        """Inverse of :meth:`to_dict` (null becomes NaN)."""
        names = ("threshold", "false_positive_rate", "false_negative_rate", "filling", "misread_fraction", "fidelity")
        d = _record(data, "histogram figures", names)
        return cls(**{k: _float(d[k]) for k in names})


def histogram_fidelity(threshold_result=None, *, threshold=None, means=None, stds=None,
                       weights=None) -> HistogramFidelity:
    """Misread rates and fidelity of one image from its two-component histogram fit.

    Parameters
    ----------
    threshold_result : ThresholdResult, optional
        A histogram fit from ``latticeread.core.classify.select_threshold`` (attributes
        ``threshold``, ``empty_mean``, ``empty_std``, ``occupied_mean``, ``occupied_std``,
        ``occupied_fraction``). Either this or the four keyword arguments.
    threshold : float
        Occupancy threshold, photons.
    means, stds : (2,) sequence of float
        Means and standard deviations of the empty and occupied components, photons.
    weights : (2,) sequence of float
        Fractions of empty and occupied sites.

    Returns
    -------
    HistogramFidelity

    Notes
    -----
    The components are taken as normal distributions, so
    ``FP = 1 - Phi((t - mu0) / s0)`` and ``FN = Phi((t - mu1) / s1)``. These are the rates to
    pass to :func:`estimate_fidelity`; a threshold fit made with the camera noise model may
    carry its own (non-normal) rates, which are then the better choice.
    """
    if threshold_result is not None:
        t = threshold_result
        threshold = t.threshold
        means = (t.empty_mean, t.occupied_mean)
        stds = (t.empty_std, t.occupied_std)
        weights = (1.0 - t.occupied_fraction, t.occupied_fraction)
    if threshold is None or means is None or stds is None or weights is None:
        raise FidelityError("histogram_fidelity needs a threshold fit or threshold, means, stds and weights")
    means = np.asarray(means, float).ravel()
    stds = np.asarray(stds, float).ravel()
    weights = np.asarray(weights, float).ravel()
    if means.size != 2 or stds.size != 2 or weights.size != 2:
        raise FidelityError("the histogram fit must have exactly two components (empty, occupied)")
    if np.any(stds <= 0) or not np.all(np.isfinite(np.r_[means, stds, weights, threshold])):
        raise FidelityError(f"histogram components need finite means and positive widths, got "
                            f"means={means.tolist()}, stds={stds.tolist()}")
    order = np.argsort(means)
    means, stds, weights = means[order], stds[order], weights[order] / weights.sum()
    t = float(threshold)
    fp = float(special.ndtr(-(t - means[0]) / stds[0]))
    fn = float(special.ndtr((t - means[1]) / stds[1]))
    misread = float(weights[0] * fp + weights[1] * fn)
    return HistogramFidelity(threshold=t, false_positive_rate=fp, false_negative_rate=fn,
                             filling=float(weights[1]), misread_fraction=misread, fidelity=1.0 - misread)


@dataclass(frozen=True)
class ShotFidelity:
    """Counting summary of one shot (all its image pairs).

    Attributes
    ----------
    shot : int
        Shot index (0-based).
    n_atoms : int
        Atoms seen in the first image of each pair, summed over pairs.
    n_vanished : int
        Sites read occupied then empty.
    n_appeared : int
        Sites read empty then occupied.
    n_appeared_near_vacated : int
        Appearances with at least one neighbour that vanished (counted as hops).
    vanished : Estimate
        ``n_vanished / n_atoms`` with its Wilson interval (includes loss, hops and misreads).
    """

    shot: int
    n_atoms: int
    n_vanished: int
    n_appeared: int
    n_appeared_near_vacated: int
    vanished: Estimate

    def to_dict(self) -> dict:
        return {"shot": self.shot, "n_atoms": self.n_atoms, "n_vanished": self.n_vanished,
                "n_appeared": self.n_appeared, "n_appeared_near_vacated": self.n_appeared_near_vacated,
                "vanished": self.vanished.to_dict()}

    @classmethod
    def from_dict(cls, data: dict) -> "ShotFidelity":
        """Inverse of :meth:`to_dict`."""
        names = ("shot", "n_atoms", "n_vanished", "n_appeared", "n_appeared_near_vacated")
        d = _record(data, "per-shot record", names + ("vanished",))
        return cls(**{k: int(d[k]) for k in names}, vanished=Estimate.from_dict(d["vanished"]))


@dataclass(frozen=True)
class BlockFidelity:
    """Model estimate on a block of consecutive shots (drift over a run).

    Attributes
    ----------
    first_shot, last_shot : int
        Inclusive shot range.
    loss, hop : float
        Model point estimates, probability per atom per image.
    read_correctly : float
        ``1 - (FP + FN + loss + hop)`` for this block.
    n_atoms : int
        Atom-images in the block.
    """

    first_shot: int
    last_shot: int
    loss: float
    hop: float
    read_correctly: float
    n_atoms: int

    def to_dict(self) -> dict:
        return {"first_shot": self.first_shot, "last_shot": self.last_shot, "loss": _num(self.loss),
                "hop": _num(self.hop), "read_correctly": _num(self.read_correctly), "n_atoms": self.n_atoms}

    @classmethod
    def from_dict(cls, data: dict) -> "BlockFidelity":
        """Inverse of :meth:`to_dict`."""
        d = _record(data, "block record", ("first_shot", "last_shot", "loss", "hop", "read_correctly", "n_atoms"))
        return cls(first_shot=int(d["first_shot"]), last_shot=int(d["last_shot"]), loss=_float(d["loss"]),
                   hop=_float(d["hop"]), read_correctly=_float(d["read_correctly"]), n_atoms=int(d["n_atoms"]))


@dataclass(frozen=True)
class FidelityReport:
    """Loss, hopping and the combined imaging fidelity of a set of repeated images.

    All probabilities are per atom (loss, hop, pair loss) or per site (misreads) and per image.

    Attributes
    ----------
    loss, hop : Estimate
        Model estimates (bootstrap intervals over shots).
    pair_loss : Estimate
        Probability that two atoms meeting on a site are both lost (fixed or fitted).
    filling : Estimate
        Fitted fraction of sites holding an atom in the first image of a pair.
    false_positive_rate, false_negative_rate : Estimate
        The misread rates used (from the histogram; interval = +-1.96 sigma when given).
    read_correctly : Estimate
        ``1 - (FP + FN + loss + hop)`` (see the module notes for how errors combine).
    loss_counted, hop_counted : Estimate
        Counting estimates with Wilson intervals (no misread correction).
    loss_is_typical : bool
        Whether the loss interval overlaps the typical 1-2 % per image.
    per_shot : tuple of ShotFidelity
    blocks : tuple of BlockFidelity
        Model estimates on blocks of consecutive shots.
    per_pair : tuple of dict
        With three or more images per shot: model loss and hop of each image pair.
    n_shots, n_images, n_sites, n_atom_images : int
        Data behind the estimates (sites = sites read out in a shot).
    neighbour_offsets : tuple of (int, int)
        Index offsets counted as neighbours (hop targets).
    histogram : HistogramFidelity or None
        One-image misread figures, when a histogram fit was given.
    settings : dict
        Options of the estimate (confidence, bootstrap size, seed, ...).
    warnings : tuple of str
        Reasons why the numbers may mislead.
    """

    loss: Estimate
    hop: Estimate
    pair_loss: Estimate
    filling: Estimate
    false_positive_rate: Estimate
    false_negative_rate: Estimate
    read_correctly: Estimate
    loss_counted: Estimate
    hop_counted: Estimate
    loss_is_typical: bool
    per_shot: tuple = ()
    blocks: tuple = ()
    per_pair: tuple = ()
    n_shots: int = 0
    n_images: int = 0
    n_sites: int = 0
    n_atom_images: int = 0
    neighbour_offsets: tuple = ()
    histogram: HistogramFidelity | None = None
    settings: dict = field(default_factory=dict)
    warnings: tuple = ()

    def to_dict(self) -> dict:
        """JSON-ready dictionary (NaN written as null)."""
        out = {"format": "latticeread-fidelity", "format_version": FORMAT_VERSION}
        for name in ("loss", "hop", "pair_loss", "filling", "false_positive_rate", "false_negative_rate",
                     "read_correctly", "loss_counted", "hop_counted"):
            out[name] = getattr(self, name).to_dict()
        out.update(
            loss_is_typical=bool(self.loss_is_typical),
            typical_loss_range=list(TYPICAL_LOSS),
            n_shots=int(self.n_shots), n_images=int(self.n_images), n_sites=int(self.n_sites),
            n_atom_images=int(self.n_atom_images),
            neighbour_offsets=[list(map(int, o)) for o in self.neighbour_offsets],
            per_shot=[s.to_dict() for s in self.per_shot],
            blocks=[b.to_dict() for b in self.blocks],
            per_pair=[{k: (_num(v) if isinstance(v, float) else v) for k, v in p.items()} for p in self.per_pair],
            histogram=None if self.histogram is None else self.histogram.to_dict(),
            settings=dict(self.settings),
            warnings=list(self.warnings),
        )
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "FidelityReport":
        """Rebuild a report from :meth:`to_dict` output (e.g. read back from a session file).

        Raises
        ------
        FidelityError
            Not a fidelity record, a newer format version, or a missing field.
        """
        if not isinstance(data, dict) or data.get("format") != "latticeread-fidelity":
            raise FidelityError("this is not a latticeread fidelity record (no format 'latticeread-fidelity')")
        version = data.get("format_version")
        if not isinstance(version, int) or version > FORMAT_VERSION:
            raise FidelityError(f"fidelity record format version {version!r} is newer than this program reads "
                                f"({FORMAT_VERSION}); update latticeread")
        estimates = ("loss", "hop", "pair_loss", "filling", "false_positive_rate", "false_negative_rate",
                     "read_correctly", "loss_counted", "hop_counted")
        d = _record(data, "fidelity record", estimates + ("loss_is_typical",))
        hist = d.get("histogram")
        return cls(
            **{k: Estimate.from_dict(d[k]) for k in estimates},
            loss_is_typical=bool(d["loss_is_typical"]),
            per_shot=tuple(ShotFidelity.from_dict(x) for x in d.get("per_shot", ())),
            blocks=tuple(BlockFidelity.from_dict(x) for x in d.get("blocks", ())),
            per_pair=tuple({k: (_float(v) if k in ("loss", "hop") else v) for k, v in p.items()}
                           for p in d.get("per_pair", ())),
            n_shots=int(d.get("n_shots", 0)), n_images=int(d.get("n_images", 0)), n_sites=int(d.get("n_sites", 0)),
            n_atom_images=int(d.get("n_atom_images", 0)),
            neighbour_offsets=tuple(tuple(int(v) for v in o) for o in d.get("neighbour_offsets", ())),
            histogram=None if hist is None else HistogramFidelity.from_dict(hist),
            settings=dict(d.get("settings") or {}),
            warnings=tuple(str(w) for w in d.get("warnings", ())),
        )

    def format_table(self) -> str:
        """A readable text table of the main figures (percent per image)."""
        conf = self.settings.get("confidence", 0.95)

        def row(label, est: Estimate, note=""):
            if math.isfinite(est.low) and math.isfinite(est.high):
                ci = f"[{100 * est.low:7.3f}, {100 * est.high:7.3f}]"
            else:
                ci = " " * 20
            return f"  {label:<34s}{100 * est.value:8.3f} %  {ci}  {note}".rstrip()

        lines = [
            f"Imaging fidelity from {self.n_shots} shots x {self.n_images} images, "
            f"{self.n_sites} sites, {self.n_atom_images} atom-images",
            f"  {'quantity (per image)':<34s}{'value':>10s}  {int(round(conf * 100))} % interval",
            row("loss", self.loss, "typical (1-2 %)" if self.loss_is_typical else "outside typical 1-2 %"),
            row("hop to a neighbour", self.hop),
            row("pair loss when a hop meets an atom", self.pair_loss, self.pair_loss.method),
            row("false positive (empty read occupied)", self.false_positive_rate),
            row("false negative (atom read empty)", self.false_negative_rate),
            row("P(site read correctly)", self.read_correctly, "= 1 - (FP + FN + loss + hop)"),
            row("filling", self.filling),
            row("loss, counted (no misread corr.)", self.loss_counted, "Wilson"),
            row("hop, counted (no misread corr.)", self.hop_counted, "Wilson"),
        ]
        if self.settings.get("interval"):
            lines.append(f"  intervals: {self.settings['interval']}")
        misread = self.settings.get("misread")
        if isinstance(misread, dict) and misread.get("method"):
            lines.append(f"  misread rates: {misread['method']}")
        if self.histogram is not None:
            h = self.histogram
            lines.append(f"  one-image histogram: FP {100 * h.false_positive_rate:.3f} %, "
                         f"FN {100 * h.false_negative_rate:.3f} %, fidelity {100 * h.fidelity:.3f} %")
        for p in self.per_pair:
            lines.append(f"  images {p['pair']}->{p['pair'] + 1}: loss {100 * p['loss']:.3f} %, "
                         f"hop {100 * p['hop']:.3f} %  ({p['n_atoms']} atoms)")
        if self.blocks:
            lines.append("  over the run (model, per block of shots):")
            for b in self.blocks:
                lines.append(f"    shots {b.first_shot:4d}-{b.last_shot:4d}: loss {100 * b.loss:6.3f} %, "
                             f"hop {100 * b.hop:6.3f} %, read correctly {100 * b.read_correctly:7.3f} %  "
                             f"({b.n_atoms} atoms)")
        for w in self.warnings:
            lines.append(f"  WARNING: {w}")
        return "\n".join(lines)


# --------------------------------------------------------------------------- estimate
def _check_rate(name, value):
    """A probability in [0, 0.5), or None when unknown (None or NaN, e.g. a failed histogram fit)."""
    if value is None:
        return None
    v = float(value)
    if math.isnan(v):
        return None
    if not (math.isfinite(v) and 0 <= v < 0.5):
        raise FidelityError(f"{name} must be a probability between 0 and 0.5, got {value!r}")
    return v


def _validate(occupations, region, fill_value):
    occ = np.asarray(occupations)
    if occ.ndim != 4:
        raise FidelityError(
            f"occupations must be a (shots, images, rows, cols) array, got shape {occ.shape}; "
            "for one shot use occupations[np.newaxis]")
    if occ.shape[1] < 2:
        raise FidelityError(f"loss and hopping need at least 2 consecutive images per shot, got {occ.shape[1]}")
    if occ.dtype == bool:
        occ = occ.astype(np.uint8)
    if not np.issubdtype(occ.dtype, np.integer):
        if not np.all(np.isfinite(occ)):
            raise FidelityError("occupations contain NaN or inf; use the fill value for sites not read out")
        if np.any(occ != np.round(occ)):
            raise FidelityError("occupations must be whole numbers 0, 1 or the fill value")
        occ = occ.astype(np.int64)
    valid = (occ == 0) | (occ == 1)
    bad = ~valid & (occ != fill_value)
    if np.any(bad):
        raise FidelityError(
            f"occupations hold values other than 0, 1 and the fill value {fill_value} "
            f"(e.g. {int(occ[bad][0])} at index {tuple(int(i) for i in np.argwhere(bad)[0])})")
    if region is not None:
        region = np.asarray(region, bool)
        if region.shape != occ.shape[2:]:
            raise FidelityError(f"region mask is {region.shape[0]}x{region.shape[1]} sites but the "
                                f"occupation matrices are {occ.shape[2]}x{occ.shape[3]}")
        valid = valid & region
    return np.where(valid, occ, 0).astype(np.uint8), valid


class _Fitter:
    """Maximum-likelihood fit of the site model to pattern counts.

    Fitted: filling, loss, hop, false-positive rate (and pair loss when asked); the
    false-negative rate is held at the value given.
    """

    def __init__(self, table, *, pair_loss):
        self.own = table.own
        self.neighbours = table.neighbours
        self.vacated = table.vacated
        self.K = table.n_neighbours
        self.fit_beta = pair_loss is None
        self.beta = 1.0 if pair_loss is None else float(pair_loss)

    def theta(self, x, fn):
        return (x[0], x[1], x[2], x[4] if self.fit_beta else self.beta, x[3], fn)

    def fit(self, counts, fn, x0):
        from scipy import optimize  # imported here: it is slow to import and only needed to fit

        counts = np.asarray(counts, float)
        bounds = [(1e-6, 1 - 1e-6), (0.0, 0.5), (0.0, 0.5), (0.0, 0.499)] + ([(0.0, 1.0)] if self.fit_beta else [])
        total = max(counts.sum(), 1.0)

        def fun(x):
            return _markov.negative_log_likelihood(self.theta(x, fn), own=self.own, neighbours=self.neighbours,
                                                   counts=counts, n_neighbours=self.K) / total
        # SLSQP: bounded, quick for a handful of parameters, and it does not start BLAS thread
        # pools (L-BFGS-B did, which made fits 10x slower in wall time on a busy machine).
        x0 = np.clip(np.asarray(x0, float), [b[0] for b in bounds], [b[1] for b in bounds])
        return optimize.minimize(fun, x0, method="SLSQP", bounds=bounds, options={"ftol": 1e-13, "maxiter": 500})

    def start(self, counts, fp):
        n_atoms = counts[self.own >= 2].sum()
        n_sites = max(counts.sum(), 1.0)
        vanished = counts[self.own == 2].sum()
        near = counts[(self.own == 1) & (self.vacated > 0)].sum()
        f = min(max(n_atoms / n_sites, 1e-3), 0.999)
        hop = min(near / max(n_atoms, 1.0), 0.4) + 1e-4
        loss = min(max(vanished / max(n_atoms, 1.0) - hop, 0.0), 0.4) + 1e-4
        return [f, loss, hop, min(fp, 0.4) + 1e-4] + ([0.9] if self.fit_beta else [])


def _counting(counts, own, vacated):
    """Counting statistics from pattern counts (per unit in the last axis)."""
    n_atoms = counts[..., own >= 2].sum(-1)
    vanished = counts[..., own == 2].sum(-1)
    appeared = counts[..., own == 1].sum(-1)
    near = counts[..., (own == 1) & (vacated > 0)].sum(-1)
    return n_atoms, vanished, appeared, near


def _blocks(n_shots, n_blocks, atoms_per_shot):
    """Shot ranges of about equal size, each with at least MIN_ATOM_IMAGES atoms if possible."""
    if not n_blocks or n_shots < 2:
        return []
    mean_atoms = max(float(np.mean(atoms_per_shot)), 1.0)
    size = max(int(np.ceil(n_shots / int(n_blocks))), int(np.ceil(MIN_ATOM_IMAGES / mean_atoms)))
    if size >= n_shots:
        return []
    starts = list(range(0, n_shots, size))
    ranges = [(a, min(a + size, n_shots)) for a in starts]
    if len(ranges) > 1 and ranges[-1][1] - ranges[-1][0] < size / 2:  # fold a short tail into the last block
        ranges[-2:] = [(ranges[-2][0], n_shots)]
    return ranges


def estimate_fidelity(
    occupations,
    *,
    false_positive_rate: float | None = None,
    false_negative_rate: float | None = None,
    false_negative_uncertainty: float | None = None,
    region=None,
    fill_value: int = 255,
    neighbour_radius: float = 2 ** 0.5,
    geometry=None,
    pair_loss: float | None = 1.0,
    histogram=None,
    n_bootstrap: int = 200,
    confidence: float = 0.95,
    n_blocks: int = 10,
    interval: str = "auto",
    site_block: int = SITE_BLOCK,
    rng=0,
) -> FidelityReport:
    """Estimate loss, hopping and the combined fidelity from repeated images.

    Parameters
    ----------
    occupations : (n_shots, n_images, n_rows, n_cols) array of uint8 or bool
        Occupation matrices: 0 empty, 1 occupied, ``fill_value`` where a site was not read
        out. Images of one shot must be consecutive images of the same atoms with the same
        site indices (phase re-fitted per frame).
    false_positive_rate : float, optional
        Probability that an image reads an empty site as occupied, from the histogram fit
        (None or NaN = unknown, for this and the two other rates).
        The model fits the false-positive rate the images really show (appearances away
        from any vacated site); the histogram value is the starting point and is compared
        with the fitted one (a warning when they disagree).
    false_negative_rate : float, optional
        Probability that an image reads an atom as empty, from the histogram fit. Two images
        cannot tell it from loss, so it is held at this value. Default: 0 (with a warning).
    false_negative_uncertainty : float, optional
        Standard deviation of the false-negative rate; when given it enters the intervals.
    region : (n_rows, n_cols) bool array, optional
        Sites to use; others are ignored as if they held ``fill_value``.
    fill_value : int, optional
        Marker of sites not read out.
    neighbour_radius : float, optional
        Hop range in lattice sites. Default ``sqrt(2)``: nearest and next-nearest (diagonal
        in index space) neighbours. See :func:`neighbour_offsets`.
    geometry : LatticeGeometry, optional
        When given, the radius is measured in real space (units of the shorter lattice
        spacing) so oblique lattices get their true neighbours (a triangular lattice then
        has 6 neighbours within the default radius).
    pair_loss : float or None, optional
        Probability that two atoms meeting on a site are both lost. Default 1 (parity
        projection); None fits it.
    histogram : HistogramFidelity or ThresholdResult, optional
        One-image histogram figures to include in the report.
    n_bootstrap : int, optional
        Bootstrap replicates for the model intervals (0 = no intervals).
    confidence : float, optional
        Two-sided confidence level of all intervals.
    n_blocks : int, optional
        Number of blocks of consecutive shots for the over-the-run summary (blocks are
        enlarged to hold at least 1,000 atom-images when the data allow; 0 = none).
    interval : {"auto", "shots", "sites"}, optional
        What the bootstrap resamples: whole shots, or blocks of sites within every shot.
        ``"auto"`` (default): shots when there are at least
        :data:`MIN_SHOTS_FOR_SHOT_BOOTSTRAP` of them, otherwise blocks of sites (so one
        pair of images still gets an interval).
    site_block : int, optional
        Side of the square blocks of sites for ``interval="sites"`` (sites, default 4).
    rng : int or numpy.random.Generator, optional
        Seed of the bootstrap (default 0, so a report is reproducible).

    Returns
    -------
    FidelityReport

    Raises
    ------
    FidelityError
        Malformed occupations, rates out of range, nothing to estimate.
    """
    fp_in = _check_rate("false_positive_rate", false_positive_rate)
    fn_in = _check_rate("false_negative_rate", false_negative_rate)
    sfn = _check_rate("false_negative_uncertainty", false_negative_uncertainty)
    if pair_loss is not None and not 0 <= float(pair_loss) <= 1:
        raise FidelityError(f"pair_loss must be between 0 and 1 or None (fit it), got {pair_loss!r}")
    if not 0 < confidence < 1:
        raise FidelityError(f"confidence must be between 0 and 1, got {confidence!r}")
    if int(n_bootstrap) < 0:
        raise FidelityError(f"n_bootstrap must be 0 or more, got {n_bootstrap!r}")
    if interval not in INTERVAL_UNITS:
        raise FidelityError(f"unknown interval unit {interval!r}; use one of {', '.join(INTERVAL_UNITS)}")
    if int(site_block) < 1:
        raise FidelityError(f"site_block must be at least 1 site, got {site_block!r}")
    if histogram is not None and not isinstance(histogram, HistogramFidelity):
        histogram = histogram_fidelity(histogram)
    warnings: list[str] = []
    if fn_in is None:
        warnings.append("no false-negative rate given: atoms are assumed never to be read as empty, "
                        "so such misreads are counted as loss")
    fn = 0.0 if fn_in is None else fn_in
    occ, valid = _validate(occupations, region, fill_value)
    n_shots, n_images = occ.shape[:2]
    try:
        offsets = _markov.neighbour_offsets(neighbour_radius=neighbour_radius, geometry=geometry)
    except ValueError as exc:
        raise FidelityError(str(exc)) from exc
    table = _markov.pattern_table(occ, valid=valid, offsets=offsets)
    per_unit = table.counts.astype(float)              # (shots, pairs, M)
    per_shot = per_unit.sum(axis=1)                     # (shots, M)
    total = per_shot.sum(axis=0)
    if total.sum() == 0:
        raise FidelityError("no site is read out in two consecutive images: nothing to estimate")
    own, nb = table.own, table.vacated
    n_atoms, vanished, appeared, near = (int(v) for v in _counting(total, own, nb))
    if n_atoms == 0:
        raise FidelityError("no atom is seen in the first image of any pair: loss and hopping cannot be estimated")
    fitter = _Fitter(table, pair_loss=pair_loss)
    res = fitter.fit(total, fn, fitter.start(total, fp_in or 0.0))
    if not res.success:
        warnings.append(f"the model fit did not converge ({res.message}); treat the model estimates with care")
    x_hat = res.x
    f_hat, loss_hat, hop_hat, fp_hat = (float(v) for v in x_hat[:4])
    beta_hat = float(x_hat[4]) if fitter.fit_beta else fitter.beta

    # Bootstrap over shots or blocks of sites (and over the false-negative rate when its
    # uncertainty is known).
    unit = interval if interval != "auto" else ("shots" if n_shots >= MIN_SHOTS_FOR_SHOT_BOOTSTRAP else "sites")
    units = per_shot if unit == "shots" else table.block_counts(int(site_block)).astype(float)
    n_units = units.shape[0]
    gen = np.random.default_rng(rng)
    boot = []
    for _ in range(int(n_bootstrap)):
        w = gen.multinomial(n_units, np.full(n_units, 1.0 / n_units))
        fn_b = fn if not sfn else float(np.clip(gen.normal(fn, sfn), 0.0, 0.499))
        x = fitter.fit(w @ units, fn_b, x_hat).x
        beta_b = float(x[4]) if fitter.fit_beta else fitter.beta
        boot.append([x[0], x[1], x[2], beta_b, x[3], fn_b, 1 - (x[3] + fn_b + x[1] + x[2])])
    boot = np.asarray(boot, float).reshape(-1, 7)
    alpha = (1 - confidence) / 2

    def percentile(col):
        if boot.shape[0] == 0:
            return float("nan"), float("nan")
        lo, hi = np.quantile(boot[:, col], [alpha, 1 - alpha])
        return float(lo), float(hi)

    unit_text = ("shots" if unit == "shots" else
                 f"blocks of {int(site_block)}x{int(site_block)} sites ({n_units} blocks)")
    boot_method = (f"model fit, {len(boot)} bootstrap replicates over {unit_text}"
                   + (" and the false-negative rate" if sfn else ""))
    common = dict(n_atoms=n_atoms, n_shots=n_shots)
    loss = Estimate(loss_hat, *percentile(1), method=boot_method, **common)
    hop = Estimate(hop_hat, *percentile(2), method=boot_method, **common)
    filling = Estimate(f_hat, *percentile(0), method=boot_method, **common)
    pair = (Estimate(beta_hat, *percentile(3), method="fitted", **common) if fitter.fit_beta
            else Estimate(beta_hat, method="fixed", **common))
    fp_est = Estimate(fp_hat, *percentile(4), method="fitted (appearances away from vacated sites)", **common)
    if sfn:
        z = float(special.ndtri(1 - alpha))
        fn_est = Estimate(fn, max(0.0, fn - z * sfn), fn + z * sfn, method="from the histogram fit", **common)
    else:
        fn_est = Estimate(fn, method="from the histogram fit (no uncertainty given)" if fn_in is not None
                          else "assumed 0", **common)
    read_ok = Estimate(1 - (fp_hat + fn + loss_hat + hop_hat), *percentile(6), method=boot_method, **common)
    counted_loss_k = max(vanished - near, 0)
    loss_counted = Estimate(counted_loss_k / n_atoms, *wilson_interval(counted_loss_k, n_atoms, confidence=confidence),
                            method="counted: vanished without an appearance nearby, Wilson interval", **common)
    hop_counted = Estimate(near / n_atoms, *wilson_interval(near, n_atoms, confidence=confidence),
                           method="counted: appearances next to a vanished atom, Wilson interval", **common)
    if math.isfinite(loss.low):
        typical = bool(loss.high >= TYPICAL_LOSS[0] and loss.low <= TYPICAL_LOSS[1])
    else:
        typical = bool(TYPICAL_LOSS[0] <= loss_hat <= TYPICAL_LOSS[1])

    # Per shot (counting) and over the run (model fit on blocks of shots).
    s_atoms, s_van, s_app, s_near = (a.astype(int) for a in _counting(per_shot, own, nb))
    shots = tuple(
        ShotFidelity(shot=i, n_atoms=int(s_atoms[i]), n_vanished=int(s_van[i]), n_appeared=int(s_app[i]),
                     n_appeared_near_vacated=int(s_near[i]),
                     vanished=Estimate(s_van[i] / s_atoms[i] if s_atoms[i] else float("nan"),
                                       *wilson_interval(s_van[i], s_atoms[i], confidence=confidence),
                                       n_atoms=int(s_atoms[i]), n_shots=1, method="counted, Wilson interval"))
        for i in range(n_shots))
    blocks = []
    for a, b in _blocks(n_shots, n_blocks, s_atoms):
        c = per_shot[a:b].sum(axis=0)
        if c[own >= 2].sum() == 0:
            continue
        x = fitter.fit(c, fn, x_hat).x
        blocks.append(BlockFidelity(first_shot=int(a), last_shot=int(b - 1), loss=float(x[1]), hop=float(x[2]),
                                    read_correctly=float(1 - (x[3] + fn + x[1] + x[2])),
                                    n_atoms=int(c[own >= 2].sum())))
    pairs = []
    if n_images > 2:
        for p in range(n_images - 1):
            c = per_unit[:, p].sum(axis=0)
            na = int(c[own >= 2].sum())
            if na == 0:
                continue
            x = fitter.fit(c, fn, x_hat).x
            pairs.append({"pair": p, "loss": float(x[1]), "hop": float(x[2]), "n_atoms": na})

    if n_atoms < MIN_ATOM_IMAGES:
        warnings.append(f"only {n_atoms} atom-images behind the loss and hop estimates "
                        f"(fewer than {MIN_ATOM_IMAGES:,}): the numbers are rough")
    if f_hat > MAX_CLEAR_FILLING:
        warnings.append(f"filling {f_hat:.2f} is above {MAX_CLEAR_FILLING}: too dense for a hop to be told "
                        "apart from loss plus a misread; the hop estimate is ambiguous")
    if n_bootstrap and unit == "shots" and n_shots < MIN_SHOTS_FOR_SHOT_BOOTSTRAP:
        warnings.append(f"only {n_shots} shot(s): bootstrap intervals over shots are unreliable")
    if n_bootstrap and unit == "sites":
        warnings.append(f"only {n_shots} shot(s): the intervals resample blocks of {int(site_block)}x"
                        f"{int(site_block)} sites, which takes the blocks as independent (drifts between "
                        "shots are not in them); with one pair of images of about 750 atoms they covered "
                        "the true rates in 88-89 % of simulated cases, not 95 %")
    if n_bootstrap == 0:
        warnings.append("no bootstrap requested: the model estimates have no interval")
    if fn_in and not sfn:
        warnings.append("the uncertainty of the false-negative rate was not given: intervals leave it out")
    if fp_in is not None and math.isfinite(fp_est.low) and not (fp_est.low <= fp_in <= fp_est.high):
        warnings.append(f"the images show {100 * fp_hat:.3f} % false positives but the histogram fit gives "
                        f"{100 * fp_in:.3f} %: the histogram does not describe all misreads "
                        "(e.g. light from neighbouring atoms), so its false-negative rate may be off too")

    settings = {"confidence": float(confidence), "n_bootstrap": int(n_bootstrap),
                "interval": f"bootstrap over {unit_text}" if n_bootstrap else "none",
                "interval_unit": unit, "site_block": int(site_block),
                "neighbour_radius": float(neighbour_radius), "radius_in": "real space" if geometry else "index space",
                "pair_loss": None if pair_loss is None else float(pair_loss), "fill_value": int(fill_value),
                "histogram_false_positive_rate": fp_in, "false_negative_uncertainty": sfn,
                "seed": rng if isinstance(rng, (int, type(None))) else "generator"}
    log.debug("fidelity: loss %.4f hop %.4f from %d atom-images", loss_hat, hop_hat, n_atoms)
    return FidelityReport(
        loss=loss, hop=hop, pair_loss=pair, filling=filling, false_positive_rate=fp_est,
        false_negative_rate=fn_est, read_correctly=read_ok, loss_counted=loss_counted, hop_counted=hop_counted,
        loss_is_typical=typical, per_shot=shots, blocks=tuple(blocks), per_pair=tuple(pairs), n_shots=n_shots,
        n_images=n_images, n_sites=int(valid[:, 0].sum(axis=(1, 2)).max()), n_atom_images=n_atoms,
        neighbour_offsets=tuple(tuple(int(v) for v in o) for o in offsets), histogram=histogram,
        settings=settings, warnings=tuple(warnings))


def fidelity_from_frames(
    occupations,
    *,
    amplitudes,
    thresholds,
    camera=None,
    peak_shape: str | None = None,
    geometry=None,
    false_positive_rate: float | None = None,
    false_negative_rate: float | None = None,
    false_negative_uncertainty: float | None = None,
    neighbour_radius: float = 2 ** 0.5,
    pair_loss: float | None = 1.0,
    n_bootstrap: int = 200,
    confidence: float = 0.95,
    n_blocks: int = 10,
    interval: str = "auto",
    rng=0,
) -> FidelityReport:
    """Loss, hopping and misreads of reconstructed frames: the entry point of every front end.

    The window, ``batch`` and the ``fidelity`` command (on frames, or on the results files of
    ``reconstruct``, ``batch`` and ``watch``) all call this function, so the same frames give
    the same report whichever route produced them.

    Parameters
    ----------
    occupations : (n_shots, n_images, n_rows, n_cols) array of uint8
        Occupation matrices grouped into shots (see :func:`estimate_fidelity`).
    amplitudes : (n_frames, ...) array_like of float
        Site amplitudes of the frames behind ``occupations``, photons (NaN where not read
        out); any layout after the first axis.
    thresholds : float or (n_frames,) array_like of float
        Threshold each frame was classified with, photons.
    camera : CameraModel, optional
        Camera of the frames; an EMCCD gets skewed histogram peaks
        (:func:`latticeread.core.misread.peak_shape_for`).
    peak_shape : {"normal", "skewed"}, optional
        Override of the camera's peak shape.
    geometry : LatticeGeometry, optional
        Lattice geometry (real-space neighbour radius).
    false_positive_rate, false_negative_rate, false_negative_uncertainty : float, optional
        Values given by the user; each replaces the one derived from the amplitudes.
    neighbour_radius, pair_loss, n_bootstrap, confidence, n_blocks, interval, rng
        As in :func:`estimate_fidelity`.

    Returns
    -------
    FidelityReport
        ``settings["misread"]`` holds the misread-rate record
        (:meth:`~latticeread.core.misread.MisreadRates.to_dict`), ``settings["peak_shape"]``
        the peak model and ``settings["rates_given"]`` the rates the user set.
    """
    from latticeread.core.misread import misread_rates

    try:
        rates = misread_rates(amplitudes, thresholds=thresholds, camera=camera, peak_shape=peak_shape)
        problem = ()
    except FidelityError as exc:     # e.g. a frame without a threshold: estimate without misread rates
        rates, problem = None, (f"misread rates not estimated ({exc}): misreads are not corrected for",)
    given = {k: v for k, v in (("false_positive_rate", false_positive_rate),
                               ("false_negative_rate", false_negative_rate),
                               ("false_negative_uncertainty", false_negative_uncertainty)) if v is not None}
    fp = given.get("false_positive_rate", None if rates is None else rates.false_positive_rate)
    fn = given.get("false_negative_rate", None if rates is None else rates.false_negative_rate)
    if "false_negative_uncertainty" in given:
        sfn = given["false_negative_uncertainty"]
    elif "false_negative_rate" in given or rates is None:
        sfn = None
    else:
        sfn = rates.false_negative_uncertainty
        sfn = sfn if math.isfinite(sfn) else None
    histogram = None
    if rates is not None and math.isfinite(rates.false_positive_rate) and math.isfinite(rates.false_negative_rate):
        w = rates.filling
        misread = (1 - w) * rates.false_positive_rate + w * rates.false_negative_rate
        histogram = HistogramFidelity(threshold=rates.threshold, false_positive_rate=rates.false_positive_rate,
                                      false_negative_rate=rates.false_negative_rate, filling=w,
                                      misread_fraction=misread, fidelity=1 - misread)
    report = estimate_fidelity(
        occupations, false_positive_rate=fp, false_negative_rate=fn, false_negative_uncertainty=sfn,
        neighbour_radius=neighbour_radius, geometry=geometry, pair_loss=pair_loss, histogram=histogram,
        n_bootstrap=n_bootstrap, confidence=confidence, n_blocks=n_blocks, interval=interval, rng=rng)
    settings = dict(report.settings, misread=None if rates is None else rates.to_dict(),
                    peak_shape=None if rates is None else rates.peak_shape, rates_given=sorted(given))
    notes = problem if rates is None else tuple(f"misread rates: {w}" for w in rates.warnings)
    warnings = tuple(dict.fromkeys(report.warnings + notes))
    return dataclasses.replace(report, settings=settings, warnings=warnings)
