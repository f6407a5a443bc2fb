"""Measure the point-spread function from isolated atoms in sparse frames.

Steps (:func:`estimate_psf`):

1. **Bright sites.** Each frame is split into lattice cells (every pixel belongs to its
   nearest site); the background-subtracted sum over a cell is a quick site brightness.
   A two-component threshold (:func:`latticeread.core.classify.select_threshold`) on the
   pooled cell sums separates bright sites from empty ones.
2. **Lattice phase per frame.** The offset of the given geometry is re-fitted from the
   Gaussian-weighted centroids of the bright sites: the mean (circular, modulo one lattice
   cell) displacement of the centroids from their nearest sites.
3. **Isolated atoms.** Bright sites with no other bright site within ``min_separation``
   pixels (default: twice a first FWHM guess) and a window fully inside the frame. Pixels
   close to bright sites farther away are left out of the fit.
4. **Sub-pixel average.** Each atom is placed at its lattice position; every camera pixel
   of its window is the integral of the PSF over that pixel, i.e. the mean of
   ``supersample x supersample`` cells of the unknown fine kernel. Atoms at different
   sub-pixel positions sample different sets of cells, so the fine kernel (a density, no
   pixel blur) follows from one sparse linear least-squares problem with a weak smoothness
   penalty (squared Laplacian) that fixes the patterns pixel integration cannot see.
   Per-atom brightness is refitted and outlying pixels and atoms are
   clipped (``clip`` robust standard deviations) over a few rounds.
5. **Normalise and measure.** The kernel is re-centred on its weighted centroid and
   normalised (``kernel.sum() / supersample**2 == 1``); an ellipse fitted to the
   half-maximum contour gives the FWHM along its two axes, ``fwhm`` (their mean),
   ``ellipticity = 1 - minor/major`` and the axis angle (:func:`measure_kernel`).

Scope: the frames must be sparse (a few % filling), so that atoms with empty
surroundings exist; crowded frames raise :class:`~latticeread.errors.ReconstructionError`
with the number of isolated atoms found.
"""

from __future__ import annotations

import logging
import math

import numpy as np
from scipy import ndimage, sparse
from scipy.sparse import linalg as sparse_linalg
from scipy.spatial import cKDTree

from latticeread.core.classify import select_threshold
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import PSFModel, empirical_psf
from latticeread.errors import FrameError, ReconstructionError

__all__ = ["estimate_psf", "measure_kernel"]

logger = logging.getLogger(__name__)

#: Relative strength of the smoothness penalty on the fine kernel (dimensionless). Chosen on
#: noise-free Airy spots of FWHM 2-3.5 pixels: the FWHM comes out 0.1-0.6 % too wide.
SMOOTHING = 1.0
#: A site within the isolation distance brighter than this fraction of the atom's cell sum
#: counts as a second atom (light leaking from the atom gives much less).
NEIGHBOUR_RATIO = 0.5
#: Fewer atoms than this in the average give a warning.
FEW_ATOMS = 50
#: A re-centring shift larger than this (pixels) gives a warning.
MAX_CENTRE_SHIFT = 0.25


def estimate_psf(
    frames,
    geometry: LatticeGeometry | None = None,
    *,
    supersample: int = 4,
    radius: int | None = None,
    min_separation: float | None = None,
    threshold: float | None = None,
    max_atoms: int | None = None,
    min_atoms: int = 10,
    saturation: float | None = None,
    refit_offset: bool = True,
    clip: float = 5.0,
    n_rounds: int = 3,
) -> PSFModel:
    """Estimate an empirical PSF from isolated atoms.

    Parameters
    ----------
    frames : (H, W) or (N, H, W) array_like, or sequence of (image, LatticeGeometry)
        Sparse frames (counts or photons; only the shape of the spot matters). A stack (or
        any sequence of 2-D frames, e.g. a lazy frame stack) is used with the single
        ``geometry``; a sequence of pairs brings one geometry per
        frame. NaN/inf pixels are allowed: atoms whose window touches them are skipped.
    geometry : LatticeGeometry, optional
        Lattice vectors and offset (pixels) for a stack; None for a sequence of pairs.
    supersample : int
        Kernel samples per pixel and axis (the kernel grid step is ``1/supersample``
        pixels).
    radius : int, optional
        Half-size of the fitted window and of the PSF stamp, pixels (default
        ``ceil(2.5 FWHM)`` from a first guess, at least 3).
    min_separation : float, optional
        An atom is isolated when no other bright site lies within this distance, pixels
        (default: twice a first FWHM guess, at least the largest lattice spacing).
    threshold : float, optional
        Bright-site threshold on the background-subtracted sum over a lattice cell, in
        frame units (counts or photons); default: from the histogram of cell sums.
    max_atoms : int, optional
        Use at most this many isolated atoms (the first ones in frame order).
    min_atoms : int
        Fewest isolated atoms accepted.
    saturation : float, optional
        Pixel value (frame units) at which the camera saturates; atoms whose window holds
        a pixel at or above it are skipped (their core is clipped).
    refit_offset : bool
        Re-fit the lattice offset of every frame from its bright sites (True) or use the
        given offsets as they are.
    clip : float
        Pixels whose residual exceeds ``clip`` robust standard deviations, and atoms whose
        RMS residual exceeds ``clip`` times the median, are dropped.
    n_rounds : int
        Rounds of (kernel fit, brightness refit, clipping).

    Returns
    -------
    PSFModel
        ``kind="empirical"``; ``fwhm`` in pixels (mean of the principal-axis FWHMs);
        ``params``: ``n_atoms``, ``n_frames``, ``n_saturated_skipped``, ``ellipticity`` (1 - minor/major FWHM),
        ``fwhm_major``, ``fwhm_minor`` (pixels), ``major_axis_angle`` (radians from +x
        towards +y), ``centre_shift_x``, ``centre_shift_y`` (pixels the kernel was moved
        to centre it; a measure of the residual lattice-phase bias), the selection settings
        ``threshold``, ``min_separation``, and ``warnings`` (list of str: few
        atoms, many outliers, off-centre spot; empty when all is well).

    Raises
    ------
    FrameError
        Frames of the wrong dimensionality.
    ReconstructionError
        Fewer than ``min_atoms`` isolated atoms, or no bright sites at all.
    """
    s = int(supersample)
    if s < 1:
        raise ReconstructionError(f"supersample must be a positive integer, got {supersample}")
    pairs = _as_pairs(frames, geometry)
    n_frames = len(pairs)

    # --- 1. cell sums and bright sites ------------------------------------------------
    prepared = []
    clipped = []  # per frame: pixels at or above the saturation value
    for k, (image, geo) in enumerate(pairs):
        img = np.asarray(image, dtype=float)
        good = np.isfinite(img)
        with np.errstate(invalid="ignore"):
            clipped.append(None if saturation is None else good & (img >= float(saturation)))
        if not good.any():
            raise FrameError(f"frame {k} has no finite pixels")
        bg = float(np.median(img[good]))
        sub = np.where(good, img - bg, 0.0)
        prepared.append([sub, good, geo])

    sums = [_cell_sums(sub, geo) for sub, _, geo in prepared]
    if threshold is None:
        # local maxima only: a neighbour of an atom collects some of its light (the PSF is
        # about as wide as a cell) but is never brighter than the atom itself
        pooled = np.concatenate([v[full & peak] for v, full, _, peak in sums])
        if pooled.size < 3:
            raise ReconstructionError("the frames hold fewer than 3 complete lattice cells; cannot find atoms")
        result = select_threshold(pooled, method="mixture")
        if not np.isfinite(result.occupied_mean):
            raise ReconstructionError(
                f"found 0 isolated atoms in {n_frames} frames: no bright sites stand out of the background; "
                f"need at least {min_atoms}")
        threshold = result.threshold
    threshold = float(threshold)

    # --- 2. lattice offset per frame --------------------------------------------------
    if refit_offset:
        for item, (v, full, grid, peak) in zip(prepared, sums):
            sub, good, geo = item
            bright = (v > threshold) & full & peak
            if np.count_nonzero(bright) >= 3:
                item[2] = _refit_offset(sub, geo, grid.x[bright], grid.y[bright])
        sums = [_cell_sums(sub, geo) for sub, _, geo in prepared]

    bright_xy, above = [], []
    for (v, full, grid, peak) in sums:
        b = (v > threshold) & peak
        bright_xy.append(np.column_stack([grid.x[b], grid.y[b], v[b]]))
        b = v > threshold
        above.append(np.column_stack([grid.x[b], grid.y[b], v[b]]))
    n_bright = sum(len(b) for b in bright_xy)
    if n_bright == 0:
        raise ReconstructionError(
            f"found 0 isolated atoms in {n_frames} frames: no site is brighter than the threshold "
            f"{threshold:.4g}; need at least {min_atoms}")

    # --- 3. first FWHM guess, window size, isolation -----------------------------------
    spacing = max(prepared[0][2].spacings)
    fwhm0 = _fwhm_guess(prepared, [b[:, :2] for b in bright_xy], spacing)
    R = int(radius) if radius is not None else int(max(3, math.ceil(2.5 * fwhm0)))
    sep = float(min_separation) if min_separation is not None else max(3.0 * fwhm0, spacing)
    mask_radius = max(1.0, 2.0 * fwhm0, sep - 1.0 * fwhm0)

    # background: the median of a sparse frame is a good start but is biased for skewed
    # (EMCCD) noise; use the mean of the pixels farther than the window from every bright site
    for item, ab in zip(prepared, above):
        sub, good = item[0], item[1]
        far = good.copy()
        if len(ab):
            tree = cKDTree(ab[:, :2])
            yy, xx = np.nonzero(good)
            dist, _ = tree.query(np.column_stack([xx, yy]), distance_upper_bound=R + 1.0)
            far[yy, xx] = ~np.isfinite(dist)
        if np.count_nonzero(far) >= 50:
            item[0] = np.where(good, sub - float(np.mean(sub[far])), 0.0)

    atoms = []  # (frame index, x, y, positions of other bright sites near the window)
    n_saturated = 0
    for k, ((sub, good, geo), xy, ab) in enumerate(zip(prepared, bright_xy, above)):
        if len(xy) == 0:
            continue
        height, width = sub.shape
        tree = cKDTree(xy[:, :2])
        tree_above = cKDTree(ab[:, :2])
        n_close = np.array([len(v) for v in tree.query_ball_point(xy[:, :2], sep)])  # counts itself
        inside = ((xy[:, 0] >= R + 0.5) & (xy[:, 0] <= width - 1.5 - R)
                  & (xy[:, 1] >= R + 0.5) & (xy[:, 1] <= height - 1.5 - R))
        window_reach = math.sqrt(2) * (R + 0.5) + mask_radius
        for i in np.flatnonzero((n_close == 1) & inside):
            xi, yi = int(np.rint(xy[i, 0])), int(np.rint(xy[i, 1]))
            if not good[yi - R:yi + R + 1, xi - R:xi + R + 1].all():
                continue
            if clipped[k] is not None and clipped[k][yi - R:yi + R + 1, xi - R:xi + R + 1].any():
                n_saturated += 1
                continue
            # a second atom right next to this one need not be a local maximum: reject the
            # atom when a nearby site is more than half as bright
            near = [j for j in tree_above.query_ball_point(xy[i, :2], sep)
                    if np.hypot(*(ab[j, :2] - xy[i, :2])) > 1e-6 and ab[j, 2] > NEIGHBOUR_RATIO * xy[i, 2]]
            if near:
                continue
            others = [j for j in tree.query_ball_point(xy[i, :2], window_reach) if j != i]
            atoms.append((k, float(xy[i, 0]), float(xy[i, 1]), xy[others, :2]))
            if max_atoms is not None and len(atoms) >= int(max_atoms):
                break
        if max_atoms is not None and len(atoms) >= int(max_atoms):
            break
    if len(atoms) < int(min_atoms):
        sat_note = f"; {n_saturated} more were saturated" if n_saturated else ""
        raise ReconstructionError(
            f"found {len(atoms)} isolated atoms in {n_frames} frames ({n_bright} bright sites; isolated = no "
            f"other bright site within {sep:.1f} pixels{sat_note}); need at least {min_atoms}. Use sparser "
            f"frames or more of them")

    # --- 4. sub-pixel average by sparse least squares ---------------------------------
    kernel, n_used = _fit_kernel(prepared, atoms, R=R, s=s, mask_radius=mask_radius, clip=clip,
                                 n_rounds=n_rounds)
    if n_used < int(min_atoms):
        raise ReconstructionError(
            f"only {n_used} of {len(atoms)} isolated atoms survived outlier clipping; need at least {min_atoms}")

    # --- 5. centre, normalise, measure ------------------------------------------------
    kernel, shift = _recentre(kernel, s=s, fwhm_guess=fwhm0)
    total = kernel.sum() / s**2
    if not (np.isfinite(total) and total > 0):
        raise ReconstructionError("the averaged PSF has no positive flux; check the frames and the threshold")
    kernel = kernel / total
    m = measure_kernel(kernel, supersample=s)
    logger.info("PSF from %d atoms in %d frames: FWHM %.3f px, ellipticity %.3f", n_used, n_frames,
                m["fwhm"], m["ellipticity"])
    warnings = []
    if n_used < FEW_ATOMS:
        warnings.append(f"only {n_used} atoms went into the PSF: its wings are noisy "
                        f"({FEW_ATOMS} or more recommended)")
    if n_used < 0.7 * len(atoms):
        warnings.append(f"{len(atoms) - n_used} of {len(atoms)} isolated atoms were rejected as outliers: "
                        f"check the threshold and the lattice geometry")
    if math.hypot(*shift) > MAX_CENTRE_SHIFT:
        warnings.append(f"the averaged spot sits {math.hypot(*shift):.2f} pixels away from the lattice "
                        f"sites: the lattice offset may be biased")
    return empirical_psf(
        kernel, supersample=s, fwhm=m["fwhm"], radius=R,
        n_atoms=int(n_used), n_frames=int(n_frames), n_saturated_skipped=int(n_saturated), ellipticity=m["ellipticity"],
        fwhm_major=m["fwhm_major"], fwhm_minor=m["fwhm_minor"], major_axis_angle=m["major_axis_angle"],
        centre_shift_x=float(shift[0]), centre_shift_y=float(shift[1]), threshold=threshold,
        min_separation=sep, warnings=warnings)


def measure_kernel(kernel, *, supersample: int, n_angles: int = 90) -> dict:
    """Widths and shape of a centred PSF kernel.

    The central maximum is the vertex of a polynomial (quadratic plus even quartic terms)
    fitted to the kernel samples within half the half-maximum radius; the half-maximum radius is then found along
    ``n_angles`` directions and an ellipse ``1/r^2 = A cos^2 t + B sin^2 t + 2 C sin t cos t``
    is fitted to it (least squares), which averages the noise of single profiles.

    Parameters
    ----------
    kernel : (M, M) ndarray
        Density sampled every ``1/supersample`` pixel, centre at ``[M // 2, M // 2]``.
    supersample : int
        Samples per pixel.
    n_angles : int
        Directions at which the half-maximum radius is measured.

    Returns
    -------
    dict
        ``fwhm_major``, ``fwhm_minor`` (pixels; full widths at half maximum along the axes
        of the fitted ellipse), ``fwhm`` (their mean), ``ellipticity``
        (``1 - fwhm_minor / fwhm_major``), ``major_axis_angle`` (radians from +x towards +y,
        in [-pi/2, pi/2)).
    """
    k = np.asarray(kernel, dtype=float)
    s = float(supersample)
    c0, c1 = (k.shape[0] - 1) / 2, (k.shape[1] - 1) / 2
    yy, xx = np.mgrid[0:k.shape[0], 0:k.shape[1]]
    dx, dy = (xx - c1) / s, (yy - c0) / s
    # rough half-maximum radius from the area above half of the largest central value
    centre_val = float(k[int(round(c0)), int(round(c1))])
    if not centre_val > 0:
        raise ReconstructionError("the PSF kernel has no positive peak at its centre")
    r_half = math.sqrt(max(np.count_nonzero(k >= 0.5 * centre_val), 1) / s**2 / math.pi)
    near = np.hypot(dx, dy) <= max(0.5 * r_half, 2.5 / s)
    ex, ey = dx[near], dy[near]
    # quadratic plus even quartic terms, so the curvature of the peak does not bias its height
    X = np.column_stack([np.ones(ex.size), ex, ey, ex**2, ex * ey, ey**2, ex**4, ex**2 * ey**2, ey**4])
    coef, *_ = np.linalg.lstsq(X, k[near], rcond=None)
    H = np.array([[2 * coef[3], coef[4]], [coef[4], 2 * coef[5]]])
    try:
        v = -np.linalg.solve(H, coef[1:3])
        if np.hypot(*v) > 0.5 * r_half:
            raise np.linalg.LinAlgError
        peak = float(coef[0] + coef[1:3] @ v + 0.5 * v @ H @ v)
    except np.linalg.LinAlgError:
        peak = float(coef[0])
    if not peak > 0:
        raise ReconstructionError("the PSF kernel has no positive peak at its centre")
    theta = np.arange(int(n_angles)) * (2 * np.pi / int(n_angles))
    radii = np.array([_half_radius(k, (math.cos(t), math.sin(t)), s=s, peak=peak, centre=(c0, c1))
                      for t in theta])
    ct, st = np.cos(theta), np.sin(theta)
    D = np.column_stack([ct * ct, st * st, 2 * st * ct])
    (a, b, c), *_ = np.linalg.lstsq(D, 1.0 / radii**2, rcond=None)
    evals, evecs = np.linalg.eigh(np.array([[a, c], [c, b]]))
    if not np.all(evals > 0):
        raise ReconstructionError("the PSF core is not elliptical; cannot measure its width")
    major = 2.0 / math.sqrt(evals[0])
    minor = 2.0 / math.sqrt(evals[1])
    vec = evecs[:, 0]
    angle = float(np.arctan2(vec[1], vec[0]))
    angle = (angle + np.pi / 2) % np.pi - np.pi / 2  # an axis, not a direction
    return {"fwhm_major": float(major), "fwhm_minor": float(minor), "fwhm": float(0.5 * (major + minor)),
            "ellipticity": float(1.0 - minor / major), "major_axis_angle": angle}


# --- helpers ---------------------------------------------------------------------------
def _as_pairs(frames, geometry):
    if isinstance(frames, (list, tuple)) and len(frames) and isinstance(frames[0], (list, tuple)):
        pairs = []
        for k, item in enumerate(frames):
            if len(item) != 2 or not isinstance(item[1], LatticeGeometry):
                raise FrameError(f"item {k} of the frame list is not an (image, LatticeGeometry) pair")
            img = np.asarray(item[0])
            if img.ndim != 2:
                raise FrameError(f"frame {k} has shape {img.shape}; a 2-D image was expected")
            pairs.append((img, item[1]))
        return pairs
    if not isinstance(geometry, LatticeGeometry):
        raise ReconstructionError("a stack of frames needs a LatticeGeometry (or pass (image, geometry) pairs)")
    if not isinstance(frames, np.ndarray) and hasattr(frames, "__len__") and hasattr(frames, "__getitem__"):
        # a list of images or a lazy stack that hands out one frame at a time
        items = [np.asarray(frames[i]) for i in range(len(frames))]
        if items and all(f.ndim == 2 for f in items):
            if len({f.shape for f in items}) > 1:
                raise FrameError(f"frames differ in size: {sorted({f.shape for f in items})}")
            return [(f, geometry) for f in items]
        frames = items[0] if len(items) == 1 else items
    arr = np.asarray(frames)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[0] == 0:
        raise FrameError(f"frames have shape {arr.shape}; expected one (H, W) image or an (N, H, W) stack")
    return [(arr[k], geometry) for k in range(arr.shape[0])]


def _cell_sums(sub, geo):
    """Per-site sum of ``sub`` over the pixels nearest to each site.

    Returns (values (N,), full (N,) bool: cell entirely inside the frame, SiteGrid,
    peak (N,) bool: no site among the 8 index neighbours has a larger sum).
    """
    height, width = sub.shape
    grid = lattice_sites(geo, sub.shape)
    if len(grid) == 0:
        return np.zeros(0), np.zeros(0, bool), grid, np.zeros(0, bool)
    yy, xx = np.mgrid[0:height, 0:width]
    fr, fc = geo.fractional_indices(xx.ravel(), yy.ravel())
    ri = np.rint(fr).astype(np.int64) - grid.row_min
    ci = np.rint(fc).astype(np.int64) - grid.col_min
    ok = (ri >= 0) & (ri < grid.n_rows) & (ci >= 0) & (ci < grid.n_cols)
    flat = ri[ok] * grid.n_cols + ci[ok]
    size = grid.n_rows * grid.n_cols
    sums = np.bincount(flat, weights=sub.ravel()[ok], minlength=size)
    site_flat = (grid.rows - grid.row_min) * grid.n_cols + (grid.cols - grid.col_min)
    # a cell is complete when the site lies at least one cell diameter inside the frame
    reach = 0.5 * (abs(geo.a1[0]) + abs(geo.a2[0])), 0.5 * (abs(geo.a1[1]) + abs(geo.a2[1]))
    full = ((grid.x >= reach[0] - 0.5) & (grid.x <= width - 0.5 - reach[0])
            & (grid.y >= reach[1] - 0.5) & (grid.y <= height - 0.5 - reach[1]))
    values = sums[site_flat]
    mat = grid.to_matrix(values, fill=-np.inf, dtype=float)
    peak = values >= grid.from_matrix(ndimage.maximum_filter(mat, size=3, mode="constant", cval=-np.inf))
    return values, full, grid, peak


def _weighted_centroids(sub, x, y, sigma, n_iter=4):
    """Gaussian-weighted centroids (pixels) started at (x, y), iterated."""
    height, width = sub.shape
    r = int(math.ceil(3 * sigma))
    oy, ox = np.mgrid[-r:r + 1, -r:r + 1]
    cx, cy = np.asarray(x, float).copy(), np.asarray(y, float).copy()
    for _ in range(n_iter):
        xi, yi = np.rint(cx).astype(int), np.rint(cy).astype(int)
        px = np.clip(xi[:, None, None] + ox[None], 0, width - 1)
        py = np.clip(yi[:, None, None] + oy[None], 0, height - 1)
        vals = np.clip(sub[py, px], 0, None)
        g = np.exp(-((px - cx[:, None, None]) ** 2 + (py - cy[:, None, None]) ** 2) / (2 * sigma * sigma))
        wts = vals * g
        tot = wts.sum(axis=(1, 2))
        ok = tot > 0
        cx[ok] = (wts * px).sum(axis=(1, 2))[ok] / tot[ok]
        cy[ok] = (wts * py).sum(axis=(1, 2))[ok] / tot[ok]
    return cx, cy


def _refit_offset(sub, geo, x, y):
    """Offset moved by the mean displacement (modulo a cell) of bright-site centroids."""
    sigma = 0.35 * min(geo.spacings)
    cx, cy = _weighted_centroids(sub, x, y, sigma)
    fr, fc = geo.fractional_indices(cx, cy)
    weights = np.ones_like(fr)
    shift = []
    for f in (fr, fc):
        phase = np.exp(2j * np.pi * (f - np.rint(f)))
        shift.append(np.angle(np.sum(weights * phase)) / (2 * np.pi))
    d = geo.basis @ np.array(shift)
    return geo.with_offset((geo.offset[0] + d[0], geo.offset[1] + d[1]))


def _fwhm_guess(prepared, bright_xy, spacing):
    """Rough FWHM (pixels) from the half-maximum area of the mean bright-site window."""
    r = int(math.ceil(2.0 * spacing)) + 2
    acc = np.zeros((2 * r + 1, 2 * r + 1))
    n = 0
    for (sub, good, geo), xy in zip(prepared, bright_xy):
        if len(xy) == 0:
            continue
        height, width = sub.shape
        tree = cKDTree(xy)
        lonely = np.array([len(v) for v in tree.query_ball_point(xy, 1.5 * spacing)]) == 1
        for x, y in xy[lonely]:
            xi, yi = int(np.rint(x)), int(np.rint(y))
            if r <= xi < width - r and r <= yi < height - r:
                acc += sub[yi - r:yi + r + 1, xi - r:xi + r + 1]
                n += 1
    if n == 0:  # crowded frames: fall back to all bright sites
        for (sub, good, geo), xy in zip(prepared, bright_xy):
            height, width = sub.shape
            for x, y in xy:
                xi, yi = int(np.rint(x)), int(np.rint(y))
                if r <= xi < width - r and r <= yi < height - r:
                    acc += sub[yi - r:yi + r + 1, xi - r:xi + r + 1]
                    n += 1
    if n == 0:
        return float(spacing)
    acc = ndimage.zoom(acc, 4, order=1)
    peak = acc.max()
    labels, _ = ndimage.label(acc >= 0.5 * peak)
    area = np.count_nonzero(labels == labels[np.unravel_index(np.argmax(acc), acc.shape)]) / 16.0
    # subtract the blur of one pixel of integration and of integer alignment (variance 1/6)
    fwhm = 2.0 * math.sqrt(area / math.pi)
    sigma2 = max((fwhm / 2.3548) ** 2 - 1.0 / 6.0, 0.05)
    return float(2.3548 * math.sqrt(sigma2))


def _fit_kernel(prepared, atoms, *, R, s, mask_radius, clip, n_rounds):
    """Solve for the fine kernel (density, pixels^-2) from the isolated atoms' windows."""
    half = (R + 1) * s
    M = 2 * half + 1
    size = 2 * R + 1
    oy, ox = np.mgrid[-R:R + 1, -R:R + 1]
    sub_y, sub_x = np.mgrid[0:s, 0:s]
    n_atoms = len(atoms)
    obs = np.empty((n_atoms, size, size))
    keep = np.ones((n_atoms, size, size), bool)
    base = np.empty((n_atoms, size, size), np.int64)
    for a, (k, x, y, others) in enumerate(atoms):
        sub = prepared[k][0]
        xi, yi = int(np.rint(x)), int(np.rint(y))
        win = sub[yi - R:yi + R + 1, xi - R:xi + R + 1]
        px, py = xi + ox, yi + oy
        if len(others):
            d2 = np.min((px[None] - others[:, 0, None, None]) ** 2 + (py[None] - others[:, 1, None, None]) ** 2,
                        axis=0)
            keep[a] &= d2 > mask_radius**2
        # pixel centre offsets from the atom; the s x s kernel cells tiling the pixel start at
        # u - 1/2 + 1/(2s), rounded to the kernel grid
        u = px - x
        v = py - y
        qx = np.rint((u - 0.5 + 0.5 / s) * s).astype(np.int64) + half
        qy = np.rint((v - 0.5 + 0.5 / s) * s).astype(np.int64) + half
        base[a] = qy * M + qx
        # first brightness estimate: Gaussian-weighted sum around the atom
        g = np.exp(-(u * u + v * v) / (2 * (0.8 * mask_radius) ** 2))
        flux = float(np.sum(g * win * keep[a]))
        obs[a] = win / flux if flux > 0 else np.nan
        if not flux > 0:
            keep[a] = False
    # sparse design matrix: each pixel observation is the mean of s*s kernel cells
    n_obs = n_atoms * size * size
    cell_off = (sub_y * M + sub_x).ravel()
    cols = base.reshape(-1, 1) + cell_off[None, :]
    rows = np.repeat(np.arange(n_obs), s * s)
    A = sparse.csr_matrix((np.full(rows.size, 1.0 / s**2), (rows, cols.ravel())), shape=(n_obs, M * M))
    # penalise the squared Laplacian: it suppresses the patterns of period <= 1 pixel that
    # pixel integration cannot see, while barely touching the PSF's own (lower) frequencies
    L = _laplacian(M)
    L = (L @ L).tocsr()
    LtL = (L.T @ L).tocsc()
    y = obs.reshape(-1)
    atom_of = np.repeat(np.arange(n_atoms), size * size)
    keep_obs = keep.reshape(-1).copy()
    inv_var = np.ones(n_obs)  # pixel weights: equal in the first round, then from the noise model
    scale = np.ones(n_atoms)
    atom_ok = keep.reshape(n_atoms, -1).any(axis=1)
    lam = SMOOTHING * n_atoms / s**4 / 20.0
    kernel = None
    for _ in range(max(1, int(n_rounds))):
        w = np.where(keep_obs & atom_ok[atom_of], inv_var, 0.0)
        wy = np.where(w > 0, y * scale[atom_of], 0.0)
        Aw = A.multiply(w[:, None]).tocsr()
        AtA = (A.T @ Aw).tocsc()
        # keep the penalty's weight relative to the data when the weights change
        lam_w = lam * float(np.mean(w[w > 0])) if np.any(w > 0) else lam
        kernel = sparse_linalg.spsolve(AtA + lam_w * LtL, Aw.T @ wy)
        pred = A @ kernel
        # per-atom brightness refit: y * scale ~ pred in the least-squares sense
        used = keep_obs & atom_ok[atom_of]
        num = np.bincount(atom_of, weights=used * y * y, minlength=n_atoms)
        den = np.bincount(atom_of, weights=used * y * pred, minlength=n_atoms)
        good = (num > 0) & (den > 0)
        scale = np.where(good, den / np.where(num > 0, num, 1.0), 0.0)
        resid = y * scale[atom_of] - pred
        # noise model: variance = c0 + c1 * signal (read/background noise plus shot noise)
        r2 = resid[used] ** 2
        design = np.column_stack([np.ones(r2.size), np.clip(pred[used], 0, None)])
        coef, *_ = np.linalg.lstsq(design, r2, rcond=None)
        c0 = max(float(coef[0]), 1e-3 * float(np.median(r2)) + 1e-300)
        c1 = max(float(coef[1]), 0.0)
        var = c0 + c1 * np.clip(pred, 0, None)
        z = resid / np.sqrt(var)
        keep_obs &= ~(np.abs(z) > clip)
        inv_var = 1.0 / var
        # whole atoms that do not fit (a hidden neighbour, a wrong position)
        chi = np.sqrt(np.bincount(atom_of, weights=np.where(used, z * z, 0.0), minlength=n_atoms)
                      / np.maximum(np.bincount(atom_of, weights=used.astype(float), minlength=n_atoms), 1))
        ok_now = atom_ok & good
        med = np.median(chi[ok_now]) if np.any(ok_now) else 0.0
        mad = 1.4826 * np.median(np.abs(chi[ok_now] - med)) if np.any(ok_now) else 0.0
        atom_ok &= good & (chi <= med + clip * max(mad, 0.05 * med))
    return kernel.reshape(M, M), int(np.count_nonzero(atom_ok))


def _laplacian(M):
    """5-point Laplacian on an M x M grid (free boundary), as a sparse matrix."""
    d = sparse.diags([np.ones(M - 1), -np.ones(M - 1)], [0, 1], shape=(M - 1, M))  # first differences
    eye = sparse.identity(M)
    d2 = (d.T @ d)
    return (sparse.kron(eye, d2) + sparse.kron(d2, eye)).tocsr()


def _recentre(kernel, *, s, fwhm_guess):
    """Shift the kernel so its Gaussian-weighted centroid is at the centre; returns (kernel, (dx, dy) px)."""
    M = kernel.shape[0]
    c = (M - 1) / 2
    yy, xx = np.mgrid[0:M, 0:M]
    sigma = max(fwhm_guess, 1.0) / 2.3548 * s
    cx, cy = c, c
    pos = np.clip(kernel, 0, None)
    for _ in range(10):
        g = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma * sigma))
        wts = pos * g
        cx, cy = float((wts * xx).sum() / wts.sum()), float((wts * yy).sum() / wts.sum())
    shifted = ndimage.shift(kernel, (c - cy, c - cx), order=3, mode="constant", cval=0.0)
    return shifted, ((cx - c) / s, (cy - c) / s)


def _half_radius(k, direction, *, s, peak, centre):
    """Distance (pixels) from ``centre`` along unit ``direction`` (x, y) where ``k`` first falls below peak/2."""
    c0, c1 = centre
    t = np.arange(0, (k.shape[0] - 1) / 2 / s, 0.01)
    prof = ndimage.map_coordinates(k, [c0 + t * direction[1] * s, c1 + t * direction[0] * s], order=3,
                                   mode="constant")
    below = np.flatnonzero(prof < 0.5 * peak)
    if below.size == 0:
        raise ReconstructionError("the PSF kernel never falls to half its peak inside the window; increase radius")
    i = int(below[0])
    if i == 0:
        return 0.0
    f = (prof[i - 1] - 0.5 * peak) / (prof[i - 1] - prof[i])
    return float(t[i - 1] + f * (t[i] - t[i - 1]))
