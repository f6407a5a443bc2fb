"""Cosmic-ray hits and hot pixels: charge that did not come through the objective.

A cosmic-ray hit deposits charge in one pixel, a short streak or a small blob; a hot pixel
collects dark charge in every frame at the same place. Neither looks like the image of an
atom: the PSF is blurred by the optics over several pixels, so no pixel of an image made of
atoms can stand out from its neighbours by more than the PSF allows.

The shape test
--------------
With the five-point Laplacian ``L(p) = 4 v(p) - sum of the 4 neighbours`` (pixels, photons),
every pixel-integrated PSF stamp satisfies ``L(p) <= k v(p)`` on its bright part, where
``k = sharpness(psf)`` is the largest ratio over sub-pixel source positions (about 0.26 for a
FWHM of 6.3 pixels, 1.2 for 2.7 pixels, 1.85 for 2 pixels). As ``L`` is linear, any sum of
atoms on a smooth background ``b`` obeys the same bound with ``v - b``. A pixel with

    L(p) - k (v(p) - b(p)) > n_sigma * sigma_L(p)

is charge no PSF can make (``sigma_L`` is the standard deviation of ``L`` from the camera's
noise model, :meth:`CameraModel.photon_variance`, for independent pixels). An isolated pixel
has ``L = 4 v``, a one-pixel-wide streak ``L = 2 v``, a blob of Gaussian radius 1 pixel
``L = 1.6 v``: all far above ``k`` for PSFs wider than about 3 pixels. For a PSF near 2
pixels FWHM a small blob cannot be told from an atom by shape alone.

This is the idea of the Laplacian cosmic-ray detector of van Dokkum (PASP 113, 1420 (2001);
from memory), with the fine-structure image replaced by the PSF's own bound ``k``.

Only a few pixels of a frame can fail the test, so the scores are not computed everywhere: a
bound on every filter's score, a few full-frame passes (``_screen``), clears almost every
pixel, and the exact scores and the hysteresis are evaluated on tiles of 16 x 16 pixels near
the rest, with more tiles added while a hit reaches unevaluated ones. The masks are the same
as from the whole-frame computation (``_excess_reference``, compared in the tests).

Detected pixels are grown into their surroundings (the faint edge of a blob or streak:
connected pixels more than ``grow_sigma`` standard deviations above the local median) and
then left out of the site fit; the sites they touch are flagged ARTEFACT
(:mod:`latticeread.core.flags`). Hot pixels are pixels that fail the test in most frames of a
stack (:func:`find_hot_pixels`), or that a dark-frame analysis found
(``latticeread camera --bad-pixels``).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from skimage.filters import apply_hysteresis_threshold

from latticeread.core.camera import CameraModel
from latticeread.core.psf import PSFModel

__all__ = ["ArtefactResult", "ArtefactFinder", "CleanedStack", "clean_stack", "model_fill", "PixelModel", "ARTEFACT_WARNING", "hot_pixel_mask", "sharpness", "bounds", "SCALES", "find_artefacts", "find_hot_pixels", "fill_pixels",
           "SHARPEST_FWHM", "refit_near_artefacts"]

log = logging.getLogger(__name__)

#: Narrowest PSF FWHM (pixels) assumed when the PSF is not known yet (a first pass before the
#: PSF has been measured); its bound ``k`` is about 1.85.
SHARPEST_FWHM = 2.0

#: Smoothing filters of the shape test: none (single pixels), a Gaussian of 1 pixel (small
#: blobs) and three-pixel lines along rows, columns and both diagonals (faint streaks).
SCALES = ("pixel", "blob", "row", "column", "diagonal", "antidiagonal")

#: Largest share of a frame's pixels left out as hits; beyond it the frame is not images of atoms.
MAX_MASKED_FRACTION = 0.05

#: Start of the per-frame warning about cosmic-ray hits (calibration summarises them instead).
ARTEFACT_WARNING = "cosmic-ray hits"

_FIVE_POINT = np.array([[0.0, -1.0, 0.0], [-1.0, 4.0, -1.0], [0.0, -1.0, 0.0]])
_NEIGHBOURS = np.array([[0.0, 1.0, 0.0], [1.0, 0.0, 1.0], [0.0, 1.0, 0.0]])


@dataclass(frozen=True)
class ArtefactResult:
    """Pixels of one frame holding charge that is not the image of atoms.

    Attributes
    ----------
    mask : (H, W) ndarray of bool
        Pixels to leave out of the fit (detected pixels and their grown surroundings).
    n_hits : int
        Connected groups of detected pixels (cosmic-ray hits, and hot pixels not given as
        ``known``).
    n_pixels : int
        ``mask.sum()``.
    charge : float
        Photons above the local background inside the mask (a rough size of the hits).
    """

    mask: np.ndarray = field(repr=False)
    n_hits: int = 0
    n_pixels: int = 0
    charge: float = 0.0


def _filters(scale: str, radius: int = 4):
    """Kernels ``G`` (the smoothing named ``scale``) and ``F`` = five-point Laplacian of ``G``."""
    g = np.zeros((2 * radius + 1, 2 * radius + 1))
    c = radius
    if scale == "pixel":
        g[c, c] = 1.0
    elif scale == "blob":
        g[c, c] = 1.0
        g = ndimage.gaussian_filter(g, 1.0, mode="constant")
    elif scale == "row":
        g[c, c - 1:c + 2] = 1.0 / 3
    elif scale == "column":
        g[c - 1:c + 2, c] = 1.0 / 3
    elif scale == "diagonal":
        g[[c - 1, c, c + 1], [c - 1, c, c + 1]] = 1.0 / 3
    elif scale == "antidiagonal":
        g[[c - 1, c, c + 1], [c + 1, c, c - 1]] = 1.0 / 3
    else:
        raise ValueError(f"unknown filter {scale!r}; use one of {', '.join(SCALES)}")
    return g, ndimage.convolve(g, _FIVE_POINT, mode="constant")


def _ratio(stamps, scale: float, floor: float) -> float:
    g, f = _filters(scale)
    best = 0.0
    for stamp in stamps:
        num = ndimage.convolve(stamp, f, mode="constant")
        den = ndimage.convolve(stamp, g, mode="constant")
        bright = den >= floor * den.max()
        best = max(best, float(np.max(num[bright] / den[bright])))
    return best


def _stamps(psf: PSFModel, n_shifts: int) -> np.ndarray:
    shifts = np.linspace(-0.5, 0.5, int(n_shifts))
    dx, dy = np.meshgrid(shifts, shifts)
    return psf.stamps(dx.ravel(), dy.ravel())


def sharpness(psf: PSFModel, *, scale: str = "pixel", n_shifts: int = 5, floor: float = 0.05) -> float:
    """Largest ``F(p) / G(p)`` over the pixel-integrated PSF (see the module notes).

    Parameters
    ----------
    psf : PSFModel
    scale : str
        Smoothing of both filters, one of :data:`SCALES`; ``"pixel"`` is the plain five-point
        Laplacian over the pixel value.
    n_shifts : int
        Sub-pixel source positions per axis tried over [-0.5, 0.5] pixel.
    floor : float
        Only pixels holding at least this fraction of the smoothed stamp's peak enter (the
        faint wings carry too little light to matter next to the noise margin).

    Returns
    -------
    float
        The bound ``k`` (dimensionless; 4 would be a single bright pixel for ``"pixel"``).
    """
    return _ratio(_stamps(psf, n_shifts), scale, floor)


def bounds(psf: PSFModel) -> tuple[float, ...]:
    """:func:`sharpness` of ``psf`` at each of :data:`SCALES` (compute once per PSF)."""
    stamps = _stamps(psf, 5)
    return tuple(_ratio(stamps, s, 0.05) for s in SCALES)


def _background(image, block: int) -> np.ndarray:
    """Smooth low background: the block levels of :func:`_block_levels`, interpolated."""
    h, w = image.shape
    low = _block_levels(image, block)
    if low.shape == (1, 1):
        return np.full(image.shape, float(low[0, 0]))
    return ndimage.zoom(low, (h / low.shape[0], w / low.shape[1]), order=1, mode="nearest", grid_mode=True)


def _smooth(image, scale: str) -> np.ndarray:
    """``image`` correlated with the smoothing ``G`` of :func:`_filters` over its last two axes
    (rows, columns; a stack of windows is smoothed window by window)."""
    lead = (0,) * (image.ndim - 2)
    if scale == "blob":
        return ndimage.gaussian_filter(image, lead + (1.0, 1.0), mode="nearest", truncate=4.0)
    if scale == "row":
        return ndimage.uniform_filter1d(image, 3, axis=-1, mode="nearest")
    if scale == "column":
        return ndimage.uniform_filter1d(image, 3, axis=-2, mode="nearest")
    p = np.pad(image, [(0, 0)] * len(lead) + [(1, 1), (1, 1)], mode="edge")
    if scale == "diagonal":
        return (p[..., :-2, :-2] + p[..., 1:-1, 1:-1] + p[..., 2:, 2:]) / 3.0
    if scale == "antidiagonal":
        return (p[..., :-2, 2:] + p[..., 1:-1, 1:-1] + p[..., 2:, :-2]) / 3.0
    raise ValueError(f"unknown filter {scale!r}; use one of {', '.join(SCALES)}")


def _plane(kernel, ndim: int) -> np.ndarray:
    """A 2-D kernel acting on the last two axes of an ``ndim``-dimensional array."""
    return kernel.reshape((1,) * (ndim - 2) + kernel.shape)


def _excess(image, *, ks, camera: CameraModel, block: int, scales=SCALES):
    """Largest ``(F v - k (G v - b)) / sigma`` over the filters, per pixel; and the background ``b``.

    The whole-frame computation; :func:`find_artefacts` evaluates the same scores only near
    pixels that a cheap bound (:func:`_screen`) cannot clear, and the tests compare both.
    """
    bg = _background(image, block)
    return _scores(image, bg, ks=ks, camera=camera, scales=scales), bg


def _scores(image, bg, *, ks, camera: CameraModel, scales=SCALES):
    """The shape-test score of :func:`_excess` for a given background ``bg`` (same shape).

    For ``"pixel"`` the noise is exact for independent pixels; for the smoothing filters the
    variance is taken as the smoothed variance times the filter's squared norm (it varies
    slowly over the filter's few pixels). For ``"blob"`` only local maxima of the smoothed
    image count (the centres of blobs; their edges are grown afterwards), so that the
    smoothing does not spread a detection over its neighbours. Every output pixel depends on
    the input within :data:`_REACH` pixels only, so a window with that margin gives the same
    values inside as the whole frame.
    """
    lap = ndimage.convolve(image, _plane(_FIVE_POINT, image.ndim), mode="nearest")
    var = camera.photon_variance(image)
    best = None
    for scale, k in zip(scales, ks):
        g, f = _filters(scale)
        if scale == "pixel":
            score = (lap - k * (image - bg)) / np.sqrt(np.maximum(
                (4.0 - k) ** 2 * var + ndimage.convolve(var, _plane(_NEIGHBOURS, var.ndim), mode="nearest"), 1e-12))
        else:
            smooth = _smooth(image, scale)
            lap_s = _smooth(lap, scale)
            var_s = _smooth(var, scale)
            norm = float(np.sum((f - k * g) ** 2))
            score = (lap_s - k * (smooth - bg)) / np.sqrt(np.maximum(var_s * norm, 1e-12))
            if scale == "blob":
                score = np.where(smooth >= ndimage.maximum_filter(smooth, size=(1,) * (smooth.ndim - 2) + (3, 3),
                                                                   mode="nearest"), score, -np.inf)
        best = score if best is None else np.maximum(best, score)
    return best


#: Farthest input pixel (rows or columns) that one score of :func:`_scores` reads: the
#: Laplacian (1) under the Gaussian of the blob filter (4, its ``truncate``) and the 3 x 3
#: local-maximum test (1).
_REACH = 6
#: Side of the tiles (pixels) on which :func:`find_artefacts` evaluates the exact scores.
_TILE = 16
#: Pixels each smoothing filter reads around its centre (the footprint of ``G``).
_FOOTPRINTS = {"blob": np.ones((9, 9), bool), "row": np.ones((1, 3), bool), "column": np.ones((3, 1), bool),
               "diagonal": np.eye(3, dtype=bool), "antidiagonal": np.eye(3, dtype=bool)[::-1]}


def _block_levels(image, block: int) -> np.ndarray:
    """The coarse background (photons): the lower envelope of the blocks' 20th percentiles.

    Each block of ``block`` x ``block`` pixels gives its 20th percentile; each block then
    takes the lowest of its own and its eight neighbours' values. The shape test's bound holds
    for any background at or below the true one (a lower ``b`` only lowers every score), but
    not above it: inside a region filled with atoms fewer than a fifth of a block's pixels
    may be free of their light, and its percentile then lies far above the background (on a
    filled 16 x 16 site region with a 2.7 pixel PSF, 6 photons per pixel above a background
    of 0.4, which made 13 % of the pixels fail the test).
    """
    h, w = image.shape
    block = max(1, min(int(block), h, w))
    hb, wb = h // block, w // block
    crop = image[:hb * block, :wb * block].reshape(hb, block, wb, block).transpose(0, 2, 1, 3)
    levels = np.percentile(crop.reshape(hb, wb, -1), 20, axis=2)
    return ndimage.minimum_filter(levels, size=3, mode="nearest")


def _interpolation_axis(n_out: int, n_in: int, index):
    """Lower and upper block and weight of the upper one, for pixel ``index`` along one axis."""
    x = np.clip((np.asarray(index) + 0.5) * (n_in / n_out) - 0.5, 0.0, n_in - 1)
    i0 = np.floor(x).astype(np.int64)
    return i0, np.minimum(i0 + 1, n_in - 1), x - i0


def _interpolated(levels, shape, rows, cols) -> np.ndarray:
    """Block levels interpolated linearly to pixels (``rows``, ``cols``: broadcastable integer
    arrays) of a frame of ``shape``.

    The same interpolation as :func:`scipy.ndimage.zoom` with ``order=1, grid_mode=True,
    mode="nearest"`` (block centres at ``(i + 0.5) * block - 0.5``, constant beyond the outer
    centres), written per pixel so that any window of the frame gets the same values.
    """
    r0, r1, fr = _interpolation_axis(shape[0], levels.shape[0], rows)
    c0, c1, fc = _interpolation_axis(shape[1], levels.shape[1], cols)
    top = levels[r0, c0] * (1.0 - fc) + levels[r0, c1] * fc
    bottom = levels[r1, c0] * (1.0 - fc) + levels[r1, c1] * fc
    return top * (1.0 - fr) + bottom * fr


def _norm(scale: str, k: float) -> float:
    """``sum((F - k G)^2)`` of the filter ``scale`` (the noise factor of its score)."""
    key = (scale, float(k))
    if key not in _NORMS:
        g, f = _filters(scale)
        _NORMS[key] = float(np.sum((f - k * g) ** 2))
    return _NORMS[key]


_NORMS: dict = {}


def _screen(image, levels, *, ks, camera: CameraModel, n_sigma: float, scales=SCALES, strip: int = 48) -> np.ndarray:
    """:func:`_screen_rows` over strips of ``strip`` rows (with :data:`_REACH` rows either side,
    so that each strip's rows get the whole frame's values; small arrays stay in the cache)."""
    h, w = image.shape
    # the background interpolated along rows once; per strip along columns (as :func:`_interpolated`)
    c0, c1, fc = _interpolation_axis(w, levels.shape[1], np.arange(w))
    along = levels[:, c0] * (1.0 - fc) + levels[:, c1] * fc
    flag = np.empty(image.shape, bool)
    for r0 in range(0, h, strip):
        r1 = min(h, r0 + strip)
        w0, w1 = max(0, r0 - _REACH), min(h, r1 + _REACH)
        i0, i1, fr = _interpolation_axis(h, levels.shape[0], np.arange(w0, w1))
        bg = along[i0] * (1.0 - fr)[:, None] + along[i1] * fr[:, None]
        part = _screen_rows(image[w0:w1], bg, ks=ks, camera=camera, n_sigma=n_sigma, scales=scales,
                            first=w0 == 0, last=w1 == h)
        flag[r0:r1] = part[r0 - w0:r1 - w0]
    return flag


def _edges_smoothed(out, lap, edge_rows) -> None:
    """Put the blob smoothing of ``lap`` into ``out`` within :data:`_REACH` pixels of the frame's
    edges (left and right always; top and bottom where ``edge_rows`` says the strip holds them)."""
    h, w = lap.shape
    d = 2 * _REACH
    blur = lambda a: ndimage.gaussian_filter(a, 1.0, mode="nearest", truncate=4.0)  # noqa: E731
    out[:, :_REACH] = blur(lap[:, :d])[:, :_REACH]
    out[:, w - _REACH:] = blur(lap[:, w - d:])[:, d - _REACH:]
    if edge_rows[0]:
        out[:_REACH] = blur(lap[:d])[:_REACH]
    if edge_rows[1]:  # a short last strip may hold fewer than d rows
        out[h - _REACH:] = blur(lap[max(h - d, 0):])[-_REACH:]


def _screen_rows(image, top, *, ks, camera: CameraModel, n_sigma: float, scales=SCALES, first: bool = True,
                 last: bool = True) -> np.ndarray:
    """Pixels whose score in :func:`_scores` may exceed ``n_sigma``: a bound that misses none.

    Each score is ``(G L - k G v + k b) / sqrt(norm G var)`` (``G`` the smoothing, a weighted
    mean; ``L`` the Laplacian; ``top`` the background ``b`` of these rows, up to rounding), and
    the camera's variance is ``a max(v, 0) + c``, so
    ``G var >= a max(G v, 0) + c`` (Jensen: ``max(v, 0)`` is convex). The bound replaces
    ``G var`` by this; it needs ``k >= 0``. For the single-pixel score the four
    neighbours' variances are bounded the same way by their sum ``4 v - L`` (and the pixel's
    own variance is written as ``a max(v, 0) + c``). The blob score's local-maximum condition
    is the same test on the same smoothed values. The level is lowered by a
    millionth against rounding.
    """
    c = float(camera.photon_variance(np.zeros(1))[0])
    a = float(camera.photon_variance(np.ones(1))[0]) - c
    t2 = (n_sigma * (1.0 - 1e-6)) ** 2
    h, w = image.shape
    vp = np.pad(image, 1, mode="edge")
    inner = (slice(1, h + 1), slice(1, w + 1))
    lap = 4.0 * image - vp[:-2, 1:-1] - vp[2:, 1:-1] - vp[1:-1, :-2] - vp[1:-1, 2:]
    lp = np.pad(lap, 1, mode="edge")
    flag = np.zeros(image.shape, bool)
    edge_rows = (first, last)
    steps = {"row": (0, 1), "column": (1, 0), "diagonal": (1, 1), "antidiagonal": (1, -1)}
    for scale, k in zip(scales, ks):
        q = t2 * _norm(scale, k)
        # each score needs a numerator above the level times the noise at zero photons (the
        # variance is at least c); the pixels that pass get the full bound
        if scale == "pixel":
            num = lap - k * image
            num += k * top
            r, col = np.nonzero(num > np.sqrt(t2 * ((4.0 - k) ** 2 + 4.0) * c) * (1.0 - 1e-9))
            v, n = image[r, col], num[r, col]
            var = a * (4.0 - k) ** 2 * np.maximum(v, 0.0) + a * np.maximum(4.0 * v - lap[r, col], 0.0)
            var += ((4.0 - k) ** 2 + 4.0) * c
            keep = n * n > t2 * var
            flag[r[keep], col[keep]] = True
            continue
        if scale == "blob":
            u = ndimage.gaussian_filter(image, 1.0, mode="nearest", truncate=4.0)  # as in _smooth: the same values
            # G L = L G v away from the edges (convolutions commute); within _REACH pixels of
            # the frame's edges the extended frames differ and G L is smoothed directly
            up = np.pad(u, 1, mode="edge")
            num = 4.0 * u - up[:-2, 1:-1] - up[2:, 1:-1] - up[1:-1, :-2] - up[1:-1, 2:]
            _edges_smoothed(num, lap, edge_rows)
            num -= k * u
            num += k * top
            r, col = np.nonzero(num > np.sqrt(c * q) * (1.0 - 1e-9))
            if r.size:
                near = np.pad(u, 1, mode="edge")
                local = np.max([near[r + 1 + dr, col + 1 + dc] for dr in (-1, 0, 1) for dc in (-1, 0, 1)], axis=0)
                s_u, n = u[r, col], num[r, col]
                keep = (s_u >= local) & (n * n > (a * q) * np.maximum(s_u, 0.0) + c * q)
                flag[r[keep], col[keep]] = True
            continue
        # three pixels along a line: sums (three times the means) of lap - k v and of v
        dr, dc = steps[scale]
        ends = [(slice(1 + sr, h + 1 + sr), slice(1 + sc, w + 1 + sc)) for sr, sc in ((-dr, -dc), (dr, dc))]
        e = lp - k * vp
        num = e[inner] + e[ends[0]] + e[ends[1]]
        num += (3.0 * k) * top
        r, col = np.nonzero(num > np.sqrt(9.0 * c * q) * (1.0 - 1e-9))
        if r.size:
            sv = vp[r + 1, col + 1] + vp[r + 1 - dr, col + 1 - dc] + vp[r + 1 + dr, col + 1 + dc]
            n = num[r, col]
            keep = n * n > (3.0 * a * q) * np.maximum(sv, 0.0) + 9.0 * c * q
            flag[r[keep], col[keep]] = True
    return flag


def _hysteresis(score, low: float, high: float) -> np.ndarray:
    """Pixels of 4-connected groups above ``low`` holding a pixel above ``high`` (as
    :func:`skimage.filters.apply_hysteresis_threshold`, which the whole-frame form uses)."""
    labels, n = ndimage.label(score > min(low, high))
    keep = np.zeros(n + 1, bool)
    keep[labels[score > high]] = True
    keep[0] = False
    return keep[labels]


def _excess_reference(image, *, ks, camera: CameraModel, block: int, n_sigma: float, grow_sigma: float,
                      finite) -> tuple[np.ndarray, np.ndarray]:
    """The whole-frame form of :func:`_excess_windows` (every score on every pixel; slow, for tests)."""
    score, _ = _excess(image, ks=ks, camera=camera, block=block)
    return apply_hysteresis_threshold(np.where(finite, score, -np.inf), grow_sigma, n_sigma), _block_levels(image, block)


def _excess_windows(image, *, ks, camera: CameraModel, block: int, n_sigma: float, grow_sigma: float,
                    finite) -> tuple[np.ndarray, np.ndarray]:
    """Hysteresis mask of :func:`_excess` (``grow_sigma``, ``n_sigma``), the exact scores
    computed only on tiles near screened pixels; and the block levels of the background.

    Tiles are added where a hit's connected pixels reach unevaluated tiles, until every hit
    is closed, so the mask equals the whole-frame one.
    """
    h, w = image.shape
    levels = _block_levels(image, block)
    if min(ks) < 0:  # the screen's bound needs k >= 0 (a PSF sharper than a pixel): whole frame
        bg = _interpolated(levels, image.shape, np.arange(h)[:, None], np.arange(w)[None, :])
        score = _scores(image, bg, ks=ks, camera=camera)
        return apply_hysteresis_threshold(np.where(finite, score, -np.inf), grow_sigma, n_sigma), levels
    side = _TILE + 2 * _REACH
    if h < side or w < side:  # too small for windows: whole frame
        bg = _interpolated(levels, image.shape, np.arange(h)[:, None], np.arange(w)[None, :])
        score = _scores(image, bg, ks=ks, camera=camera)
        return apply_hysteresis_threshold(np.where(finite, score, -np.inf), grow_sigma, n_sigma), levels
    flag = _screen(image, levels, ks=ks, camera=camera, n_sigma=n_sigma) & finite
    th, tw = -(-h // _TILE), -(-w // _TILE)
    todo = np.zeros((th, tw), bool)
    r, c = np.nonzero(flag)
    todo[r // _TILE, c // _TILE] = True
    done = np.zeros_like(todo)
    score = np.full(image.shape, -np.inf)
    core = np.zeros(image.shape, bool)
    span = np.arange(side)
    while todo.any():
        ti, tj = np.nonzero(todo)
        # one window of side x side pixels per tile, inside the frame, reaching _REACH beyond the tile
        wr = np.clip(ti * _TILE - _REACH, 0, h - side)
        wc = np.clip(tj * _TILE - _REACH, 0, w - side)
        rows = (wr[:, None] + span)[:, :, None]
        cols = (wc[:, None] + span)[:, None, :]
        s = _scores(image[rows, cols], _interpolated(levels, image.shape, rows, cols), ks=ks, camera=camera)
        for n in range(len(ti)):
            r0, c0 = ti[n] * _TILE, tj[n] * _TILE
            r1, c1 = min(h, r0 + _TILE), min(w, c0 + _TILE)
            score[r0:r1, c0:c1] = s[n, r0 - wr[n]:r1 - wr[n], c0 - wc[n]:c1 - wc[n]]
        score[~finite] = -np.inf
        done |= todo
        core = _hysteresis(score, grow_sigma, n_sigma)
        # hits whose pixels touch tiles not evaluated yet (4-neighbours): evaluate those too
        r, c = np.nonzero(core)
        todo = np.zeros_like(done)
        for dr, dc in ((-1, 0), (1, 0), (0, -1), (0, 1)):
            rr, cc = r + dr, c + dc
            inside = (rr >= 0) & (rr < h) & (cc >= 0) & (cc < w)
            todo[rr[inside] // _TILE, cc[inside] // _TILE] = True
        todo &= ~done
    return core, levels


def _default_psf() -> PSFModel:
    from latticeread.core.psf import gaussian_psf

    return gaussian_psf(fwhm=SHARPEST_FWHM)


def _check(image) -> np.ndarray:
    image = np.asarray(image, dtype=float)
    if image.ndim != 2:
        raise ValueError(f"expected one 2-D frame, got shape {image.shape}")
    return image


def find_artefacts(image, *, psf: PSFModel | None = None, camera: CameraModel | None = None,
                   ks=None, n_sigma: float = 5.5, grow_sigma: float = 3.0,
                   known=None, block: int = 32) -> ArtefactResult:
    """Cosmic-ray hits and hot pixels of one frame (shape test against the PSF).

    Parameters
    ----------
    image : (H, W) ndarray
        Frame in photons per pixel (after :meth:`CameraModel.counts_to_photons`); non-finite
        pixels are ignored.
    psf : PSFModel, optional
        The image of one atom; default: the sharpest PSF the program handles
        (:data:`SHARPEST_FWHM`), which catches single pixels but not streaks.
    camera : CameraModel, optional
        Noise model (photons); default: Poisson only.
    ks : tuple of float, optional
        The PSF's bounds from :func:`bounds` (computed from ``psf`` when not given; pass them
        when many frames share one PSF).
    n_sigma : float
        Detection level of the shape test in standard deviations of the camera noise.
    grow_sigma : float
        Pixels connected to a detection that fail the shape test at this lower level join
        the hit (hysteresis, :func:`skimage.filters.apply_hysteresis_threshold`), and so do
        pixels next to it that exceed the local median by this many standard deviations (the
        faint edge of a blob), up to three pixels out.
    known : (H, W) ndarray of bool, optional
        Pixels known to be bad (hot pixels of the stack, dark-frame analysis): always in the mask.
    block : int
        Block size (pixels) of the smooth background estimate.

    Returns
    -------
    ArtefactResult

    Raises
    ------
    ValueError
        The image is not 2-D, or ``known`` has another shape.
    """
    image = _check(image)
    camera = camera or CameraModel()
    if ks is None:
        ks = bounds(_default_psf() if psf is None else psf)
    if known is not None:
        known = np.asarray(known, dtype=bool)
        if known.shape != image.shape:
            raise ValueError(f"the known bad-pixel mask is {known.shape[0]}x{known.shape[1]} pixels but the frame "
                             f"is {image.shape[0]}x{image.shape[1]}")
    finite = np.isfinite(image)
    work = image if finite.all() else np.where(finite, image, np.nanmedian(image) if finite.any() else 0.0)
    if known is not None and known.any() and not known.all():
        work = fill_pixels(work, known)  # known bad pixels must not make their neighbours fail
    # hysteresis: a hit is a group of pixels failing the test at ``grow_sigma`` with at least
    # one failing it at ``n_sigma`` (faint streaks: every pixel a little too sharp)
    core, levels = _excess_windows(work, ks=ks, camera=camera, block=block, n_sigma=n_sigma,
                                   grow_sigma=grow_sigma, finite=finite)
    if known is not None:  # known bad pixels are single pixels: not grown
        core &= ~known
        if not core.any():
            return ArtefactResult(mask=known.copy(), n_hits=0, n_pixels=int(known.sum()), charge=0.0)
    if not core.any():
        return ArtefactResult(mask=core, n_hits=0, n_pixels=0, charge=0.0)
    mask = _grow(work, core, camera=camera, grow_sigma=grow_sigma)
    if known is not None:
        mask |= known
        core |= known
    labels, n_all = ndimage.label(mask, structure=np.ones((3, 3), bool))
    n_hits = n_all
    if known is not None and known.any():  # hits that are not (only) known bad pixels
        n_hits = int(np.count_nonzero(ndimage.maximum(core & ~known, labels, np.arange(1, n_all + 1))))
    rows, cols = np.nonzero(mask)
    charge = float(np.sum(work[rows, cols] - _interpolated(levels, work.shape, rows, cols)))
    return ArtefactResult(mask=mask, n_hits=int(n_hits), n_pixels=int(mask.sum()), charge=charge)


def _grow(image, core, *, camera: CameraModel, grow_sigma: float, steps: int = 3) -> np.ndarray:
    """Core pixels, their 8 neighbours, and connected pixels well above the local median."""
    mask = ndimage.binary_dilation(core, structure=np.ones((3, 3), bool))
    labels, n = ndimage.label(mask, structure=np.ones((3, 3), bool))
    pad = steps + 3
    for sl in ndimage.find_objects(labels):
        r0, r1 = max(0, sl[0].start - pad), min(image.shape[0], sl[0].stop + pad)
        c0, c1 = max(0, sl[1].start - pad), min(image.shape[1], sl[1].stop + pad)
        sub = image[r0:r1, c0:c1]
        held = mask[r0:r1, c0:c1]
        level = np.median(sub[~held]) if (~held).any() else np.median(sub)
        sigma = np.sqrt(np.maximum(camera.photon_variance(np.full(1, level))[0], 1e-12))
        high = sub > level + grow_sigma * sigma
        region = held.copy()
        for _ in range(steps):
            grown = ndimage.binary_dilation(region, structure=np.ones((3, 3), bool)) & high
            if not (grown & ~region).any():
                break
            region |= grown
        mask[r0:r1, c0:c1] |= region
    return mask


def find_hot_pixels(stack, *, psf: PSFModel | None = None, camera: CameraModel | None = None,
                    n_sigma: float = 4.0, fraction: float = 0.5, min_frames: int = 3) -> np.ndarray:
    """Pixels that fail the shape test in most frames of a stack: hot pixels.

    Parameters
    ----------
    stack : (n, H, W) ndarray
        Frames in photons per pixel.
    psf, camera :
        As for :func:`find_artefacts`.
    n_sigma : float
        Detection level per frame (lower than for single hits: the majority vote over frames
        keeps out noise).
    fraction : float
        Share of frames in which a pixel must fail the test.
    min_frames : int
        Fewer frames cannot tell a hot pixel from a cosmic-ray hit: an all-False mask is
        returned (every frame's hits are still found by :func:`find_artefacts`).

    Returns
    -------
    (H, W) ndarray of bool
    """
    stack = np.asarray(stack, dtype=float)
    if stack.ndim != 3:
        raise ValueError(f"expected a stack of frames (n, H, W), got shape {stack.shape}")
    hot = np.zeros(stack.shape[1:], bool)
    if len(stack) < min_frames:
        return hot
    camera = camera or CameraModel()
    ks = bounds(_default_psf() if psf is None else psf)
    count = np.zeros(stack.shape[1:], np.int32)
    for frame in stack:
        finite = np.isfinite(frame)
        work = frame if finite.all() else np.where(finite, frame, np.nanmedian(frame))
        score, _ = _excess(work, ks=ks[:1], camera=camera, block=32, scales=SCALES[:1])
        count += score > n_sigma
    hot = count >= max(2, int(np.ceil(fraction * len(stack))))
    return hot


def fill_pixels(image, mask, *, sigma: float = 1.5) -> np.ndarray:
    """The image with masked pixels replaced by a Gaussian-weighted mean of unmasked neighbours.

    For steps that cannot leave pixels out (Fourier lattice estimate, PSF averaging, the phase
    search, deconvolution); the site fit leaves them out instead. Works box by box around the
    masked groups, so a few hits cost little on a large frame.

    Parameters
    ----------
    image : (H, W) ndarray
    mask : (H, W) ndarray of bool
        Pixels to replace.
    sigma : float
        Width of the Gaussian weight, pixels (doubled until every masked pixel has neighbours).

    Returns
    -------
    (H, W) ndarray of float (a copy; ``image`` is not changed)
    """
    image = np.asarray(image, dtype=float)
    mask = np.asarray(mask, dtype=bool)
    out = image.copy()
    if not mask.any():
        return out
    if mask.all():
        raise ValueError("every pixel is masked; nothing to fill them from")
    pad = int(np.ceil(4 * sigma)) + 1
    labels, _ = ndimage.label(ndimage.binary_dilation(mask, iterations=pad))
    for sl in ndimage.find_objects(labels):
        sub_mask = mask[sl]
        if not sub_mask.any():
            continue
        sub = image[sl]
        todo = sub_mask.copy()
        s = float(sigma)
        while todo.any():
            num = ndimage.gaussian_filter(np.where(sub_mask, 0.0, sub), s, mode="nearest")
            den = ndimage.gaussian_filter((~sub_mask).astype(float), s, mode="nearest")
            ok = todo & (den > 1e-3)
            out[sl][ok] = num[ok] / den[ok]
            todo &= ~ok
            if s > max(sub.shape):
                out[sl][todo] = float(np.median(image[~mask]))
                break
            s *= 2
    return out


def hot_pixel_mask(pixels, frame_shape) -> np.ndarray:
    """(H, W) bool mask from a list of ``[row, col]`` pairs (as stored in a calibration's notes).

    Raises
    ------
    ValueError
        A pair is malformed or lies outside the frame.
    """
    mask = np.zeros(tuple(int(v) for v in frame_shape), bool)
    if not pixels:
        return mask
    rc = np.asarray(pixels, dtype=np.int64)
    if rc.ndim != 2 or rc.shape[1] != 2:
        raise ValueError(f"hot pixels must be [row, col] pairs, got an array of shape {rc.shape}")
    if rc.min() < 0 or (rc[:, 0] >= mask.shape[0]).any() or (rc[:, 1] >= mask.shape[1]).any():
        raise ValueError(f"a hot pixel lies outside the {mask.shape[0]}x{mask.shape[1]}-pixel frame")
    mask[rc[:, 0], rc[:, 1]] = True
    return mask


class ArtefactFinder:
    """Per-frame search for cosmic-ray hits, with a calibration's PSF, camera and hot pixels.

    The PSF's bounds are computed once. The calibration's hot pixels
    (``calibration.options.hot_pixels``, found by :func:`find_hot_pixels` when calibrating)
    are always left out.

    Parameters
    ----------
    calibration : Calibration
    frame_shape : (int, int)
    crop : tuple of slice, optional
        The part of the frame the fit reads; the search looks only there.
    n_sigma : float
        Detection level (see :func:`find_artefacts`).
    enabled : bool
        Search every frame (True) or only leave out the hot pixels.
    """

    def __init__(self, calibration, frame_shape, *, crop=None, n_sigma: float = 5.5, enabled: bool = True):
        self.enabled = bool(enabled)
        self.frame_shape = tuple(int(v) for v in frame_shape)
        self.crop = crop if crop is not None else (slice(0, self.frame_shape[0]), slice(0, self.frame_shape[1]))
        self.camera = calibration.camera
        self.n_sigma = float(n_sigma)
        self.hot = hot_pixel_mask(calibration.options.hot_pixels, self.frame_shape)
        self.ks = bounds(calibration.psf) if self.enabled else None

    def __call__(self, photons):
        """``(mask or None, photons with the mask filled, warnings)`` for one frame in photons.

        The mask holds this frame's hits only; the hot pixels (:attr:`hot`) are left out of
        the fit once and for all by the caller.
        """
        photons = np.asarray(photons, dtype=float)
        if not self.enabled:
            return None, photons, []
        sub = photons[self.crop]
        found = find_artefacts(sub, camera=self.camera, ks=self.ks, n_sigma=self.n_sigma, known=self.hot[self.crop])
        if not found.n_hits:
            return None, photons, []
        if found.n_pixels > MAX_MASKED_FRACTION * sub.size:
            return None, photons, [f"{100 * found.n_pixels / sub.size:.0f} % of the pixels are sharper than the PSF "
                                   "allows: the frame does not look like images of atoms through this PSF (wrong "
                                   "calibration?); no pixels were left out"]
        mask = np.zeros(self.frame_shape, bool)
        mask[self.crop] = found.mask
        mask &= ~self.hot & np.isfinite(photons)  # non-finite pixels are left out (and flagged) by the fit
        warnings = [f"{ARTEFACT_WARNING}: {found.n_hits} sharp spot(s) that do not look like the PSF "
                    f"({int(mask.sum())} pixels) were left out of the fit; the sites they touch are flagged "
                    "'artefact'"]
        return mask, fill_pixels(photons, mask | self.hot), warnings


class PixelModel:
    """The fitted site model's value at chosen pixels (the PSF tabulated once, pixel-integrated).

    Parameters
    ----------
    psf : PSFModel
    """

    def __init__(self, psf: PSFModel):
        from latticeread.core.amplitudes import pixel_integrated_table

        table, k, half = pixel_integrated_table(psf, oversample=2)
        self.table, self.k, self.half, self.radius = table, int(k), int(half), int(psf.radius)
        # stamps are normalised to unit flux inside their (2 r + 1)^2 window
        grid = half + np.arange(-self.radius, self.radius + 1) * k
        self.norm = float(table[np.ix_(grid, grid)].sum())

    def __call__(self, rows, cols, *, x, y, amplitudes, background: float) -> np.ndarray:
        """Photons predicted at pixels ``(rows, cols)`` by sites at ``(x, y)`` with ``amplitudes``."""
        rows = np.asarray(rows, dtype=float)
        cols = np.asarray(cols, dtype=float)
        out = np.full(rows.shape, float(background))
        if rows.size == 0:
            return out
        r = self.radius
        near = ((x > cols.min() - r - 1) & (x < cols.max() + r + 1) & (y > rows.min() - r - 1) &
                (y < rows.max() + r + 1) & np.isfinite(amplitudes))
        sx, sy, sa = x[near], y[near], amplitudes[near]
        dx = cols[:, None] - sx[None, :]
        dy = rows[:, None] - sy[None, :]
        inside = (np.abs(np.rint(dx)) <= r) & (np.abs(np.rint(dy)) <= r)
        coords = [np.clip(dy * self.k + self.half, 0, self.table.shape[0] - 1).ravel(),
                  np.clip(dx * self.k + self.half, 0, self.table.shape[1] - 1).ravel()]
        values = ndimage.map_coordinates(self.table, coords, order=1).reshape(dx.shape) / self.norm
        return out + np.sum(np.where(inside, values * sa[None, :], 0.0), axis=1)


def model_fill(photons, mask, *, x, y, amplitudes, background, model: PixelModel) -> np.ndarray:
    """The frame with the masked pixels replaced by the fitted site model's prediction.

    One step of the expectation-maximisation iteration for least squares with missing pixels
    (fill, fit, fill with the fit, ...), which converges to the fit that leaves the pixels out
    (Dempster, Laird & Rubin, J. R. Stat. Soc. B 39, 1 (1977); from memory).

    Parameters
    ----------
    photons : (H, W) ndarray
        Frame in photons per pixel.
    mask : (H, W) ndarray of bool
        Pixels to replace.
    x, y : (N,) ndarray
        Site centres of the fit, pixels.
    amplitudes : (N,) ndarray
        Fitted photons per site.
    background : float
        Fitted background, photons per pixel.
    model : PixelModel
        The PSF tabulated for this evaluation.

    Returns
    -------
    (H, W) ndarray of float (a copy)
    """
    out = np.array(photons, dtype=float)
    x, y, amplitudes = (np.asarray(v, dtype=float) for v in (x, y, amplitudes))
    labels, _ = ndimage.label(mask, structure=np.ones((3, 3), bool))
    for i, sl in enumerate(ndimage.find_objects(labels), start=1):
        rows, cols = np.nonzero(labels[sl] == i)
        rows, cols = rows + sl[0].start, cols + sl[1].start
        out[rows, cols] = model(rows, cols, x=x, y=y, amplitudes=amplitudes, background=float(background))
    return out


def refit_near_artefacts(photons, mask, *, x, y, amplitudes, background, model: PixelModel,
                         bad=None) -> np.ndarray:
    """Amplitudes of the sites near masked pixels, refitted on the pixels around them that are left.

    For every group of masked pixels, the sites within a stamp radius of it are refitted by
    least squares on the unmasked pixels within two stamp radii of the group, with every other
    site's light (its current amplitude) and the background held fixed. This is the fit that
    leaves the masked pixels out, solved locally: the fill-and-fit steps
    (:func:`model_fill`) converge slowly for a site whose core is masked, and stop wherever
    their start put it.

    Parameters
    ----------
    photons : (H, W) ndarray
        The frame, photons per pixel.
    mask : (H, W) ndarray of bool
        Pixels left out (this frame's hits).
    x, y, amplitudes : (N,) ndarray
        Site centres (pixels) and current amplitudes (photons).
    background : float or (H, W) ndarray
        Fitted background, photons per pixel.
    model : PixelModel
    bad : (H, W) ndarray of bool, optional
        Further pixels never used (hot pixels, saturated pixels); non-finite ones never are.

    Returns
    -------
    (N,) ndarray
        The amplitudes, changed only for the sites near masked pixels.
    """
    photons = np.asarray(photons, dtype=float)
    mask = np.asarray(mask, dtype=bool)
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    out = np.array(amplitudes, dtype=float)
    unusable = mask | ~np.isfinite(photons)
    if bad is not None:
        unusable |= np.asarray(bad, dtype=bool)
    h, w = photons.shape
    r = model.radius
    labels, _ = ndimage.label(ndimage.binary_dilation(mask, iterations=r), structure=np.ones((3, 3), bool))
    for i, sl in enumerate(ndimage.find_objects(labels), start=1):
        y0, y1, x0, x1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop  # group grown by r
        near = (x >= x0 - 0.5) & (x < x1 - 0.5) & (y >= y0 - 0.5) & (y < y1 - 0.5) & np.isfinite(out)
        if not near.any():
            continue
        wy0, wy1, wx0, wx1 = max(y0 - r, 0), min(y1 + r, h), max(x0 - r, 0), min(x1 + r, w)
        rows, cols = np.nonzero(~unusable[wy0:wy1, wx0:wx1])
        rows, cols = rows + wy0, cols + wx0
        idx = np.flatnonzero(near)
        if rows.size <= idx.size:
            continue
        others = ~near & np.isfinite(out)
        fixed = model(rows, cols, x=x[others], y=y[others], amplitudes=out[others], background=0.0)
        level = background[rows, cols] if np.ndim(background) == 2 else float(background)
        target = photons[rows, cols] - fixed - level
        design = np.stack([model(rows, cols, x=x[k:k + 1], y=y[k:k + 1], amplitudes=np.ones(1), background=0.0)
                           for k in idx], axis=1)
        solution, *_ = np.linalg.lstsq(design, target, rcond=None)
        out[idx] = solution
    return out


@dataclass(frozen=True)
class CleanedStack:
    """A stack with its cosmic-ray hits and hot pixels filled in (for calibration steps).

    Attributes
    ----------
    frames : (n, H, W) ndarray of float
        Photons per pixel, artefact pixels replaced by their neighbours' mean.
    hot : (H, W) ndarray of bool
        Hot pixels (bad in most frames).
    n_hits : int
        Cosmic-ray hits found over all frames (hot pixels not counted).
    n_pixels : int
        Pixels filled over all frames.
    """

    frames: np.ndarray = field(repr=False)
    hot: np.ndarray = field(repr=False)
    n_hits: int = 0
    n_pixels: int = 0


def clean_stack(stack, *, psf: PSFModel | None = None, camera: CameraModel | None = None,
                known=None) -> CleanedStack:
    """Find hot pixels (:func:`find_hot_pixels`) and each frame's hits, and fill them in.

    Parameters
    ----------
    stack : (n, H, W) ndarray
        Frames in photons per pixel.
    psf : PSFModel, optional
        The image of one atom (default: the sharpest the program handles, which finds single
        pixels but not streaks; run again once the PSF is measured).
    camera : CameraModel, optional
        Noise model.
    known : (H, W) ndarray of bool, optional
        Pixels already known to be bad (added to the hot pixels).

    Returns
    -------
    CleanedStack
    """
    stack = np.asarray(stack, dtype=float)
    if stack.ndim != 3:
        raise ValueError(f"expected a stack of frames (n, H, W), got shape {stack.shape}")
    camera = camera or CameraModel()
    psf = psf or _default_psf()
    hot = find_hot_pixels(stack, psf=psf, camera=camera)
    if known is not None:
        hot = hot | np.asarray(known, dtype=bool)
    ks = bounds(psf)
    frames = np.empty_like(stack)
    n_hits = n_pixels = 0
    for i, frame in enumerate(stack):
        found = find_artefacts(frame, camera=camera, ks=ks, known=hot)
        if found.n_pixels > MAX_MASKED_FRACTION * frame.size:  # not hits: the frame is not atoms' light
            frames[i] = frame
            continue
        n_hits += found.n_hits
        n_pixels += found.n_pixels
        frames[i] = fill_pixels(frame, found.mask) if found.n_pixels else frame
    return CleanedStack(frames=frames, hot=hot, n_hits=int(n_hits), n_pixels=int(n_pixels))
