"""Recover the lattice geometry (two primitive vectors and the offset) from camera frames.

Method
------
1. **Prepare**: a 2-D frame or a stack of frames; non-finite pixels replaced by the median
   (with a warning); saturation and constant frames detected.
2. **Sharpen**: the background level (5th percentile) is subtracted and the positive part is
   squared. Squaring narrows every atom's spot (a Gaussian spot of width sigma becomes one of
   width sigma/sqrt(2)), so the lattice's Fourier peaks survive when the point-spread function
   (PSF) is as wide as the lattice spacing, where the peaks of the raw image fade into the noise.
   Each spot stays symmetric about its site, so the Fourier phase still marks the site centre.
   A stack is sharpened frame by frame and then summed.
3. **Coarse peaks**: Hann window, FFT, magnitude divided by the geometric mean of its frequency
   shell (a radial background), local maxima above :data:`DETECTION_RATIO`. The strongest
   peak and the strongest one not collinear with it give the reciprocal vectors b1, b2,
   interpolated to a fraction of a frequency bin (Gaussian fit over three bins).
4. **Refinement (phase slope)**: the complex amplitude at each b is measured on a grid of
   overlapping tiles. A frequency error ``delta`` makes the phase drift linearly across the
   frame, ``phase(r) = const - 2 pi delta . r``; a weighted least-squares plane fit to the tile
   phases gives ``delta``, repeated until it vanishes. Unlike the peak position, the phase does
   not depend on the PSF's attenuation of the peak or on which sites happen to be filled, so
   every atom in the frame contributes.
5. **Real space**: ``a_i . b_j = delta_ij``; the basis is reduced and ordered by the rule of
   :func:`canonical_basis`, and the offset comes from the phases of the amplitudes at b1, b2.
6. **Bright-site fit**: the Gaussian-weighted centroid of the sharpened image is measured at
   every site; the bright (occupied) sites enter a linear least-squares fit of the offset and
   both vectors (site displacement = d_offset + row d_a1 + col d_a2), iterated to its fixed
   point. This uses each atom's position directly and roughly halves the errors of step 4
   when the PSF is as wide as the spacing. If it strays from the Fourier result (vectors by
   more than 1 %, offset by more than a quarter site) the Fourier result is kept, with a
   warning.

Conventions
-----------
* Vectors and positions are ``(x, y)`` pixels, x = column, y = row (down), centre of pixel
  (0, 0) at (0, 0); site ``(row, col)`` is at ``offset + row * a1 + col * a2``.
* Basis order and signs: see :func:`canonical_basis` (a2 is the short lattice vector closest
  to +x, a1 the one that follows it towards +y), so the occupation matrix is oriented like the
  image.
* Offset: :func:`estimate_lattice` returns the site nearest ``origin`` (default: the frame
  centre) as site (0, 0); :func:`refine_phase` returns the lattice translate nearest the
  reference offset, so site indices stay the same from frame to frame while the lattice drifts
  by less than half a spacing between frames.

Limits
------
The lattice must be visible in the Fourier transform of the sharpened image. Measured with the
forward model (bench/bench_lattice.py: 512x512 frames, ~52x52 sites, filling 0.3, 500 photons
per atom, largest error over 8 seeds):

=============  ==================  =========  ============  ===================
spacing/FWHM   found (Gauss/Airy)  spacing    angle (mrad)  offset (spacings)
=============  ==================  =========  ============  ===================
<= 0.8         no / no             --         --            --
0.9            yes / no            7e-4       0.9           0.010
1.0            yes / yes           4-6e-4     0.5-0.8       0.006-0.009
1.2            yes / yes           2.2e-4     0.2           0.005
1.5            yes / yes           1.7e-4     0.1           0.003
=============  ==================  =========  ============  ===================

With an ideal Airy PSF the image holds no lattice frequency at all when the spacing is below
lambda / (2 NA) = 0.97 FWHM (the incoherent cut-off); only the sharpened image shows it a
little above. Random filling makes the spectral background a speckle whose level grows as the
square root of the number of atoms, so a frame (or the sum of a stack) needs roughly 150 atoms
or more for the peaks to clear :data:`DETECTION_RATIO`. A perfect checkerboard or stripe
pattern *is* a lattice with a larger cell; pass ``spacing_hint`` to pick the fine lattice.
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view
from scipy import ndimage

from latticeread.core._fourier import tile_amplitudes, tile_layout
from latticeread.core.geometry import LatticeGeometry, LatticeQuality, lattice_sites
from latticeread.errors import FrameError, LatticeNotFound, LatticeReadWarning

__all__ = [
    "estimate_lattice",
    "refine_phase",
    "phase_drift",
    "PhaseDrift",
    "canonical_basis",
    "canonical_geometry",
    "offset_error",
    "DETECTION_RATIO",
    "MIN_SITES_ACROSS",
]

log = logging.getLogger(__name__)

#: A Fourier peak counts when its magnitude exceeds this multiple of the geometric mean of its
#: frequency shell. For pure noise the magnitude is Rayleigh distributed; exceeding 6x the
#: shell's geometric mean has probability ~1e-9 per bin (about 1e-3 false peaks per 512^2 frame).
DETECTION_RATIO = 6.0
#: A peak at one of the four half-vectors of the chosen reciprocal basis is accepted above this
#: lower ratio (only 4 x 9 bins are examined: ~4e-4 false alarms per frame).
SUBHARMONIC_RATIO = 4.5
#: Below this peak-to-background ratio the estimate carries a warning.
WEAK_RATIO = 10.0
#: The frame must hold at least this many sites along each lattice direction.
MIN_SITES_ACROSS = 8
#: Fewer bright sites than this add a warning to the quality.
MIN_BRIGHT_SITES = 20
_SMALLEST_FRAME = 16
_SHORT_TOLERANCE = 0.03  # relative length tolerance when collecting equally short vectors


# --------------------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------------------
def _prepare(image, *, allow_stack: bool, what: str = "frame") -> tuple[np.ndarray, list[str]]:
    """Validate and convert to float64 (2-D, or 3-D for a stack); return it and input warnings."""
    arr = np.asarray(image)
    notes: list[str] = []
    if arr.dtype == object or np.iscomplexobj(arr) or arr.dtype.kind not in "biuf":
        raise FrameError(f"the {what} must hold real pixel values, got dtype {arr.dtype}")
    expected = "a 2-D frame (height, width)" + (" or a 3-D stack (frames, height, width)" if allow_stack else "")
    if arr.ndim == 3 and not allow_stack:
        raise FrameError(f"expected {expected}, got a 3-D stack of shape {arr.shape}; "
                         f"pass one frame at a time")
    if arr.ndim not in ((2, 3) if allow_stack else (2,)):
        raise FrameError(f"expected {expected}, got an array of shape {arr.shape}")
    if arr.size == 0:
        raise FrameError(f"the {what} is empty (shape {arr.shape})")
    height, width = arr.shape[-2:]
    if min(height, width) < _SMALLEST_FRAME:
        raise FrameError(f"the {what} is {height}x{width} pixels: too small to hold a lattice of at least "
                         f"{MIN_SITES_ACROSS} sites across (need at least {_SMALLEST_FRAME}x{_SMALLEST_FRAME})")
    arr = arr.astype(np.float64, copy=False)
    finite = np.isfinite(arr)
    if not finite.all():
        if not finite.any():
            raise FrameError(f"every pixel of the {what} is NaN or infinite")
        n_bad = int(arr.size - np.count_nonzero(finite))
        arr = np.where(finite, arr, np.median(arr[finite]))
        notes.append(f"{n_bad} non-finite pixel(s) were replaced by the median value")
    lo, hi = float(arr.min()), float(arr.max())
    if hi == lo:
        raise LatticeNotFound(f"the {what} is constant (every pixel = {hi:g}): it holds no atoms and no lattice")
    n_top = int(np.count_nonzero(arr == hi))
    if n_top > 0.5 * arr.size:
        raise FrameError(f"{100.0 * n_top / arr.size:.0f}% of the pixels sit at the maximum value {hi:g}: "
                         f"the {what} is saturated")
    if n_top >= 10 and n_top > 1e-3 * arr.size:
        notes.append(f"{n_top} pixels sit at the maximum value {hi:g}: saturated? "
                     "Site centres under saturated atoms are less precise")
    return arr, notes


def _check_mask(mask, shape) -> np.ndarray | None:
    if mask is None:
        return None
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != tuple(shape):
        raise FrameError(f"the mask is {mask.shape[0]}x{mask.shape[1]} but the frame is {shape[0]}x{shape[1]}"
                         if mask.ndim == 2 else f"the mask must be 2-D like the frame, got shape {mask.shape}")
    if mask.sum() < _SMALLEST_FRAME ** 2:
        raise FrameError(f"the mask keeps only {int(mask.sum())} pixels: too few to find a lattice")
    return mask


def _sharpen(image: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    """Background-subtracted, squared image (dimensionless, order 1).

    ``((image - p5) / (p99.9 - p5))`` clipped to [0, 2], then squared (p5, p99.9: percentiles
    of the frame). The upper clip keeps a few hot pixels or cosmic-ray hits, which squaring
    would turn into a flat spectral floor above the lattice peaks, from hiding the lattice.
    """
    step = max(1, min(image.shape) // 256)
    sample = image[::step, ::step] if mask is None else image[mask]
    lo, hi = np.percentile(sample, [5.0, 99.9])
    if hi <= lo:
        hi = float(image.max())
    scale = hi - lo if hi > lo else 1.0
    out = np.clip((image - lo) / scale, 0.0, 2.0)
    out *= out
    if mask is not None:
        out[~mask] = 0.0
    return out


# --------------------------------------------------------------------------------------
# basis conventions
# --------------------------------------------------------------------------------------
def _cross(u, v) -> float:
    return float(u[0] * v[1] - u[1] * v[0])


def _gauss_reduce(u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lagrange-Gauss reduction: |u| <= |v| and |u.v| <= |u|^2 / 2 (same lattice)."""
    u, v = np.array(u, float), np.array(v, float)
    for _ in range(100):
        if u @ u > v @ v:
            u, v = v, u
        m = round(float(u @ v) / float(u @ u))
        if m == 0:
            break
        v = v - m * u
    if u @ u > v @ v:
        u, v = v, u
    return u, v


def canonical_basis(a1, a2) -> tuple[tuple[float, float], tuple[float, float]]:
    """The documented primitive basis of the lattice spanned by ``a1`` and ``a2``.

    The same lattice always gives the same pair (up to the discontinuities named below), so
    two estimates of one lattice can be compared vector by vector.

    Rule
    ----
    1. Reduce the basis (Lagrange-Gauss): ``u`` is a shortest lattice vector, ``v`` the
       shortest one not collinear with it.
    2. Collect the "short" vectors: +-u, +-v, and +-(u+v), +-(u-v) when they are no more than
       3 % longer than ``v`` (they are for triangular lattices, which have six).
    3. ``a2`` is the short vector whose direction is closest to +x (angle from +x towards +y
       in image coordinates). The choice flips where two short vectors are equally close to
       +x: at 45 degrees for a square lattice, 30 degrees for a triangular one.
    4. ``a1`` is the short vector that follows ``a2`` counter-clockwise on screen
       (``a2_x a1_y - a2_y a1_x > 0``, i.e. towards +y when ``a2`` is along +x); among several
       (triangular lattices) the one making the smallest angle with ``a2``.

    With this rule a square lattice aligned with the camera gives ``a2 = (a, 0)`` and
    ``a1 = (0, a)``: the occupation matrix (row along a1, column along a2) looks like the image.

    Parameters
    ----------
    a1, a2 : (2,) array_like
        Any basis of the lattice, ``(x, y)`` pixels.

    Returns
    -------
    a1, a2 : tuple of float
        The canonical basis, ``(x, y)`` pixels.
    """
    u, v = _gauss_reduce(np.asarray(a1, float), np.asarray(a2, float))
    if abs(_cross(u, v)) < 1e-12 * (u @ u + v @ v):
        raise ValueError(f"lattice vectors {tuple(a1)} and {tuple(a2)} are collinear")
    limit = math.sqrt(v @ v) * (1.0 + _SHORT_TOLERANCE)
    short = [u, -u, v, -v]
    for w in (u + v, u - v):
        if math.sqrt(w @ w) <= limit:
            short += [w, -w]
    angles = [abs(math.atan2(s[1], s[0])) for s in short]
    b2 = short[int(np.argmin(angles))]
    best, best_cos = None, -2.0
    for s in short:
        if _cross(b2, s) <= 1e-12 * (b2 @ b2):
            continue
        c = float(s @ b2) / math.sqrt((s @ s) * (b2 @ b2))
        if c > best_cos + 1e-12:
            best, best_cos = s, c
    return (float(best[0]), float(best[1])), (float(b2[0]), float(b2[1]))


def canonical_geometry(geometry: LatticeGeometry) -> LatticeGeometry:
    """The same lattice (same sites) with its basis in the :func:`canonical_basis` form."""
    a1, a2 = canonical_basis(geometry.a1, geometry.a2)
    return LatticeGeometry(a1=a1, a2=a2, offset=geometry.offset, quality=geometry.quality)


def offset_error(geometry: LatticeGeometry, reference: LatticeGeometry) -> float:
    """Distance in pixels between the site grids of two geometries, ignoring which site is (0, 0).

    Uses the vectors of ``geometry``; the offset difference is reduced modulo the lattice.
    """
    d = np.subtract(geometry.offset, reference.offset)
    frac = geometry.reciprocal @ d
    frac -= np.rint(frac)
    return float(np.linalg.norm(geometry.basis @ frac))


# --------------------------------------------------------------------------------------
# Fourier peak search
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Peak:
    k: np.ndarray  # (kx, ky) cycles per pixel
    ratio: float


def _fft_peaks(sharp: np.ndarray, *, kmin: float, kmax: float):
    """Significant local maxima of the windowed spectrum (half plane), strongest first.

    Returns the peaks, the largest ratio seen, and a function giving the peak-to-background
    ratio near any frequency ``(kx, ky)`` (the largest in the 3x3 bins around it).
    """
    height, width = sharp.shape
    window = np.outer(np.hanning(height), np.hanning(width))
    weighted = sharp * window
    weighted -= window * (weighted.sum() / window.sum())
    spec = np.abs(scipy.fft.rfft2(weighted, workers=1))
    fy = np.fft.fftfreq(height)[:, None]
    fx = np.fft.rfftfreq(width)[None, :]
    kr = np.hypot(fx, fy)
    shell = np.rint(kr * min(height, width)).astype(np.intp).ravel()
    logm = np.log(spec.ravel() + 1e-300)
    counts = np.bincount(shell)
    background = np.exp(np.bincount(shell, logm) / np.maximum(counts, 1))
    ratio = spec / background[shell].reshape(spec.shape)
    ratio[(kr < kmin) | (kr > kmax)] = 0.0
    best = float(ratio.max())
    local = ratio == ndimage.maximum_filter(ratio, size=5, mode=("wrap", "nearest"))
    iy, ix = np.nonzero(local & (ratio > DETECTION_RATIO))
    order = np.argsort(-ratio[iy, ix], kind="stable")[:40]
    peaks = []
    logspec = np.log(spec + 1e-300)

    def value(y, x):
        if x < 0:  # conjugate symmetry of a real image's spectrum
            return logspec[(-y) % height, -x]
        return logspec[y % height, min(x, spec.shape[1] - 1)]

    for j in order:
        y, x = int(iy[j]), int(ix[j])
        c = value(y, x)
        shifts = []
        for lo_v, hi_v in ((value(y, x - 1), value(y, x + 1)), (value(y - 1, x), value(y + 1, x))):
            den = lo_v - 2 * c + hi_v
            shifts.append(0.5 * (lo_v - hi_v) / den if den < 0 else 0.0)
        dx, dy = (float(np.clip(s, -0.5, 0.5)) for s in shifts)
        ys = y if y <= height // 2 else y - height
        peaks.append(_Peak(np.array([(x + dx) / width, (ys + dy) / height]), float(ratio[y, x])))

    def ratio_at(k) -> float:
        kx, ky = float(k[0]), float(k[1])
        if kx < 0:
            kx, ky = -kx, -ky
        x0, y0 = int(round(kx * width)), int(round(ky * height))
        xs = np.clip(np.arange(x0 - 1, x0 + 2), 0, ratio.shape[1] - 1)
        ys = np.arange(y0 - 1, y0 + 2) % height
        return float(ratio[np.ix_(ys, xs)].max())

    return peaks, best, ratio_at


def _add_subharmonics(recip: np.ndarray, ratio_at, kmin: float) -> np.ndarray:
    """Replace the reciprocal basis by a finer one while half-vectors carry significant peaks.

    With a narrow PSF and a large spacing the harmonics of the sharpened image can outshine
    the fundamental against the spectral background, so the strongest peaks may be 2 b1 or
    b1 + b2. A significant peak at b1/2, b2/2 or (b1 +- b2)/2 means the true reciprocal lattice
    is finer (the real-space cell larger).
    """
    b1, b2 = np.array(recip[0], float), np.array(recip[1], float)
    for _ in range(4):
        for h, keep in ((b1 / 2, b2), (b2 / 2, b1), ((b1 + b2) / 2, b2), ((b1 - b2) / 2, b2)):
            if np.linalg.norm(h) >= kmin and ratio_at(h) > SUBHARMONIC_RATIO:
                log.debug("sub-harmonic peak at %s: finer reciprocal lattice", h)
                b1, b2 = h, keep
                break
        else:
            break
    return np.array([b1, b2])


def _count_spots(image: np.ndarray) -> int:
    """Number of bright spots well above the noise (for the failure message only).

    Local maxima of the image smoothed over 1.5 pixels that rise 10 noise-sigmas above the
    10th percentile; the pixel noise is estimated from neighbouring-pixel differences, which
    a smooth atom image hardly affects.
    """
    smooth = ndimage.gaussian_filter(image, 1.5)
    diff = np.diff(image, axis=1)
    noise = 1.4826 * np.median(np.abs(diff - np.median(diff))) / math.sqrt(2.0)
    if noise == 0:
        noise = float(np.std(diff)) / math.sqrt(2.0) or 1.0
    level = np.percentile(smooth, 10) + 10.0 * noise / (2.0 * math.sqrt(math.pi) * 1.5)
    peaks = (smooth == ndimage.maximum_filter(smooth, size=5)) & (smooth > level)
    return int(np.count_nonzero(peaks))


def _not_found_reason(image: np.ndarray, best_ratio: float, collinear: bool) -> str:
    if collinear:
        return ("only one lattice direction was found (parallel stripes, no second set of peaks); "
                "the frame holds no 2-D lattice")
    n = _count_spots(image)
    strength = f"strongest Fourier peak {best_ratio:.1f}x the background, need {DETECTION_RATIO:g}x"
    if n == 0:
        return f"no atoms found: the frame looks like background and noise only ({strength})"
    if n < 10:
        return (f"only {n} isolated bright spot(s) found: a lattice can only be seen with many atoms "
                f"({strength})")
    return (f"no periodic arrangement found among {n} bright spots ({strength}); is the lattice "
            f"spacing smaller than the PSF width, or is spacing_hint wrong?")


# --------------------------------------------------------------------------------------
# phase-slope refinement
# --------------------------------------------------------------------------------------
def _tile_size(shape, recip: np.ndarray, *, per_axis: int = 4) -> tuple[int, int]:
    """Tile size (rows, cols) in pixels: at least 6 periods and 1/per_axis of the frame."""
    kmin = float(np.min(np.linalg.norm(recip, axis=1)))
    base = int(math.ceil(6.0 / kmin))
    return tuple(int(min(n, max(base, n // per_axis, 24))) for n in shape)


def _phase_plane(amps: np.ndarray, centres: np.ndarray) -> tuple[np.ndarray, float, float]:
    """Weighted plane fit ``phase = c + g . r`` to tile amplitudes; returns (g, c, rms)."""
    w = np.abs(amps)
    if not np.any(w > 0):
        return np.zeros(2), 0.0, float("inf")
    cx, cy = centres
    # unwrap with the gradient of neighbouring-tile phase differences first
    g0 = np.zeros(2)
    if amps.shape[1] > 1:
        d = np.sum(amps[:, 1:] * np.conj(amps[:, :-1]))
        g0[0] = np.angle(d) / float(cx[0, 1] - cx[0, 0])
    if amps.shape[0] > 1:
        d = np.sum(amps[1:, :] * np.conj(amps[:-1, :]))
        g0[1] = np.angle(d) / float(cy[1, 0] - cy[0, 0])
    pred = g0[0] * cx + g0[1] * cy
    z = amps * np.exp(-1j * pred)
    phase = pred + np.angle(z * np.conj(z.sum()))
    weights = (w * w).ravel()
    design = np.stack([np.ones(cx.size), cx.ravel(), cy.ravel()], axis=1)
    sw = np.sqrt(weights)
    if np.count_nonzero(weights) < 3:
        return g0, float(np.angle(amps.sum())), float("inf")
    coef, *_ = np.linalg.lstsq(design * sw[:, None], phase.ravel() * sw, rcond=None)
    resid = phase.ravel() - design @ coef
    rms = float(np.sqrt(np.sum(weights * resid ** 2) / np.sum(weights)))
    return coef[1:], float(coef[0]), rms


def _refine_reciprocal(sharp: np.ndarray, recip: np.ndarray, *, n_iter: int = 6) -> tuple[np.ndarray, float]:
    """Refine the rows b1, b2 (cycles/pixel) by the tile phase slope; returns (recip, rms px)."""
    recip = np.array(recip, float)
    tile_rows, tile_cols = _tile_size(sharp.shape, recip)
    rows = tile_layout(sharp.shape[0], tile_rows)
    cols = tile_layout(sharp.shape[1], tile_cols)
    rms_px = np.zeros(2)
    for i in range(2):
        for _ in range(n_iter):
            amps, centres = tile_amplitudes(sharp, recip[i], tile_rows=tile_rows, tile_cols=tile_cols,
                                            row_starts=rows, col_starts=cols)
            g, _, rms = _phase_plane(amps, centres)
            step = g / (2 * np.pi)
            recip[i] += step
            rms_px[i] = rms / (2 * np.pi * np.linalg.norm(recip[i]))
            if np.linalg.norm(step) < 1e-9 * np.linalg.norm(recip[i]):
                break
    return recip, float(np.sqrt(np.mean(rms_px ** 2)))


def _lattice_amplitudes(sharp: np.ndarray, recip: np.ndarray, *, per_axis: int = 4
                        ) -> tuple[np.ndarray, float, np.ndarray]:
    """Summed tile amplitudes at b1, b2 and at an off-lattice probe frequency, and phase rms.

    Returns
    -------
    amps : (2,) complex, amplitude at b1 and b2
    probe : float, root-sum-square tile magnitude at a frequency that is no reciprocal-lattice
        point (the noise and random-filling level)
    rms : (2,) float, weighted RMS tile-phase scatter about the mean phase (radians)
    """
    tile_rows, tile_cols = _tile_size(sharp.shape, recip, per_axis=per_axis)
    rows = tile_layout(sharp.shape[0], tile_rows)
    cols = tile_layout(sharp.shape[1], tile_cols)
    amps = np.zeros(2, complex)
    rms = np.zeros(2)
    for i in range(2):
        a, _ = tile_amplitudes(sharp, recip[i], tile_rows=tile_rows, tile_cols=tile_cols,
                               row_starts=rows, col_starts=cols)
        amps[i] = a.sum()
        w = np.abs(a) ** 2
        dphi = np.angle(a * np.conj(amps[i]))
        rms[i] = math.sqrt(float(np.sum(w * dphi ** 2) / max(np.sum(w), 1e-300)))
    # generic fractions: never a superlattice peak of a checkerboard or stripe pattern
    a, _ = tile_amplitudes(sharp, 0.37 * recip[0] + 0.61 * recip[1], tile_rows=tile_rows,
                           tile_cols=tile_cols, row_starts=rows, col_starts=cols)
    probe = math.sqrt(float(np.sum(np.abs(a) ** 2)))
    return amps, probe, rms


def _offset_from_phases(amps: np.ndarray, basis: np.ndarray, recip: np.ndarray, target) -> np.ndarray:
    """Offset (x, y) pixels: the lattice translate whose site (0, 0) is nearest ``target``.

    With ``A(b) = sum I(r) exp(-2 pi i b . r)`` and sites at ``offset + n1 a1 + n2 a2``,
    ``arg A(b_i) = -2 pi b_i . offset``, so ``b_i . offset = -arg A(b_i) / 2 pi (mod 1)``.
    """
    frac = -np.angle(amps) / (2 * np.pi)
    want = recip @ np.asarray(target, float)
    frac = frac + np.rint(want - frac)
    return basis @ frac


def _nearest_translate(offset, basis: np.ndarray, recip: np.ndarray, target) -> np.ndarray:
    """The lattice translate of ``offset`` (pixels) nearest ``target`` (pixels)."""
    frac = recip @ (np.asarray(offset, float) - np.asarray(target, float))
    return np.asarray(offset, float) - basis @ np.rint(frac)


# --------------------------------------------------------------------------------------
# real-space refinement on bright sites
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _SiteFit:
    a1: np.ndarray
    a2: np.ndarray
    offset: np.ndarray
    n_used: int
    residual: float  # weighted RMS centroid scatter about the grid, pixels
    converged: bool


def _plausible(fit: _SiteFit, a1, a2, offset) -> bool:
    """The site fit stayed close to its Fourier start (vectors within 1 %, offset 0.25 site)."""
    short = min(np.hypot(*a1), np.hypot(*a2))
    moved = np.linalg.norm(fit.offset - np.asarray(offset))
    stretch = max(np.linalg.norm(fit.a1 - a1) / np.linalg.norm(a1), np.linalg.norm(fit.a2 - a2) / np.linalg.norm(a2))
    return bool(np.all(np.isfinite(fit.offset)) and moved < 0.25 * short and stretch < 0.01)


def _site_centroids(sharp: np.ndarray, a1, a2, offset, radius: int, width: float):
    """Gaussian-weighted moments of every site's neighbourhood, relative to the site (pixels).

    Returns the site grid, the weighted sums, the centroids ``(cx, cy)`` and the weighted
    second moment about the centroid (pixels^2, mean of the two axes). The Gaussian weight
    factorises into x and y parts, so the moments are two small contractions per site.
    """
    geometry = LatticeGeometry(a1=a1, a2=a2, offset=offset)
    grid = lattice_sites(geometry, sharp.shape, margin=radius + 1.0)
    if len(grid) == 0:
        z = np.zeros(0)
        return grid, z, z, z, z
    xi = np.rint(grid.x).astype(np.intp)
    yi = np.rint(grid.y).astype(np.intp)
    span = np.arange(-radius, radius + 1)
    windows = sliding_window_view(sharp, (span.size, span.size))  # a view, no copy
    patch = windows[yi - radius, xi - radius]  # (N, S, S): [site, row, col]
    dx = span[None, :] - (grid.x - xi)[:, None]  # (N, S)
    dy = span[None, :] - (grid.y - yi)[:, None]
    ex = np.exp(-dx * dx / (2.0 * width * width))
    ey = np.exp(-dy * dy / (2.0 * width * width))
    px = np.einsum("nyx,ny->nx", patch, ey) * ex  # weighted profile along x
    py = np.einsum("nyx,nx->ny", patch, ex) * ey  # weighted profile along y
    mass = px.sum(axis=1)
    safe = np.maximum(mass, 1e-300)
    cx = (px * dx).sum(axis=1) / safe
    cy = (py * dy).sum(axis=1) / safe
    m2 = 0.5 * ((px * dx * dx).sum(axis=1) / safe - cx * cx + (py * dy * dy).sum(axis=1) / safe - cy * cy)
    return grid, mass, cx, cy, m2


def _site_fit(sharp: np.ndarray, a1, a2, offset, *, fit_vectors: bool, n_iter: int = 6,
              tolerance: float = 2e-4) -> _SiteFit | None:
    """Least-squares fit of the grid to the centroids of the bright sites.

    Every site's neighbourhood (radius half the shorter spacing) is weighted with a Gaussian
    of width s = 0.3 spacing centred on the predicted site, and its centroid measured. Sites
    brighter than an Otsu threshold of the weighted sums (the occupied ones) enter a linear
    least-squares fit, weighted by brightness, of ``d = d_offset + row d_a1 + col d_a2`` (or of
    the offset alone). A Gaussian-weighted centroid reports only the fraction
    ``g = s^2 / (s^2 + w^2)`` of a spot's displacement (w: spot width), and
    ``g = 1 - m2 / s^2`` with ``m2`` the weighted second moment, so the steps are divided by
    the measured g. The fixed point -- centroids centred on the grid on average -- does not
    depend on g. ``tolerance``: stop when no site moves by more than this (pixels).
    Returns None when fewer than 10 bright sites are found.
    """
    from skimage.filters import threshold_otsu

    a1, a2, offset = (np.array(v, float) for v in (a1, a2, offset))
    short = min(np.hypot(*a1), np.hypot(*a2))
    radius = max(1, int(math.ceil(0.5 * short)))
    width = 0.3 * short
    converged = False
    n_used, residual = 0, float("nan")
    for _ in range(n_iter):
        grid, mass, cx, cy, m2 = _site_centroids(sharp, a1, a2, offset, radius, width)
        if mass.size < 10 or mass.max() <= mass.min():
            return None
        bright = mass > threshold_otsu(mass)
        n_used = int(bright.sum())
        if n_used < 10:
            return None
        weight = mass[bright]
        sw = np.sqrt(weight)
        gain = float(np.clip(1.0 - np.sum(weight * m2[bright]) / np.sum(weight) / width ** 2, 0.2, 1.0))
        if fit_vectors:
            design = np.stack([np.ones(n_used), grid.rows[bright], grid.cols[bright]], axis=1).astype(float)
        else:
            design = np.ones((n_used, 1))
        cxk, *_ = np.linalg.lstsq(design * sw[:, None], cx[bright] * sw, rcond=None)
        cyk, *_ = np.linalg.lstsq(design * sw[:, None], cy[bright] * sw, rcond=None)
        resid = np.hypot(cx[bright] - design @ cxk, cy[bright] - design @ cyk) / gain
        residual = float(np.sqrt(np.sum(weight * resid ** 2) / np.sum(weight)))
        step = np.stack([cxk, cyk], axis=1) / gain  # rows: offset[, a1, a2]; columns: x, y
        moved = np.abs(design @ step).max()  # largest displacement of a bright site, pixels
        offset = offset + step[0]
        if fit_vectors:
            a1 = a1 + step[1]
            a2 = a2 + step[2]
        if moved < tolerance:
            converged = True
            break
    return _SiteFit(a1, a2, offset, n_used, residual, converged)


# --------------------------------------------------------------------------------------
# quality helpers
# --------------------------------------------------------------------------------------
def _bright_sites(image: np.ndarray, geometry: LatticeGeometry, mask) -> int:
    """Sites whose pixel value is above an Otsu threshold of all site values."""
    from skimage.filters import threshold_otsu

    grid = lattice_sites(geometry, image.shape, margin=1.0, mask=mask)
    if len(grid) < 2:
        return 0
    xi = np.clip(np.rint(grid.x).astype(np.intp), 0, image.shape[1] - 1)
    yi = np.clip(np.rint(grid.y).astype(np.intp), 0, image.shape[0] - 1)
    values = image[yi, xi]
    if values.max() == values.min():
        return 0
    return int(np.count_nonzero(values > threshold_otsu(values)))


def _sites_across(shape, recip: np.ndarray) -> float:
    height, width = shape
    corners = np.array([[-0.5, -0.5], [width - 0.5, -0.5], [-0.5, height - 0.5], [width - 0.5, height - 0.5]])
    proj = corners @ recip.T  # (4, 2) fractional indices
    return float(np.min(proj.max(axis=0) - proj.min(axis=0)))


def _as_pair(value, name: str) -> tuple[float, float] | None:
    if value is None:
        return None
    arr = np.atleast_1d(np.asarray(value, dtype=float))
    if arr.size == 1:
        arr = np.repeat(arr, 2)
    if arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be one number or a pair (for a1, a2), got {value!r}")
    return float(arr[0]), float(arr[1])


# --------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------
def estimate_lattice(
    image_or_stack,
    *,
    spacing_hint=None,
    fixed_spacing=None,
    fixed_angle=None,
    mask=None,
    origin=None,
) -> LatticeGeometry:
    """Find the lattice vectors and offset in one frame or in the sum of a stack.

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Camera counts or photons (any linear unit; an offset does not matter). The frames of a
        stack are sharpened one by one and summed (the vectors are stable; only use a stack
        whose phase does not drift by more than a small fraction of a site).
    spacing_hint : float or (float, float), optional
        Expected lattice spacing in pixels (a prior): the Fourier search is limited to
        frequencies between 0.8/hint and 2/hint cycles per pixel (so a superlattice of the
        atoms, such as a checkerboard, is not taken for the lattice), and a warning is added
        when the result differs from the hint by more than 10 %.
    fixed_spacing : float or (float, float), optional
        Known lengths of a1 and a2 in pixels (one number for both). The measured vectors are
        rescaled to them and the offset is re-found.
    fixed_angle : float or (float, float), optional
        Known direction(s) in radians, measured from +x towards +y (image coordinates). One
        number: the direction of a2; the whole lattice is rotated rigidly to match. A pair:
        the directions of a1 and a2.
    mask : (H, W) bool ndarray, optional
        Region of interest; pixels outside are ignored.
    origin : (float, float), optional
        Pixel position ``(x, y)`` whose nearest site becomes site (0, 0); default the frame
        centre.

    Returns
    -------
    LatticeGeometry
        ``a1``, ``a2`` in pixels in the :func:`canonical_basis` form, ``offset`` in pixels,
        and a :class:`~latticeread.core.geometry.LatticeQuality` with:
        ``peak_to_background`` -- the weaker Fourier peak over the geometric mean of its
        frequency shell (dimensionless, >= 6 by construction); ``residual`` -- brightness-
        weighted RMS scatter, in pixels, of the bright sites' centroids about the fitted grid
        (mostly the pull of occupied neighbours; NaN if the site fit was not used);
        ``n_sites_used`` -- bright sites in that fit (weighted sum above an Otsu threshold);
        ``warnings``.

    Raises
    ------
    FrameError
        Not a 2-D frame or 3-D stack, empty, all-NaN, saturated, or smaller than 16x16 pixels.
    LatticeNotFound
        Constant frame, noise only, too few atoms, no periodic arrangement, only one lattice
        direction, or fewer than 8 sites across the frame. The message names the reason.

    Notes
    -----
    The reciprocal vectors satisfy ``a_i . b_j = delta_ij`` (cycles per pixel); see the module
    docstring for the method.
    """
    data, notes = _prepare(image_or_stack, allow_stack=True)
    for n in notes:
        warnings.warn(n, LatticeReadWarning, stacklevel=2)
    shape = data.shape[-2:]
    mask = _check_mask(mask, shape)
    hint = _as_pair(spacing_hint, "spacing_hint")
    spacing = _as_pair(fixed_spacing, "fixed_spacing")
    if hint is not None and min(hint) <= 0:
        raise ValueError(f"spacing_hint must be positive (pixels), got {spacing_hint!r}")
    if spacing is not None and min(spacing) <= 0:
        raise ValueError(f"fixed_spacing must be positive (pixels), got {fixed_spacing!r}")
    angle = None
    if fixed_angle is not None:
        angle = np.atleast_1d(np.asarray(fixed_angle, dtype=float))
        if angle.size not in (1, 2) or not np.all(np.isfinite(angle)):
            raise ValueError(f"fixed_angle must be one angle or a pair (radians), got {fixed_angle!r}")

    if data.ndim == 3:
        # sharpen frame by frame, then add: every atom counts once, whatever the other shots
        sharp = np.zeros(shape)
        for frame in data:
            if frame.max() > frame.min():
                sharp += _sharpen(frame, mask)
        sharp_src = data.sum(axis=0)
    else:
        sharp = _sharpen(data, mask)
        sharp_src = data
    kmin = 4.0 / min(shape)
    kmax = 0.5
    if hint is not None:
        # a primitive reciprocal vector is at least 1/|a_i| long (|b_i| = 1 / (|a_i| sin angle)),
        # so 0.8/hint tolerates a 20 % error and still excludes a checkerboard's (b1 + b2)/2
        kmin = max(kmin, 0.8 / max(hint))
        kmax = min(kmax, 2.0 / min(hint))
    peaks, best, ratio_at = _fft_peaks(sharp, kmin=kmin, kmax=kmax)
    if not peaks:
        raise LatticeNotFound(_not_found_reason(sharp_src, best, collinear=False))
    first = peaks[0]
    second = None
    for p in peaks[1:]:
        sin = abs(_cross(first.k, p.k)) / (np.linalg.norm(first.k) * np.linalg.norm(p.k))
        if sin > 0.5:
            second = p
            break
    if second is None:
        raise LatticeNotFound(_not_found_reason(sharp_src, best, collinear=True))
    recip = _add_subharmonics(np.array([first.k, second.k]), ratio_at, kmin)
    # canonical basis, then refine the reciprocal vectors of that basis
    a1, a2 = canonical_basis(*np.linalg.inv(recip).T)
    basis = np.array([a1, a2]).T
    recip = np.linalg.inv(basis)
    across = _sites_across(shape, recip)
    if across < MIN_SITES_ACROSS:
        raise LatticeNotFound(f"the frame holds only about {across:.1f} sites across along one lattice "
                              f"direction (spacing {np.hypot(*a1):.1f} and {np.hypot(*a2):.1f} pixels); "
                              f"at least {MIN_SITES_ACROSS} are needed")
    recip, _ = _refine_reciprocal(sharp, recip)
    basis = np.linalg.inv(recip)
    target = ((shape[1] - 1) / 2.0, (shape[0] - 1) / 2.0) if origin is None else tuple(map(float, origin))
    amps, _, _ = _lattice_amplitudes(sharp, recip)
    offset = _offset_from_phases(amps, basis, recip, target)
    warn = list(notes)
    a1, a2 = basis[:, 0], basis[:, 1]
    constrained = spacing is not None or angle is not None
    fit = _site_fit(sharp, a1, a2, offset, fit_vectors=True)
    if fit is not None and _plausible(fit, a1, a2, offset):
        a1, a2, offset = fit.a1, fit.a2, fit.offset
    elif fit is not None:
        warn.append("the fit to the bright sites disagreed with the Fourier estimate; kept the Fourier estimate")
        fit = None
    if spacing is not None:
        a1 = a1 * spacing[0] / np.linalg.norm(a1)
        a2 = a2 * spacing[1] / np.linalg.norm(a2)
    if angle is not None:
        if angle.size == 1:
            rot = float(angle[0]) - math.atan2(a2[1], a2[0])
            c, s = math.cos(rot), math.sin(rot)
            r = np.array([[c, -s], [s, c]])
            a1, a2 = r @ a1, r @ a2
        else:
            a1 = np.linalg.norm(a1) * np.array([math.cos(angle[0]), math.sin(angle[0])])
            a2 = np.linalg.norm(a2) * np.array([math.cos(angle[1]), math.sin(angle[1])])
    basis = np.array([a1, a2]).T
    if abs(np.linalg.det(basis)) < 1e-9:
        raise ValueError("fixed_angle makes the lattice vectors collinear")
    recip = np.linalg.inv(basis)
    if constrained:
        amps, _, _ = _lattice_amplitudes(sharp, recip)
        offset = _offset_from_phases(amps, basis, recip, target)
        fit = _site_fit(sharp, a1, a2, offset, fit_vectors=False)
        if fit is not None and _plausible(fit, a1, a2, offset):
            offset = fit.offset
        else:
            fit = None
    offset = _nearest_translate(offset, basis, recip, target)

    ratio = min(first.ratio, second.ratio)
    if ratio < WEAK_RATIO:
        warn.append(f"weak lattice peaks ({ratio:.1f}x the spectral background): the geometry may be wrong")
    geometry = LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(offset))
    if fit is not None:
        n_bright, residual = fit.n_used, fit.residual
    else:
        n_bright, residual = _bright_sites(sharp_src, geometry, mask), float("nan")
    if n_bright < MIN_BRIGHT_SITES:
        warn.append(f"only {n_bright} bright sites: the lattice vectors rest on few atoms")
    if hint is not None:
        for name, got, want in (("a1", np.linalg.norm(a1), hint[0]), ("a2", np.linalg.norm(a2), hint[1])):
            if spacing is None and abs(got / want - 1) > 0.1:
                warn.append(f"spacing of {name} is {got:.3f} pixels, more than 10% away from the hint {want:g}")
    quality = LatticeQuality(peak_to_background=ratio, residual=residual, n_sites_used=n_bright,
                             warnings=tuple(warn))
    log.debug("lattice a1=%s a2=%s offset=%s ratio=%.1f residual=%.3g px", a1, a2, offset, ratio, residual)
    return LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(offset), quality=quality)


def refine_phase(image, geometry: LatticeGeometry, *, reference=None, mask=None) -> LatticeGeometry:
    """Re-find the offset of the lattice in one frame, keeping the vectors.

    Parameters
    ----------
    image : (H, W) array_like
        One frame (counts or photons).
    geometry : LatticeGeometry
        Lattice vectors (pixels) and, by default, the reference offset.
    reference : (float, float) or LatticeGeometry, optional
        Offset ``(x, y)`` in pixels (or a geometry whose offset is used) that the new offset
        is unwrapped to: of all lattice translates the one nearest it is returned, so site
        indices stay stable while the lattice moves less than half a spacing. Default:
        ``geometry.offset``.
    mask : (H, W) bool ndarray, optional
        Region of interest.

    Returns
    -------
    LatticeGeometry
        Same ``a1``, ``a2``; new ``offset`` (pixels); quality with ``peak_to_background`` =
        the weaker lattice amplitude over the amplitude at off-lattice frequencies
        (dimensionless), ``residual`` = RMS centroid scatter of the bright sites about the
        grid in lattice spacings, ``n_sites_used`` = bright sites in that fit, ``warnings``.

    Notes
    -----
    The offset is first read from the phases of the Fourier amplitudes at b1 and b2, then
    polished by a least-squares fit of the offset alone to the centroids of the bright sites.

    Raises
    ------
    FrameError
        Not a 2-D frame, or empty, all-NaN, saturated, too small.
    LatticeNotFound
        Constant frame, or the lattice amplitudes are indistinguishable from noise (ratio
        below 3): an empty or atom-free frame has no phase.
    """
    img, notes = _prepare(image, allow_stack=False)
    mask = _check_mask(mask, img.shape)
    if reference is None:
        target = np.asarray(geometry.offset, float)
    elif isinstance(reference, LatticeGeometry):
        target = np.asarray(reference.offset, float)
    else:
        target = np.asarray(reference, float).reshape(2)
    recip = geometry.reciprocal
    sharp = _sharpen(img, mask)
    amps, probe, rms = _lattice_amplitudes(sharp, recip, per_axis=2)
    noise = probe or 1e-300
    ratio = float(np.min(np.abs(amps))) / noise
    if ratio < 3.0:
        raise LatticeNotFound(f"the lattice is not visible in this frame (amplitude {ratio:.1f}x the "
                              f"off-lattice level, need 3x): too few atoms to find the phase")
    basis = geometry.basis
    offset = _offset_from_phases(amps, basis, recip, target)
    warn = list(notes)
    fit = _site_fit(sharp, geometry.a1, geometry.a2, offset, fit_vectors=False, n_iter=1)
    if fit is not None and _plausible(fit, np.asarray(geometry.a1), np.asarray(geometry.a2), offset):
        offset = fit.offset
        n_used, residual = fit.n_used, fit.residual / float(np.mean(geometry.spacings))
    else:
        n_used, residual = 0, float(np.sqrt(np.mean(rms ** 2)) / (2 * np.pi))
    offset = _nearest_translate(offset, basis, recip, target)
    if ratio < WEAK_RATIO:
        warn.append(f"weak lattice signal in this frame ({ratio:.1f}x the off-lattice level): the offset "
                    f"may be off by a fraction of a site")
    quality = LatticeQuality(peak_to_background=ratio, residual=residual, n_sites_used=n_used,
                             warnings=tuple(warn))
    return geometry.with_offset(tuple(offset), quality=quality)


@dataclass(frozen=True)
class PhaseDrift:
    """Lattice offset of every frame of a stack and its linear trend.

    Attributes
    ----------
    offsets : (n_frames, 2) ndarray
        Offset ``(x, y)`` of site (0, 0) in each frame, pixels (NaN where the lattice was not
        visible). Unwrapped frame to frame, so a steady drift is followed across many spacings.
    lattice_offsets : (n_frames, 2) ndarray
        The same displacement relative to the input geometry's offset, in lattice units
        ``(along a1, along a2)`` (sites).
    trend : (2,) ndarray
        Linear drift ``(dx, dy)`` in pixels per frame (least squares over the valid frames).
    trend_offset : (2,) ndarray
        Fitted offset ``(x, y)`` at frame 0, pixels.
    trend_residual : float
        RMS distance of the offsets from the linear trend, pixels.
    peak_to_background : (n_frames,) ndarray
        Lattice signal over the off-lattice level in each frame (dimensionless).
    warnings : tuple of str
    """

    offsets: np.ndarray = field(repr=False)
    lattice_offsets: np.ndarray = field(repr=False)
    trend: np.ndarray
    trend_offset: np.ndarray
    trend_residual: float
    peak_to_background: np.ndarray = field(repr=False)
    warnings: tuple[str, ...] = ()

    @property
    def n_frames(self) -> int:
        return int(self.offsets.shape[0])

    def to_dict(self) -> dict:
        return {
            "offsets": np.asarray(self.offsets).tolist(),
            "lattice_offsets": np.asarray(self.lattice_offsets).tolist(),
            "trend_pixels_per_frame": np.asarray(self.trend).tolist(),
            "trend_offset": np.asarray(self.trend_offset).tolist(),
            "trend_residual": float(self.trend_residual),
            "peak_to_background": np.asarray(self.peak_to_background).tolist(),
            "warnings": list(self.warnings),
        }


def phase_drift(stack, geometry: LatticeGeometry, *, mask=None) -> PhaseDrift:
    """Offset of the lattice in every frame of a stack, and its linear trend.

    Parameters
    ----------
    stack : (n_frames, H, W) array_like or a sequence of (H, W) frames
        Frames in time order (counts or photons).
    geometry : LatticeGeometry
        Lattice vectors (pixels); the first frame is unwrapped to ``geometry.offset``, each
        later one to the previous valid frame's offset.
    mask : (H, W) bool ndarray, optional

    Returns
    -------
    PhaseDrift
    """
    if isinstance(stack, np.ndarray) and stack.ndim != 3:
        raise FrameError(f"expected a 3-D stack (frames, height, width), got an array of shape {stack.shape}")
    n = len(stack)
    if n == 0:
        raise FrameError("the stack holds no frames")
    offsets = np.full((n, 2), np.nan)
    ratios = np.full(n, np.nan)
    reference = np.asarray(geometry.offset, float)
    missing = []
    for i in range(n):
        try:
            g = refine_phase(stack[i], geometry, reference=reference, mask=mask)
        except LatticeNotFound:
            missing.append(i)
            continue
        offsets[i] = g.offset
        ratios[i] = g.quality.peak_to_background
        reference = offsets[i]
    lattice_offsets = (geometry.reciprocal @ (offsets - np.asarray(geometry.offset)).T).T
    ok = np.all(np.isfinite(offsets), axis=1)
    frames = np.arange(n, dtype=float)
    warn = []
    if missing:
        shown = ", ".join(str(i) for i in missing[:10]) + (" ..." if len(missing) > 10 else "")
        warn.append(f"no lattice visible in {len(missing)} frame(s): {shown}")
    if ok.sum() >= 2:
        design = np.stack([np.ones(ok.sum()), frames[ok]], axis=1)
        coef, *_ = np.linalg.lstsq(design, offsets[ok], rcond=None)
        trend_offset, trend = coef[0], coef[1]
        resid = offsets[ok] - design @ coef
        trend_residual = float(np.sqrt(np.mean(np.sum(resid ** 2, axis=1))))
    else:
        trend = np.full(2, np.nan)
        trend_offset = offsets[ok][0] if ok.any() else np.full(2, np.nan)
        trend_residual = float("nan")
        warn.append("fewer than two frames with a visible lattice: no drift trend")
    return PhaseDrift(offsets=offsets, lattice_offsets=lattice_offsets, trend=np.asarray(trend),
                      trend_offset=np.asarray(trend_offset), trend_residual=trend_residual,
                      peak_to_background=ratios, warnings=tuple(warn))
