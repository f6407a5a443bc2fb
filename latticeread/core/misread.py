"""Misread rates of a set of frames: the one computation every fidelity estimate starts from.

A loss and hopping estimate must be corrected for sites read wrongly: empty sites read as
occupied (false positives) and atoms read as empty (false negatives). :func:`misread_rates`
derives both rates from the site amplitudes of the frames the estimate uses, in one way for
every front end (the window, ``batch`` and the ``fidelity`` command, also on ``watch`` run files):

1. **One pooled histogram fit.** The finite amplitudes of all frames are pooled and two peaks
   are fitted once (:func:`latticeread.core.classify.select_threshold`). Pooling gives the
   tails, which set the rates, the most sites; a fit per frame has fewer and scatters.
2. **The peak shape of the camera.** On an EMCCD the multiplied background noise makes the
   empty peak skewed to the right, and normal peaks then underestimate the false-positive
   rate several times; :func:`peak_shape_for` picks ``"skewed"`` for an EMCCD and
   ``"normal"`` otherwise (sCMOS, or no camera model).
3. **The thresholds that were really applied.** The rates are the fitted peaks' tail
   probabilities at the threshold each frame was classified with (one fixed threshold, a
   pooled one, or one per frame), averaged over frames weighted by their number of sites.

Limits: the rates describe a histogram of static sites. Atoms lost or hopping during an
exposure shine for part of it and fill the gap between the peaks; skewed peaks then take
part of that gap as an empty-peak tail (on a 900-photon demo pair with 3 % loss and 1 %
hopping, skewed peaks gave 0.67 % false positives where the truth had 14 of 8,897 empty
sites read occupied, 0.16 %; normal peaks gave 1e-11). That is why the fidelity estimate
fits the false-positive rate from the images themselves and only compares it with this one.

The uncertainty of the false-negative rate is its binomial standard error
``sqrt(FN (1 - FN) / N_atoms)`` with ``N_atoms`` the fitted number of occupied sites
(common practice, no source); it leaves out the uncertainty of the peak shape itself.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from latticeread.core.classify import ThresholdResult, select_threshold
from latticeread.errors import FidelityError

__all__ = ["MisreadRates", "PEAK_SHAPES", "peak_shape_for", "misread_rates"]

log = logging.getLogger(__name__)

PEAK_SHAPES = ("normal", "skewed")


def peak_shape_for(camera) -> str:
    """Histogram peak shape that describes a camera's amplitudes.

    Parameters
    ----------
    camera : CameraModel or None
        Camera model of the frames.

    Returns
    -------
    str
        ``"skewed"`` for an EMCCD (multiplied noise with a heavy right tail; Robbins &
        Hadwen, IEEE Trans. Electron Devices 50, 1227 (2003)), ``"normal"`` for an sCMOS
        camera or when no camera model is known.
    """
    kind = str(getattr(camera, "kind", "") or "").lower()
    return "skewed" if kind == "emccd" else "normal"


@dataclass(frozen=True)
class MisreadRates:
    """False-positive and false-negative rates of a set of frames and how they were found.

    Attributes
    ----------
    false_positive_rate : float
        P(empty site read occupied) per site and image (NaN when the histogram has one peak).
    false_negative_rate : float
        P(atom read empty) per atom and image (NaN when the histogram has one peak).
    false_negative_uncertainty : float
        Binomial standard error of the false-negative rate (see the module notes).
    peak_shape : str
        ``"normal"`` or ``"skewed"``: the peak model the rates come from.
    threshold : float
        Mean threshold over the frames, photons (site-weighted).
    n_thresholds : int
        Number of distinct thresholds applied (1 for a fixed or pooled threshold).
    filling : float
        Fitted fraction of occupied sites.
    n_frames, n_sites : int
        Frames and finite site amplitudes pooled.
    fit : ThresholdResult
        The pooled histogram fit.
    warnings : tuple of str
        Reasons why the rates may mislead.
    """

    false_positive_rate: float
    false_negative_rate: float
    false_negative_uncertainty: float
    peak_shape: str
    threshold: float
    n_thresholds: int
    filling: float
    n_frames: int
    n_sites: int
    fit: ThresholdResult
    warnings: tuple = ()

    @property
    def method(self) -> str:
        """One line saying how the rates were obtained."""
        at = "one threshold" if self.n_thresholds == 1 else f"{self.n_thresholds} per-frame thresholds"
        return (f"pooled histogram fit of {self.n_sites} site amplitudes in {self.n_frames} frames, "
                f"{self.peak_shape} peaks, rates at {at}")

    def to_dict(self) -> dict:
        """JSON-ready dictionary (NaN written as null)."""
        def num(x):
            x = float(x)
            return x if math.isfinite(x) else None

        return {"false_positive_rate": num(self.false_positive_rate),
                "false_negative_rate": num(self.false_negative_rate),
                "false_negative_uncertainty": num(self.false_negative_uncertainty),
                "peak_shape": self.peak_shape, "threshold": num(self.threshold),
                "n_thresholds": int(self.n_thresholds), "filling": num(self.filling),
                "n_frames": int(self.n_frames), "n_sites": int(self.n_sites), "method": self.method,
                "fit": self.fit.to_dict(), "warnings": list(self.warnings)}


def misread_rates(amplitudes, *, thresholds, camera=None, peak_shape: str | None = None,
                  threshold_method: str = "mixture") -> MisreadRates:
    """False-positive and false-negative rates of frames from one pooled histogram fit.

    Parameters
    ----------
    amplitudes : (n_frames, ...) array_like of float, or sequence of arrays
        Site amplitudes of every frame, photons (NaN where a site was not read out): site
        vectors or matrices, one per frame (frames may hold different numbers of sites).
    thresholds : float or (n_frames,) array_like of float
        Threshold each frame was classified with, photons.
    camera : CameraModel, optional
        Camera of the frames: sets the default peak shape and the noise floor of the fit.
    peak_shape : {"normal", "skewed"}, optional
        Override of the camera's peak shape (:func:`peak_shape_for`).
    threshold_method : str, optional
        Method of the pooled fit (only its peaks are used; the rates are read at
        ``thresholds``).

    Returns
    -------
    MisreadRates

    Raises
    ------
    FidelityError
        No frames, thresholds that do not match the frames or are not finite, an unknown
        peak shape, or fewer than 3 finite amplitudes.
    """
    shape = peak_shape_for(camera) if peak_shape is None else peak_shape
    if shape not in PEAK_SHAPES:
        raise FidelityError(f"unknown peak shape {peak_shape!r}; use one of {', '.join(PEAK_SHAPES)}")
    frames = [np.asarray(a, dtype=float).ravel() for a in amplitudes]
    if not frames:
        raise FidelityError("misread rates need the site amplitudes of at least one frame")
    n_frames = len(frames)
    t = np.asarray(thresholds, dtype=float)
    if t.ndim == 0:
        t = np.full(n_frames, float(t))
    t = t.ravel()
    if t.size != n_frames:
        raise FidelityError(f"{t.size} thresholds were given for {n_frames} frames; give one per frame or one for all")
    if not np.all(np.isfinite(t)):
        raise FidelityError("every frame needs a finite threshold (photons) to compute its misread rates")
    pooled = np.concatenate([a[np.isfinite(a)] for a in frames])
    if pooled.size < 3:
        raise FidelityError(f"only {pooled.size} finite site amplitudes: misread rates cannot be estimated")
    # atoms lost during an image are losses to count, not misreads: the two-peak fit alone
    fit = select_threshold(pooled, method=threshold_method, camera=camera, peak_shape=shape, exposure_loss=False)
    warnings = list(fit.warnings)
    used = "skewed" if fit.is_skewed else "normal"
    if shape == "skewed" and used != "skewed":
        warnings.append("skewed peaks could not be fitted; the misread rates come from normal peaks, "
                        "which underestimate false positives on EMCCD frames")
    weights = np.array([np.count_nonzero(np.isfinite(a)) for a in frames], float)
    if weights.sum() == 0:
        weights = np.ones(n_frames)
    levels, index = np.unique(t, return_inverse=True)
    rates = np.array([[r.false_positive_rate, r.false_negative_rate]
                      for r in (fit.with_threshold(float(v)) for v in levels)], float).reshape(-1, 2)
    per_frame = rates[index]
    fp = float(np.average(per_frame[:, 0], weights=weights))
    fn = float(np.average(per_frame[:, 1], weights=weights))
    n_atoms = fit.occupied_fraction * pooled.size
    s_fn = math.sqrt(fn * (1 - fn) / n_atoms) if math.isfinite(fn) and n_atoms >= 1 else float("nan")
    if not (math.isfinite(fp) and math.isfinite(fn)):
        warnings.append("the pooled amplitude histogram does not show two peaks: misread rates unknown")
    log.debug("misread rates: FP %.3g FN %.3g (%s peaks, %d frames)", fp, fn, used, n_frames)
    return MisreadRates(false_positive_rate=fp, false_negative_rate=fn, false_negative_uncertainty=s_fn,
                        peak_shape=used, threshold=float(np.average(t, weights=weights)),
                        n_thresholds=int(levels.size), filling=float(fit.occupied_fraction), n_frames=n_frames,
                        n_sites=int(pooled.size), fit=fit, warnings=tuple(dict.fromkeys(warnings)))
