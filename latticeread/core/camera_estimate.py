"""Camera parameters from dark and flat frames: bias, read noise, gain, bad pixels.

Pure computation on arrays (the frames are read elsewhere).

Method
------
*Dark frames* (shutter closed, same exposure and read-out as the data) give the **bias**
(mean level, counts) and the **read noise** (temporal RMS, counts). The temporal noise is
taken from differences of frame pairs, ``var(A - B) / 2``, which removes any fixed pattern
(per-pixel offsets) that a plain standard deviation over the frame would add.

*Flat frames* (uniform illumination, several intensity levels, at least two frames per
level) give the **gain** from the photon-transfer (mean-variance) curve, the method of the
EMVA 1288 standard: for each level the mean signal above dark ``mu = mean(flat) - mean(dark)``
and the temporal variance above dark ``s2 = var(A - B) / 2 - var_dark`` (pair differences again
remove pixel-to-pixel gain and offset patterns). For shot-noise-limited light
``s2 = F^2 * K * mu`` where ``K`` is the system gain in counts per photoelectron and ``F^2`` the
excess noise factor squared (1 for sCMOS/CCD; ``2 - 1/G`` for an EMCCD of gain ``G``,
tending to 2 at high gain, Robbins & Hadwen 2003). ``K`` is the slope of a straight-line
fit through the origin over the levels below 70 % of the usable range (EMVA 1288 fits the
linear part of the curve).

For an EMCCD the slope measures ``G * c`` (EM gain times conversion gain) only; the split
needs the conversion gain ``c`` (counts per electron) from a photon-transfer run with the
EM gain off, or from the camera's data sheet.

All intensities are in camera counts (ADU); quantisation noise (1/12 count^2) is part of
the measured read noise, as in EMVA 1288.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from latticeread.core.camera import CameraModel
from latticeread.errors import FrameError

__all__ = [
    "DarkEstimate",
    "TransferPoint",
    "PhotonTransfer",
    "CameraEstimate",
    "estimate_dark",
    "photon_transfer",
    "estimate_camera",
    "bad_pixel_mask",
]

_MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4): MAD of a Gaussian in units of sigma


@dataclass(frozen=True)
class DarkEstimate:
    """Bias and read noise from dark frames.

    Attributes
    ----------
    bias : float
        Offset in counts (mean of the dark frames after removing outliers such as
        clock-induced-charge events or cosmic rays).
    read_noise : float
        Temporal RMS noise in counts (outliers removed).
    mean : float
        Plain mean of all dark pixels, counts (subtracted from flats).
    temporal_variance : float
        Plain temporal variance ``var(A - B) / 2`` of the dark frames, counts^2 (subtracted
        from flats, since the same dark events occur there).
    fixed_pattern_noise : float
        RMS over pixels of the per-pixel mean dark level, counts (offset non-uniformity,
        corrected for the temporal noise left in the mean).
    outlier_fraction : float
        Fraction of difference values beyond the clipping limit (dark events).
    n_frames, n_pixels : int
    bias_map : (H, W) ndarray
        Per-pixel mean dark level, counts.
    warnings : tuple of str
    """

    bias: float
    read_noise: float
    mean: float
    temporal_variance: float
    fixed_pattern_noise: float
    outlier_fraction: float
    n_frames: int
    n_pixels: int
    bias_map: np.ndarray = field(repr=False, compare=False)
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class TransferPoint:
    """One level of the photon-transfer curve.

    Attributes
    ----------
    mean : float
        Mean signal above the dark level, counts.
    variance : float
        Temporal variance above the dark variance, counts^2.
    n_frames : int
    used : bool
        Whether the level entered the gain fit (below 70 % of the usable range).
    """

    mean: float
    variance: float
    n_frames: int
    used: bool


@dataclass(frozen=True)
class PhotonTransfer:
    """Result of the mean-variance (photon transfer) fit.

    Attributes
    ----------
    slope : float
        d(variance)/d(mean), counts per electron including the excess noise factor squared.
    system_gain : float
        Counts per photoelectron, ``slope / F^2`` (EM gain included for an EMCCD).
    excess_noise_factor_squared : float
        ``F^2`` used (1 for sCMOS; ``2 - 1/G`` for an EMCCD).
    slope_relative_error : float
        1-sigma relative uncertainty of the slope (from the fit residuals with >= 3 levels,
        otherwise from the number of pixel pairs).
    nonlinearity : float
        Largest relative deviation of a used level from the fitted line.
    points : tuple of TransferPoint
    warnings : tuple of str
    """

    slope: float
    system_gain: float
    excess_noise_factor_squared: float
    slope_relative_error: float
    nonlinearity: float
    points: tuple[TransferPoint, ...]
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class CameraEstimate:
    """A camera description measured from dark and flat frames.

    Attributes
    ----------
    camera : CameraModel
        Ready for a calibration (bias and read noise in counts, gains).
    dark : DarkEstimate
    transfer : PhotonTransfer or None
        None when no flat frames were given (gain then taken from the arguments).
    warnings : tuple of str
    """

    camera: CameraModel
    dark: DarkEstimate
    transfer: PhotonTransfer | None
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        """Plain-dict summary: camera fields plus the measurement diagnostics."""
        d = {"camera": self.camera.to_dict(),
             "dark": {k: getattr(self.dark, k) for k in ("bias", "read_noise", "mean", "temporal_variance",
                                                          "fixed_pattern_noise", "outlier_fraction", "n_frames",
                                                          "n_pixels")},
             "warnings": list(self.warnings)}
        if self.transfer is not None:
            t = self.transfer
            d["photon_transfer"] = {
                "slope": t.slope, "system_gain": t.system_gain,
                "excess_noise_factor_squared": t.excess_noise_factor_squared,
                "slope_relative_error": t.slope_relative_error, "nonlinearity": t.nonlinearity,
                "points": [{"mean": p.mean, "variance": p.variance, "n_frames": p.n_frames, "used": p.used}
                           for p in t.points],
                "units": {"mean": "counts above dark", "variance": "counts^2 above dark",
                          "system_gain": "counts per photoelectron"},
            }
        return d


def _as_stack(frames, what: str) -> np.ndarray:
    arr = np.asarray(frames)
    if arr.ndim != 3:
        raise FrameError(f"{what} must be a stack of frames (n x height x width), got shape {arr.shape}")
    if arr.dtype.kind not in "uif":
        raise FrameError(f"{what} must hold numbers, got data type {arr.dtype}")
    if arr.shape[0] < 2:
        raise FrameError(f"{what}: at least two frames are needed to separate temporal noise from the "
                         f"fixed pattern, got {arr.shape[0]}")
    arr = arr.astype(np.float64, copy=False)
    if not np.isfinite(arr).all():
        raise FrameError(f"{what} contain NaN or infinite pixels")
    return arr


def _pair_differences(stack: np.ndarray) -> np.ndarray:
    n = stack.shape[0] // 2 * 2
    return stack[0:n:2] - stack[1:n:2]


def _clipped_std(values: np.ndarray, n_sigma: float, n_iter: int = 10) -> tuple[float, float, float]:
    """Mean and standard deviation of ``values`` after iterative n-sigma clipping; fraction clipped."""
    v = values.ravel()
    centre = float(np.median(v))
    sigma = _MAD_TO_SIGMA * float(np.median(np.abs(v - centre)))
    keep = np.ones(v.shape, bool)
    for _ in range(n_iter):
        if sigma == 0:
            break
        new = np.abs(v - centre) <= n_sigma * sigma
        if np.array_equal(new, keep):
            break
        keep = new
        centre, sigma = float(v[keep].mean()), float(v[keep].std())
    if sigma == 0 or keep.all():
        centre, sigma = float(v[keep].mean()), float(v[keep].std())
    return centre, sigma, 1.0 - keep.mean()


def estimate_dark(dark_frames, *, clip_sigma: float = 5.0) -> DarkEstimate:
    """Bias and read noise from a stack of dark frames.

    Parameters
    ----------
    dark_frames : (N, H, W) array_like
        At least two dark frames in counts (N even is best; an odd last frame only enters
        the bias).
    clip_sigma : float
        Values of the pair differences farther than this many standard deviations from
        the centre are treated as dark events (clock-induced charge, cosmic rays) and left
        out of the read noise and bias. At 5 sigma a Gaussian loses 6e-7 of its values
        and its clipped RMS is low by less than 1e-4.

    Returns
    -------
    DarkEstimate
        Counts and counts^2.

    Raises
    ------
    FrameError
        Fewer than two frames, not a 3-D stack, NaN/inf pixels.
    """
    stack = _as_stack(dark_frames, "dark frames")
    diffs = _pair_differences(stack)
    _, sigma_d, outliers = _clipped_std(diffs, clip_sigma)
    read_noise = sigma_d / np.sqrt(2.0)
    bias_map = stack.mean(axis=0)
    # bias: mean of the frames without the dark events found in the differences
    bias, _, _ = _clipped_std(stack, clip_sigma)
    temporal_var = float(diffs.var() / 2.0)
    n = stack.shape[0]
    fpn2 = float(bias_map.var()) - temporal_var / n
    warnings = []
    if read_noise == 0:
        warnings.append("the dark frames have no temporal noise: are they copies of one frame?")
    if outliers > 0.05:
        warnings.append(f"{100 * outliers:.1f}% of dark pixel differences are outliers (light leak, "
                        "clock-induced charge or cosmic rays): check that the shutter was closed")
    return DarkEstimate(bias=float(bias), read_noise=float(read_noise), mean=float(stack.mean()),
                        temporal_variance=temporal_var, fixed_pattern_noise=float(np.sqrt(max(fpn2, 0.0))),
                        outlier_fraction=float(outliers), n_frames=n, n_pixels=int(stack[0].size),
                        bias_map=bias_map, warnings=tuple(warnings))


def photon_transfer(flat_levels, *, dark: DarkEstimate, saturation: float = 65535.0,
                    linear_fraction: float = 0.7) -> list[TransferPoint]:
    """Mean and temporal variance above dark for each illumination level.

    Parameters
    ----------
    flat_levels : sequence of (N_i, H, W) array_like
        One stack per illumination level, at least two frames each, counts.
    dark : DarkEstimate
        From :func:`estimate_dark` with the same exposure and read-out.
    saturation : float
        Largest value the camera outputs, counts.
    linear_fraction : float
        Levels whose mean exceeds this fraction of ``saturation - bias`` (or that contain
        saturated pixels) are reported but not used for the gain (EMVA 1288 fits up to
        70 % of saturation).

    Returns
    -------
    list of TransferPoint
    """
    points = []
    usable = linear_fraction * (saturation - dark.bias)
    for k, level in enumerate(flat_levels):
        stack = _as_stack(level, f"flat level {k}")
        if stack.shape[1:] != dark.bias_map.shape:
            raise FrameError(f"flat level {k} frames are {stack.shape[1]}x{stack.shape[2]} pixels but the dark "
                             f"frames are {dark.bias_map.shape[0]}x{dark.bias_map.shape[1]}")
        mean = float(stack.mean()) - dark.mean
        var = float(_pair_differences(stack).var() / 2.0) - dark.temporal_variance
        used = bool(mean < usable and not (stack >= saturation).any() and mean > 0)
        points.append(TransferPoint(mean=mean, variance=var, n_frames=int(stack.shape[0]), used=used))
    return points


def _fit_slope(points: list[TransferPoint], n_pairs_pixels: float) -> tuple[float, float, float]:
    x = np.array([p.mean for p in points if p.used])
    y = np.array([p.variance for p in points if p.used])
    slope = float(x @ y / (x @ x))
    resid = y - slope * x
    nonlin = float(np.max(np.abs(resid) / (slope * x)))
    if x.size >= 3:
        s2 = float(resid @ resid / (x.size - 1))
        rel = float(np.sqrt(s2 / (x @ x)) / slope)
    else:
        # variance of a variance estimate from M Gaussian samples: 2 sigma^4 / M
        rel = float(np.sqrt(2.0 / max(n_pairs_pixels, 1.0)))
    return slope, rel, nonlin


def estimate_camera(dark_frames, flat_levels=(), *, kind: str = "scmos", counts_per_electron: float | None = None,
                    em_gain: float | None = None, quantum_efficiency: float = 1.0, saturation: int = 65535,
                    clock_induced_charge: float = 0.0, clip_sigma: float = 5.0) -> CameraEstimate:
    """Measure a camera: bias and read noise from darks, gain from the photon-transfer curve.

    Parameters
    ----------
    dark_frames : (N, H, W) array_like
        Dark frames, counts.
    flat_levels : sequence of (N_i, H, W) array_like, optional
        Uniformly illuminated frames, one stack per intensity level (two frames or more
        each). Without flats the gain comes from ``counts_per_electron``/``em_gain``.
    kind : {"scmos", "emccd"}
        sCMOS/CCD (no excess noise) or EMCCD (excess noise factor^2 = 2 - 1/G).
    counts_per_electron : float, optional
        Conversion gain of the read-out (counts per electron after multiplication). For an
        EMCCD it splits the measured ``G * c`` into EM gain and conversion gain; for sCMOS
        it is what the flats measure (given here only when there are no flats).
    em_gain : float, optional
        EMCCD only, used when there are no flats or no ``counts_per_electron``.
    quantum_efficiency : float
        Photoelectrons per photon (from the data sheet; not measurable without a
        calibrated light source).
    saturation : int
        Largest output value, counts.
    clock_induced_charge : float
        Spurious electrons per pixel per frame (EMCCD), copied into the model.
    clip_sigma : float
        See :func:`estimate_dark`.

    Returns
    -------
    CameraEstimate

    Raises
    ------
    FrameError
        Bad frame stacks, no usable flat level, or a non-positive measured gain.
    """
    if kind not in ("scmos", "emccd"):
        raise ValueError(f"camera kind must be 'scmos' or 'emccd', got {kind!r}")
    dark = estimate_dark(dark_frames, clip_sigma=clip_sigma)
    warnings = list(dark.warnings)
    transfer = None
    if len(flat_levels) == 0:
        c = 1.0 if counts_per_electron is None else float(counts_per_electron)
        g = 1.0 if kind == "scmos" else (1.0 if em_gain is None else float(em_gain))
        warnings.append("no flat frames: the gain was not measured")
    else:
        points = photon_transfer(flat_levels, dark=dark, saturation=saturation)
        if not any(p.used for p in points):
            raise FrameError("no flat level is usable for the gain: every level is saturated, brighter than 70% "
                             "of the range, or not brighter than the darks")
        n_pairs = sum(p.n_frames // 2 for p in points if p.used) * dark.n_pixels
        slope, rel, nonlin = _fit_slope(points, n_pairs)
        if not (np.isfinite(slope) and slope > 0):
            raise FrameError(f"the photon-transfer slope is {slope:.3g} counts per electron; the flats are not "
                             "brighter or noisier than the darks")
        t_warn = []
        n_used = sum(p.used for p in points)
        if n_used < 2:
            t_warn.append("only one usable flat level: linearity of the photon-transfer curve not checked")
        if n_used >= 2 and nonlin > 0.05:
            t_warn.append(f"the photon-transfer curve deviates {100 * nonlin:.1f}% from a straight line "
                          "(nonlinear camera, unstable light or saturation)")
        if kind == "scmos":
            f2 = 1.0
            c, g = slope, 1.0
        else:
            if counts_per_electron is None:
                # F^2 -> 2 at high gain; without c the EM gain cannot be separated
                f2 = 2.0
                g_total = slope / f2
                if em_gain is None:
                    raise FrameError(
                        f"an EMCCD's photon-transfer slope gives EM gain x conversion gain = {g_total:.4g} counts "
                        "per electron; give the conversion gain (counts_per_electron / --counts-per-electron, from "
                        "a photon-transfer run with the EM gain off or the data sheet) or the EM gain "
                        "(em_gain / --em-gain) to split them")
                g = float(em_gain)
                f2 = 2.0 - 1.0 / g
                c = slope / f2 / g
            else:
                c = float(counts_per_electron)
                g = slope / 2.0 / c
                for _ in range(50):  # F^2 = 2 - 1/G depends on G itself
                    f2 = 2.0 - 1.0 / max(g, 1.0)
                    g_new = slope / f2 / c
                    if abs(g_new - g) < 1e-12 * g:
                        break
                    g = g_new
                g = g_new
                f2 = 2.0 - 1.0 / max(g, 1.0)
                if g < 1.5:
                    t_warn.append(f"measured EM gain {g:.3g} is close to 1: is the EM gain switched on?")
        transfer = PhotonTransfer(slope=slope, system_gain=slope / f2, excess_noise_factor_squared=f2,
                                  slope_relative_error=rel, nonlinearity=nonlin, points=tuple(points),
                                  warnings=tuple(t_warn))
        warnings += t_warn
    camera = CameraModel(kind=kind, em_gain=g, counts_per_electron=c, bias=dark.bias, read_noise=dark.read_noise,
                         quantum_efficiency=quantum_efficiency, clock_induced_charge=clock_induced_charge,
                         saturation=int(saturation))
    return CameraEstimate(camera=camera, dark=dark, transfer=transfer, warnings=tuple(warnings))


def bad_pixel_mask(dark_frames, *, n_sigma: float = 6.0) -> np.ndarray:
    """Hot, cold, stuck and noisy pixels and dead columns from dark frames.

    Parameters
    ----------
    dark_frames : (N, H, W) array_like
        At least two dark frames, counts.
    n_sigma : float
        A pixel is bad when its mean dark level or its temporal noise lies more than
        ``n_sigma`` robust standard deviations (1.4826 x median absolute deviation) from
        the median over all pixels; a column is bad when its mean level does.

    Returns
    -------
    (H, W) ndarray of bool
        True for bad pixels.
    """
    stack = _as_stack(dark_frames, "dark frames")
    mean = stack.mean(axis=0)
    noise = stack.std(axis=0)

    def outliers(values):
        centre = np.median(values)
        spread = _MAD_TO_SIGMA * np.median(np.abs(values - centre))
        if spread == 0:
            return values != centre
        return np.abs(values - centre) > n_sigma * spread

    bad = outliers(mean) | outliers(noise)
    if np.median(noise) > 0:
        bad |= noise == 0  # stuck pixels never change
    col_bad = outliers(np.median(mean, axis=0))
    bad[:, col_bad] = True
    return bad
