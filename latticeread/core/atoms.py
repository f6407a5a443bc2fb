"""Locate single atoms in frames and read the lattice from their positions.

Where the lattice's Fourier peaks in the image are weak or absent (an ideal Airy PSF passes no
spatial frequency above the incoherent cut-off 2 NA / lambda, so a lattice whose spacing is
below lambda / (2 NA) ~ 0.97 FWHM leaves no peak at all; Born & Wolf, Principles of Optics,
ch. 8.5 and 9.5, from memory), the positions of the atoms themselves still sit on the lattice.
A list of positions has no optical cut-off: its own Fourier transform (the structure factor of
the point pattern) shows the lattice however wide the PSF.

Method
------
1. **Candidates** (:func:`locate_atoms`): the frame (photons) minus a smooth background
   (low percentile of blocks of about eight FWHM, smoothed) is smoothed lightly (a Gaussian of
   0.4 times the PSF's width: a filter as wide as the PSF would merge atoms one spacing apart);
   local maxima (3 x 3) above 5 robust standard deviations of the smoothed frame are
   candidates. On a crowded frame (uniform filling of 0.3 and more) that spread is the atoms'
   light, many times the noise: when it exceeds 3 times the pixel noise from the finest
   wavelet coefficients (:func:`pixel_noise`, smoothed the same way), the frame is band-pass
   filtered instead (the light smoothing minus a Gaussian of 1.5 times the PSF's width, which
   takes away the plateau) and peaks above 5 standard deviations of the filtered noise count.
2. **Sub-pixel fit**: a circular 2-D Gaussian (centre, width, amplitude and a constant
   background: five parameters) is fitted to a window of about one FWHM radius around every
   candidate (a window of 0.8 FWHM radius), all candidates at once (vectorised Gauss-Newton);
   on a crowded frame once more with the other candidates' fitted spots subtracted from every
   window. The 1-sigma position error
   comes from the fit's covariance scaled by its own residual (for a Gaussian spot it reaches
   the localisation precision sigma_psf / sqrt(N photons) in the photon-limited case;
   Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002), from memory).
3. **Atoms that stand apart**: two atoms closer than about one FWHM merge into one wider and
   brighter spot whose centre lies between them. A candidate is kept as a single atom when its
   fitted width is within 15 % of the PSF's (FWHM / 2.355, widened by the pixel) and its
   photons within -40 %/+45 % of the median of those narrow spots (a merged pair has twice the
   photons and a width at least 15 % larger at a separation of 0.8 FWHM), and when no other
   candidate lies within one FWHM.
4. **Lattice from the points** (:func:`lattice_from_atoms`): the points of every frame are
   spread onto a pixel grid (bilinear weights) and the power spectra of the frames are
   summed (the sum of per-frame power spectra does not care how the lattice moves between
   frames). The two shortest non-collinear strong peaks give the reciprocal basis. When too
   few atoms stand apart for that (high filling), approximate vectors from elsewhere (the
   Fourier estimate of the image) can stand in; the positions fit below refines them.
5. **Positions fit**: every atom is given the integer indices of its nearest site, and the
   vectors (shared) and one offset per frame follow from a linear least-squares fit of
   ``r = offset_f + i a1 + j a2`` weighted by the atoms' position errors, with atoms more than
   3.5 robust standard deviations or 0.3 spacing off the grid dropped (on crowded frames many
   spots that pass the single-atom tests are merged neighbours anywhere in the cell). The
   start offset is the circular mean of the atoms' positions in the cell. The fit starts on
   the atoms within a few spacings of the frame centre and grows outwards, so an error of the
   Fourier vectors never assigns a wrong index.
6. **Coherence test**: in each of 3 x 3 tiles of the atoms' bounding box, more atoms must sit
   within 0.15 spacing of a site than chance would put there (points spread at random over
   the cell fall there with probability pi 0.15^2 a^2 / cell area), by :data:`COHERENCE_Z`
   standard deviations; a lattice that is right near the centre and wrong far out fails. And
   no half-cell translate of the lattice may hold a third as many atoms as its sites (a cell
   twice too large, from a subharmonic of crowded points, fails).

The basis is put in the form of :func:`latticeread.core.lattice.canonical_basis`.
Units: positions in pixels (x = column, y = row, centre of pixel (0, 0) at (0, 0)); images in
photons per pixel.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from latticeread.core.geometry import LatticeGeometry, LatticeQuality
from latticeread.errors import FrameError, LatticeNotFound

__all__ = ["LocatedAtoms", "locate_atoms", "pixel_noise", "locate_holes", "merge_located", "lattice_from_atoms", "offset_from_atoms",
           "FrameOffset", "check_geometry", "GeometryCheck", "MIN_LATTICE_ATOMS"]

log = logging.getLogger(__name__)

#: Fewer single atoms than this (all frames together) cannot define a lattice.
MIN_LATTICE_ATOMS = 40
#: Candidates need a filtered peak this many (robust) standard deviations high.
DETECTION_SIGMA = 5.0
#: A frame whose smoothed spread exceeds this multiple of its smoothed pixel noise is crowded
#: (measured: 1.0-2.4 on frames with empty space between the atoms, 6-8 at uniform filling 0.3).
CROWDED_SPREAD = 3.0
#: Accepted ranges of a single atom's fitted width and photons relative to the median candidate.
WIDTH_RANGE = (0.85, 1.15)
PHOTON_RANGE = (0.6, 1.45)
#: A peak of the points' spectrum counts above this multiple of the spectrum's mean in the band.
PEAK_RATIO = 20.0
#: A lattice whose atoms sit farther than this many spacings (RMS) from their sites is refused.
MAX_RESIDUAL = 0.2
#: Atoms farther than this many robust standard deviations from their site are dropped.
OUTLIER_SIGMA = 3.5
#: The positions fit keeps only atoms within this many spacings of their nearest site.
START_CUT = 0.3
#: Every tile's excess of atoms near a site over chance, in standard deviations (binomial).
COHERENCE_Z = 4.0
#: Radius (spacings) of the "near a site" disk of the coherence test.
COHERENCE_RADIUS = 0.15
#: Single atoms half a cell off the sites, as a fraction of those on them, that make a cell suspect.
HALF_CELL_FRACTION = 0.3
_FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))


@dataclass(frozen=True)
class LocatedAtoms:
    """Atoms found in one frame or a stack.

    Attributes
    ----------
    x, y : (N,) ndarray of float
        Fitted centres, pixels.
    photons : (N,) ndarray of float
        Fitted photons of the spot (integral of the Gaussian above its background).
    width : (N,) ndarray of float
        Fitted Gaussian standard deviation, pixels.
    sigma : (N,) ndarray of float
        1-sigma position error per axis, pixels (from the fit).
    frame : (N,) ndarray of int
        Index of the frame each atom was found in.
    single : (N,) ndarray of bool
        Passed the single-atom tests (width, photons, no close neighbour).
    n_frames : int
        Frames searched.
    """

    x: np.ndarray
    y: np.ndarray
    photons: np.ndarray
    width: np.ndarray
    sigma: np.ndarray
    frame: np.ndarray
    single: np.ndarray
    n_frames: int = 1

    def __len__(self) -> int:
        return int(self.x.size)

    def in_frame(self, index: int) -> "LocatedAtoms":
        """The atoms of one frame, as if located in that frame alone."""
        m = self.frame == int(index)
        return LocatedAtoms(x=self.x[m], y=self.y[m], photons=self.photons[m], width=self.width[m],
                            sigma=self.sigma[m], frame=np.zeros(int(m.sum()), int), single=self.single[m], n_frames=1)


def _as_stack(image_or_stack) -> np.ndarray:
    data = np.asarray(image_or_stack, dtype=float)
    if data.ndim == 2:
        data = data[None]
    if data.ndim != 3:
        raise FrameError(f"expected a frame (H, W) or a stack (n, H, W), got shape {data.shape}")
    if min(data.shape[1:]) < 16:
        raise FrameError(f"the frame is only {data.shape[1]}x{data.shape[2]} pixels; at least 16x16 are needed")
    if not np.all(np.isfinite(data)):
        raise FrameError("the frame holds NaN or infinite pixels; replace them before locating atoms")
    return data


def _background(frame: np.ndarray, block: int) -> np.ndarray:
    """Smooth background: 20th percentile of blocks of ``block`` pixels, smoothed and resampled."""
    h, w = frame.shape
    nb_y, nb_x = max(1, h // block), max(1, w // block)
    ys = np.linspace(0, h, nb_y + 1).astype(int)
    xs = np.linspace(0, w, nb_x + 1).astype(int)
    low = np.empty((nb_y, nb_x))
    for i in range(nb_y):
        for j in range(nb_x):
            low[i, j] = np.percentile(frame[ys[i]:ys[i + 1], xs[j]:xs[j + 1]], 20)
    if low.size == 1:
        return np.full(frame.shape, low[0, 0])
    low = ndimage.median_filter(low, size=3, mode="nearest")
    # bilinear interpolation of the block values at the pixel centres
    cy = (ys[:-1] + ys[1:] - 1) / 2.0
    cx = (xs[:-1] + xs[1:] - 1) / 2.0
    yi = np.interp(np.arange(h), cy, np.arange(nb_y))
    xi = np.interp(np.arange(w), cx, np.arange(nb_x))
    yy, xx = np.meshgrid(yi, xi, indexing="ij")
    return ndimage.map_coordinates(low, [yy, xx], order=1, mode="nearest")


def _windows(py: np.ndarray, px: np.ndarray, shape, radius: int):
    """Row and column indices (N, P) of the square windows of ``radius`` around integer pixels."""
    h, w = shape
    off = np.arange(-radius, radius + 1)
    oy, ox = np.meshgrid(off, off, indexing="ij")
    yy = np.clip(py[:, None, None] + oy[None], 0, h - 1).reshape(py.size, -1)
    xx = np.clip(px[:, None, None] + ox[None], 0, w - 1).reshape(py.size, -1)
    return yy, xx


def _fit_spots(frame: np.ndarray, py: np.ndarray, px: np.ndarray, *, width0: float, radius: int, n_iter: int = 8,
               deblend: int = 0):
    """Vectorised Gauss-Newton fit of a circular Gaussian plus constant to windows around peaks.

    With ``deblend`` > 0, that many further passes fit every window after subtracting the
    fitted spots of all the other candidates from it (neighbours' light at the window's edge
    would otherwise be taken up by the constant and make the spot look narrow and faint).

    Returns x, y, photons, width, position sigma, ok (all (N,) arrays).
    """
    yy, xx = _windows(py, px, frame.shape, radius)
    gx, gy = xx.astype(float), yy.astype(float)
    data = frame[yy, xx]
    p, jtj = _gauss_newton(data, gx, gy, _start_params(data, px, py, width0), width0=width0, n_iter=n_iter)
    for _ in range(deblend):
        good = np.all(np.isfinite(p), axis=1) & (p[:, 2] > 0)
        own = np.where(good[:, None], p[:, 2:3], 0.0) * np.exp(
            -((gx - p[:, :1]) ** 2 + (gy - p[:, 1:2]) ** 2) / (2 * p[:, 3:4] ** 2))
        own[~np.isfinite(own)] = 0.0
        model = np.zeros(frame.shape)
        np.add.at(model, (yy, xx), own)
        data = frame[yy, xx] - (model[yy, xx] - own)
        p, jtj = _gauss_newton(data, gx, gy, np.where(good[:, None], p, _start_params(data, px, py, width0)),
                               width0=width0, n_iter=n_iter)
    return _fit_result(data, gx, gy, px, py, p, jtj, radius=radius)


def _fit_windows(data, gx, gy, px, py, *, width0: float, radius: int, n_iter: int = 8):
    """The fit of :func:`_fit_spots` on windows already cut out: ``data`` (N, P) at pixels ``gx``, ``gy``."""
    p, jtj = _gauss_newton(data, gx, gy, _start_params(data, px, py, width0), width0=width0, n_iter=n_iter)
    return _fit_result(data, gx, gy, px, py, p, jtj, radius=radius)


def _start_params(data, px, py, width0: float) -> np.ndarray:
    """First guess (N, 5) of x0, y0, amplitude (peak height), width and background per window."""
    p = np.empty((px.size, 5))
    p[:, 0], p[:, 1] = px, py
    p[:, 4] = np.percentile(data, 10, axis=1)
    p[:, 3] = width0
    p[:, 2] = np.maximum(data.max(axis=1) - p[:, 4], 1e-6)
    return p


def _gauss_newton(data, gx, gy, p, *, width0: float, n_iter: int):
    """Gauss-Newton iterations of the circular Gaussian plus constant from ``p``: (parameters, J^T J)."""
    p = np.array(p, float)
    n, npix = data.shape
    jac = np.empty((n, 5, npix))
    jtj = np.zeros((n, 5, 5))
    for _ in range(n_iter):
        dx, dy = gx - p[:, :1], gy - p[:, 1:2]
        s2 = p[:, 3:4] ** 2
        g = np.exp(-(dx * dx + dy * dy) / (2 * s2))
        r = data - (p[:, 2:3] * g + p[:, 4:5])
        ag = p[:, 2:3] * g / s2
        jac[:, 0], jac[:, 1], jac[:, 2] = ag * dx, ag * dy, g
        jac[:, 3] = ag * (dx * dx + dy * dy) / p[:, 3:4]
        jac[:, 4] = 1.0
        jtj = np.matmul(jac, jac.transpose(0, 2, 1))
        jtr = np.matmul(jac, r[..., None])[..., 0]
        jtj += 1e-9 * np.eye(5)[None] * np.maximum(np.trace(jtj, axis1=1, axis2=2), 1e-12)[:, None, None]
        try:
            step = np.linalg.solve(jtj, jtr[..., None])[..., 0]
        except np.linalg.LinAlgError:
            p[:] = np.nan
            break
        # keep steps bounded: centres by at most half a pixel, width within a factor 1.5
        step[:, :2] = np.clip(step[:, :2], -0.5, 0.5)
        p += step
        p[:, 3] = np.clip(p[:, 3], width0 / 1.5, width0 * 1.5)
    return p, jtj


def _fit_result(data, gx, gy, px, py, p, jtj, *, radius: int):
    """x, y, photons, width, position sigma and ok of fitted parameters ``p`` (N, 5)."""
    n = px.size
    dx, dy = gx - p[:, :1], gy - p[:, 1:2]
    s2 = p[:, 3:4] ** 2
    g = np.exp(-(dx * dx + dy * dy) / (2 * s2))
    r = data - (p[:, 2:3] * g + p[:, 4:5])
    dof = max(data.shape[1] - 5, 1)
    var = np.sum(r * r, axis=1) / dof
    try:
        cov = np.linalg.inv(jtj)
        sigma = np.sqrt(np.maximum(0.5 * (cov[:, 0, 0] + cov[:, 1, 1]) * var, 0))
    except np.linalg.LinAlgError:
        sigma = np.full(n, np.nan)
    inside = (np.abs(p[:, 0] - px) <= radius) & (np.abs(p[:, 1] - py) <= radius)
    ok = inside & np.isfinite(sigma) & (p[:, 2] > 0) & np.all(np.isfinite(p), axis=1)
    photons = 2 * np.pi * p[:, 2] * p[:, 3] ** 2
    return p[:, 0], p[:, 1], photons, p[:, 3], sigma, ok


def pixel_noise(image) -> float:
    """Robust standard deviation of the pixel noise of a frame, not swamped by atoms.

    The finest diagonal Haar wavelet coefficients ``(a - b - c + d) / 2`` of the 2x2 blocks
    of pixels hold white noise of the pixels' own standard deviation and next to nothing of a
    spot as wide as a few pixels, so their median absolute value over 0.6745 is the noise
    however many atoms fill the frame (Donoho & Johnstone, Biometrika 81, 425 (1994), from
    memory; the estimator of scikit-image's ``skimage.restoration.estimate_sigma``, which uses a
    Daubechies wavelet through PyWavelets, not a dependency here). Where the noise varies over
    the frame (photon noise of the atoms) this is its median; where most pixels hold no noise
    at all (an ideal photon counter on a dark background), the RMS of the coefficients.

    Parameters
    ----------
    image : (H, W) array_like
        One frame, at least 2x2 pixels (any unit; the result has the same unit).
    """
    a = np.asarray(image, float)
    a = a[: a.shape[0] // 2 * 2, : a.shape[1] // 2 * 2]
    if a.size < 4:
        raise FrameError(f"the frame is {np.asarray(image).shape}; at least 2x2 pixels are needed to estimate its noise")
    diag = (a[0::2, 0::2] - a[0::2, 1::2] - a[1::2, 0::2] + a[1::2, 1::2]) / 2.0
    sigma = float(np.median(np.abs(diag)) / 0.6745)
    if sigma == 0.0:
        # most pixels noiseless (an ideal photon counter on a dark background): the RMS of the
        # coefficients, atoms' photon noise included, is the scale left
        sigma = float(np.sqrt(np.mean(diag * diag)))
    return sigma


def _filter_norm(s_light: float, s_wide: float | None) -> float:
    """Root sum of squares of a Gaussian kernel (minus a wider one): white noise of 1 -> its standard deviation."""
    half = int(np.ceil(4 * (s_wide or s_light))) + 1
    impulse = np.zeros((2 * half + 1, 2 * half + 1))
    impulse[half, half] = 1.0
    kernel = ndimage.gaussian_filter(impulse, s_light)
    if s_wide is not None:
        kernel = kernel - ndimage.gaussian_filter(impulse, s_wide)
    return float(np.sqrt(np.sum(kernel * kernel)))


def locate_atoms(image_or_stack, *, fwhm: float, detection_sigma: float = DETECTION_SIGMA,
                 deblend: int | None = None) -> LocatedAtoms:
    """Find atoms and fit their centres to a fraction of a pixel.

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Frame(s) in photons per pixel (counts work too: only relative levels matter), finite.
    fwhm : float
        Full width at half maximum of the PSF, pixels (sets the filter, the fit window and the
        first guess of the width).
    detection_sigma : float
        Candidates need a lightly smoothed peak this many robust standard deviations (of the
        smoothed frame) above its median. On a crowded frame, whose spread is more than
        :data:`CROWDED_SPREAD` times the smoothed noise (the pixel noise from
        :func:`pixel_noise`, which atoms do not swamp), the spread is the atoms' light: there
        the peaks of a band-pass filtered frame (the light smoothing minus one of 1.5 PSF
        widths, which takes the plateau away) must be this many standard deviations of the
        filtered noise high.
    deblend : int, optional
        Passes of the spot fit with the other candidates' fitted spots subtracted (see
        ``_fit_spots``); default one pass on crowded frames (atoms with neighbours two
        spacings away then fit like one atom), none elsewhere.

    Returns
    -------
    LocatedAtoms
        Every fitted candidate; ``single`` marks those that pass the single-atom tests.

    Raises
    ------
    FrameError
        Not a frame or stack, smaller than 16x16 pixels, or non-finite pixels.
    ValueError
        Non-positive ``fwhm``.
    """
    data, s0, radius = _spot_scales(image_or_stack, fwhm)
    block = max(16, int(8 * fwhm))
    # light smoothing only: a filter as wide as the PSF would merge atoms one spacing apart
    s_light, s_wide = max(0.6, 0.4 * s0), 1.5 * s0
    norm_light, norm_band = _filter_norm(s_light, None), _filter_norm(s_light, s_wide)
    parts = []
    for f, frame in enumerate(data):
        clean = frame - _background(frame, block)
        smooth = ndimage.gaussian_filter(clean, s_light)
        med = np.median(smooth)
        mad = 1.4826 * np.median(np.abs(smooth - med))
        noise = pixel_noise(clean)
        if not np.isfinite(mad) or not np.isfinite(noise) or max(mad, noise) <= 0:
            continue
        crowded = mad > CROWDED_SPREAD * noise * norm_light
        if crowded:
            # the spread of the frame is the atoms' light: take the plateau away and measure
            # the peaks against the noise itself
            band = smooth - ndimage.gaussian_filter(clean, s_wide)
            peak = (band == ndimage.maximum_filter(band, size=3)) & (band > detection_sigma * noise * norm_band)
        else:
            peak = (smooth == ndimage.maximum_filter(smooth, size=3)) & (smooth > med + detection_sigma * mad)
        edge = radius
        peak[:edge], peak[-edge:], peak[:, :edge], peak[:, -edge:] = False, False, False, False
        py, px = np.nonzero(peak)
        if py.size == 0:
            continue
        passes = (1 if crowded else 0) if deblend is None else int(deblend)
        x, y, photons, width, sigma, ok = _fit_spots(clean, py, px, width0=s0, radius=radius, deblend=passes)
        parts.append((x[ok], y[ok], photons[ok], width[ok], sigma[ok], np.full(int(ok.sum()), f)))
    return _located(parts, n_frames=len(data), s0=s0, fwhm=fwhm)


def _spot_scales(image_or_stack, fwhm: float):
    """The frames as a stack, the PSF's Gaussian width (pixels) and the spot-fit radius (pixels)."""
    if not (np.isfinite(fwhm) and fwhm > 0):
        raise ValueError(f"fwhm must be a positive number of pixels, got {fwhm!r}")
    data = _as_stack(image_or_stack)
    return data, float(fwhm) * _FWHM_TO_SIGMA, max(2, int(np.ceil(0.8 * fwhm)))


def _located(parts: list, *, n_frames: int, s0: float, fwhm: float) -> LocatedAtoms:
    """Spots fitted frame by frame (``(x, y, photons, width, sigma, frame)`` per frame) as one
    :class:`LocatedAtoms`, with the single-atom tests applied."""
    if not parts:
        empty = np.zeros(0)
        return LocatedAtoms(empty, empty, empty, empty, empty, np.zeros(0, int), np.zeros(0, bool), n_frames)
    x, y, photons, width, sigma, frame = (np.concatenate(v) for v in zip(*parts))
    single = _single_spots(x, y, photons, width, frame, s0=s0, fwhm=fwhm)
    return LocatedAtoms(x=x, y=y, photons=photons, width=width, sigma=sigma, frame=frame.astype(int), single=single,
                        n_frames=n_frames)


def _single_spots(x, y, photons, width, frame, *, s0: float, fwhm: float) -> np.ndarray:
    """Spots that pass the single-atom tests: width and photons of one PSF, no neighbour within one FWHM."""
    from scipy.spatial import cKDTree

    single = np.zeros(x.size, bool)
    if not x.size:
        return single
    # the width a single atom's spot should have: the PSF's Gaussian width widened by the
    # pixel (a uniform pixel adds 1/12 pixel^2 of variance); merged groups are wider
    expect = np.sqrt(s0**2 + 1.0 / 12.0)
    narrow = (width > WIDTH_RANGE[0] * expect) & (width < WIDTH_RANGE[1] * expect)
    med_p = np.median(photons[narrow]) if narrow.sum() >= 5 else np.median(photons)
    single = narrow & (photons > PHOTON_RANGE[0] * med_p) & (photons < PHOTON_RANGE[1] * med_p)
    # no other candidate (single or not) within one FWHM in the same frame
    for f in np.unique(frame):
        sel = np.flatnonzero(frame == f)
        tree = cKDTree(np.column_stack([x[sel], y[sel]]))
        counts = np.array([len(v) for v in tree.query_ball_point(np.column_stack([x[sel], y[sel]]), r=fwhm)])
        single[sel[counts > 1]] = False
    return single


#: A filled region's smoothed level must be at least this fraction of the frame's high level
#: (99th percentile of the smoothed frame) for holes to be searched there.
FILLED_LEVEL = 0.8
#: Smallest filled region searched for holes, in units of FWHM^2.
MIN_FILLED_AREA = 50.0


def locate_holes(image_or_stack, *, fwhm: float, detection_sigma: float = 4.0) -> LocatedAtoms:
    """Find empty sites inside densely filled regions and fit their centres to a fraction of a pixel.

    In a filled region (a Mott-insulator core) whose lattice lies beyond the optical cut-off
    the atoms blur into a nearly uniform plateau, but a missing atom leaves a dip shaped like
    the PSF: the inverted image (the local plateau level minus the frame) shows every isolated
    hole as a point-like spot on the lattice, which :func:`lattice_from_atoms` can use exactly
    like a single atom.

    Method: the plateau level is the frame smoothed by a Gaussian of 1.5 FWHM; the filled
    region is where that level is at least :data:`FILLED_LEVEL` of its 99th percentile
    (photons above a background that is small beside the plateau), shrunk by one FWHM, in connected parts of at least
    :data:`MIN_FILLED_AREA` FWHM^2; candidates are the local maxima of the lightly smoothed
    inverted image there above ``detection_sigma`` robust standard deviations; each is fitted
    as in :func:`locate_atoms` and kept as ``single`` by the same width, photon and
    neighbour tests.

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Frame(s) in photons per pixel, finite.
    fwhm : float
        Full width at half maximum of the PSF, pixels.
    detection_sigma : float
        Candidates need a filtered dip this many robust standard deviations deep.

    Returns
    -------
    LocatedAtoms
        The holes (``photons`` = the missing light of the dip); empty when no frame has a
        filled region.

    Raises
    ------
    FrameError
        Not a frame or stack, smaller than 16x16 pixels, or non-finite pixels.
    ValueError
        Non-positive ``fwhm``.
    """
    data, s0, radius = _spot_scales(image_or_stack, fwhm)
    parts = []
    for f, frame in enumerate(data):
        level = ndimage.gaussian_filter(frame, 1.5 * fwhm)
        filled = level > FILLED_LEVEL * np.percentile(level, 99)
        filled = ndimage.binary_erosion(filled, iterations=max(1, int(round(fwhm))))
        labels, n = ndimage.label(filled)
        if n == 0:
            continue
        area = ndimage.sum(filled, labels, index=np.arange(1, n + 1))
        filled &= np.isin(labels, 1 + np.flatnonzero(area >= MIN_FILLED_AREA * fwhm * fwhm))
        if filled.sum() < MIN_FILLED_AREA * fwhm * fwhm:
            continue
        inverted = level - frame
        smooth = ndimage.gaussian_filter(inverted, max(0.6, 0.4 * s0))
        med = np.median(smooth[filled])
        mad = 1.4826 * np.median(np.abs(smooth[filled] - med))
        if not np.isfinite(mad) or mad <= 0:
            continue
        peak = (smooth == ndimage.maximum_filter(smooth, size=3)) & (smooth > med + detection_sigma * mad) & filled
        py, px = np.nonzero(peak)
        if py.size == 0:
            continue
        x, y, photons, width, sigma, ok = _fit_spots(inverted, py, px, width0=s0, radius=radius)
        parts.append((x[ok], y[ok], photons[ok], width[ok], sigma[ok], np.full(int(ok.sum()), f)))
    return _located(parts, n_frames=len(data), s0=s0, fwhm=fwhm)


def merge_located(*parts: LocatedAtoms) -> LocatedAtoms:
    """Atoms (and holes) located on the same frames, as one list (for :func:`lattice_from_atoms`).

    Raises
    ------
    ValueError
        No parts, or parts located on different numbers of frames.
    """
    if not parts:
        raise ValueError("nothing to merge")
    n = {p.n_frames for p in parts}
    if len(n) != 1:
        raise ValueError(f"the located spots come from different numbers of frames ({sorted(n)})")
    fields = ("x", "y", "photons", "width", "sigma", "frame", "single")
    return LocatedAtoms(*(np.concatenate([getattr(p, k) for p in parts]) for k in fields), n_frames=n.pop())


def _splat(shape, x, y) -> np.ndarray:
    """Points spread onto the pixel grid with bilinear weights."""
    h, w = shape
    img = np.zeros((h + 1, w + 1))
    x0, y0 = np.floor(x).astype(int), np.floor(y).astype(int)
    fx, fy = x - x0, y - y0
    ok = (x0 >= 0) & (y0 >= 0) & (x0 < w) & (y0 < h)
    for dy, dx, wgt in ((0, 0, (1 - fx) * (1 - fy)), (0, 1, fx * (1 - fy)), (1, 0, (1 - fx) * fy), (1, 1, fx * fy)):
        np.add.at(img, (y0[ok] + dy, x0[ok] + dx), wgt[ok])
    return img[:h, :w]


def _reciprocal_from_points(shape, x, y, frame, *, kmin: float, kmax: float):
    """Two reciprocal vectors (cycles/pixel) from the summed power spectra of the point patterns.

    Points spread on the pixel grid are a sampled pattern: the lattice's harmonics beyond half a
    cycle per pixel fold back into the band and, for spacings of a few pixels, can pass for a
    shorter reciprocal vector (a wrong, larger cell). Where the band reaches above a quarter
    cycle per pixel the points are spread on a grid twice as fine, which moves the fold to one
    cycle per pixel, beyond every harmonic that keeps any strength.
    """
    up = 2 if kmax > 0.25 else 1
    h, w = shape[0] * up, shape[1] * up
    power = np.zeros((h, w))
    for f in np.unique(frame):
        sel = frame == f
        img = _splat((h, w), x[sel] * up + (up - 1) / 2.0, y[sel] * up + (up - 1) / 2.0)
        img -= img.mean()
        power += np.abs(np.fft.fft2(img)) ** 2
    ky = up * np.fft.fftfreq(h)[:, None]
    kx = up * np.fft.fftfreq(w)[None, :]
    kr = np.hypot(kx, ky)
    band = (kr >= kmin) & (kr <= kmax) & ((ky > 0) | ((ky == 0) & (kx > 0)))  # half plane: P(k) = P(-k)
    if not band.any():
        raise LatticeNotFound("the frame is too small to show the lattice of the located atoms")
    # the spectrum of random points is exponentially distributed about its mean: 20 times the
    # mean is exceeded by chance with probability exp(-20) ~ 2e-9 per bin
    level = np.mean(power[band])
    local_max = power == ndimage.maximum_filter(power, size=3, mode="wrap")
    cand = np.flatnonzero((band & local_max & (power > PEAK_RATIO * level)).ravel())
    if cand.size < 2:
        raise LatticeNotFound("the located atoms show no periodic arrangement (no peak in the spectrum of their "
                              "positions)")
    cand = cand[np.argsort(power.ravel()[cand])[::-1]][:12]
    ks = []
    for c in cand:
        iy, ix = divmod(int(c), w)
        # sub-bin position: parabola through the neighbours along each axis (log power)
        lp = np.log(np.maximum(power, 1e-300))
        def vertex(m, c0, p):
            denom = m - 2 * c0 + p
            return 0.5 * (m - p) / denom if denom < 0 else 0.0
        dy = vertex(lp[(iy - 1) % h, ix], lp[iy, ix], lp[(iy + 1) % h, ix])
        dx = vertex(lp[iy, (ix - 1) % w], lp[iy, ix], lp[iy, (ix + 1) % w])
        ks.append(np.array([kx[0, ix] + up * dx / w, ky[iy, 0] + up * dy / h]))
    ks = np.array(ks)
    peak_ratio = float(power.ravel()[cand[0]] / level)
    # the shortest strong peak and the shortest strong peak not collinear with it
    order = np.argsort(np.hypot(ks[:, 0], ks[:, 1]))
    first = ks[order[0]]
    for j in order[1:]:
        sin = abs(first[0] * ks[j, 1] - first[1] * ks[j, 0]) / (np.linalg.norm(first) * np.linalg.norm(ks[j]))
        if sin > 0.3:
            return np.array([first, ks[j]]), peak_ratio
    raise LatticeNotFound("the located atoms line up along one direction only; no 2-D lattice")


def _phase_offsets(x, y, frame, basis, offsets, *, centre, radius: float):
    """Each frame's offset from the circular mean of its atoms' positions within the cell.

    Every atom's position relative to the current offset, in fractional lattice coordinates,
    is a phase ``exp(2 pi i frac)``; atoms on the lattice add up, atoms anywhere in the cell
    (merged spots) cancel on average, so the angle of the sum is the lattice's offset even
    when the atom nearest the centre is not on a site. Atoms within ``radius`` pixels of the
    centre are used (a small error of the vectors twists the phase far out).
    """
    inv = np.linalg.inv(basis)
    out = np.array(offsets, float)
    near = np.hypot(x - centre[0], y - centre[1]) <= radius
    for f in range(out.shape[0]):
        sel = near & (frame == f)
        if sel.sum() < 3:
            continue
        frac = inv @ (np.stack([x[sel], y[sel]]) - out[f][:, None])
        shift = np.angle(np.exp(2j * np.pi * frac).sum(axis=1)) / (2 * np.pi)
        out[f] = out[f] + basis @ shift
    return out


def _fit_positions(x, y, frame, sig, a1, a2, offsets, *, centre, radius=None):
    """Robust weighted least squares of shared vectors and per-frame offsets on assigned atoms.

    Returns a1, a2, offsets (n_frames, 2), the covariance of (a1, a2) and the used mask.
    """
    basis = np.column_stack([a1, a2])
    inv = np.linalg.inv(basis)
    rel = np.stack([x, y]) - offsets[frame].T
    frac = inv @ rel
    idx = np.rint(frac)
    d = np.stack([x, y]) - (offsets[frame].T + basis @ idx)
    # start from the atoms near a site: on a crowded frame many "single" spots are merged
    # neighbours or atoms pulled by their neighbours' light, sitting anywhere in the cell, and a
    # median over all of them would set the outlier cut wide enough to let them bias the vectors
    spacing = min(np.hypot(*a1), np.hypot(*a2))
    use = np.hypot(d[0], d[1]) <= START_CUT * spacing
    if radius is not None:
        dist = np.hypot(x - centre[0], y - centre[1])
        use &= dist <= radius
    frames = np.unique(frame)
    n_f = int(frame.max()) + 1
    wgt = 1.0 / np.maximum(sig, 0.02) ** 2
    cov = None
    for _ in range(4):
        sel = np.flatnonzero(use)
        if sel.size < 8:
            raise LatticeNotFound(f"only {sel.size} atoms fit the lattice; too few to measure it")
        # unknowns: a1x a1y a2x a2y, then (ox, oy) per frame; x and y decouple given the indices
        n_par = 2 + n_f
        out = []
        covs = []
        for axis in (0, 1):
            a = np.zeros((sel.size, n_par))
            a[:, 0] = idx[0, sel]
            a[:, 1] = idx[1, sel]
            a[np.arange(sel.size), 2 + frame[sel]] = 1.0
            present = np.zeros(n_par, bool)
            present[:2] = True
            present[2 + frames] = True
            a = a[:, present]
            sw = np.sqrt(wgt[sel])
            coef, *_ = np.linalg.lstsq(a * sw[:, None], (x, y)[axis][sel] * sw, rcond=None)
            full = np.zeros(n_par)
            full[present] = coef
            out.append(full)
            resid = ((x, y)[axis][sel] - a @ coef) * sw
            s2 = float(resid @ resid / max(sel.size - present.sum(), 1))
            covs.append(np.linalg.pinv((a * sw[:, None]).T @ (a * sw[:, None]))[:2, :2] * s2)
        a1 = np.array([out[0][0], out[1][0]])
        a2 = np.array([out[0][1], out[1][1]])
        offsets = np.column_stack([out[0][2:], out[1][2:]])
        basis = np.column_stack([a1, a2])
        d = np.stack([x, y]) - (offsets[frame].T + basis @ idx)
        dn = np.hypot(d[0], d[1]) / np.maximum(sig, 0.02)
        robust = np.median(dn[use]) / 1.1774  # the median radius of a 2-D normal is 1.1774 sigma
        keep = (dn <= OUTLIER_SIGMA * max(robust, 1e-9)) & (np.hypot(d[0], d[1]) <= START_CUT * spacing)
        if radius is not None:
            keep &= np.hypot(x - centre[0], y - centre[1]) <= radius
        cov = covs
        if np.array_equal(keep, use):
            break
        use = keep
    return a1, a2, offsets, cov, use


def _spacing_sigma(cov, a1, a2) -> float:
    """Relative 1-sigma error of the longer-uncertain spacing from the (x, y) covariances of the vectors."""
    cx, cy = cov
    var1 = (a1[0] ** 2 * cx[0, 0] + a1[1] ** 2 * cy[0, 0]) / (a1 @ a1)
    var2 = (a2[0] ** 2 * cx[1, 1] + a2[1] ** 2 * cy[1, 1]) / (a2 @ a2)
    return float(np.sqrt(max(var1 / (a1 @ a1), var2 / (a2 @ a2))))


def lattice_from_atoms(image_or_stack, *, fwhm: float, atoms: LocatedAtoms | None = None,
                       spacing_range=(0.55, 2.0), start: LatticeGeometry | None = None) -> LatticeGeometry:
    """Lattice vectors and offset from the positions of single atoms (no optical cut-off).

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Frame(s) in photons per pixel. A stack shares the vectors; every frame gets its own
        offset (the returned offset is frame 0's, as the site nearest the frame centre).
    fwhm : float
        PSF FWHM, pixels.
    atoms : LocatedAtoms, optional
        Atoms already located by :func:`locate_atoms` on the same frames.
    spacing_range : (float, float)
        Smallest and largest nearest-neighbour spacing searched, in units of ``fwhm``.
    start : LatticeGeometry, optional
        Approximate vectors (for example the Fourier estimate), used when the spectrum of the
        points shows no lattice (too few single atoms, at high filling); the atoms' positions
        then refine them.

    Returns
    -------
    LatticeGeometry
        Canonical basis (:func:`latticeread.core.lattice.canonical_basis`), pixels, with a
        :class:`LatticeQuality`: ``peak_to_background`` = the strongest peak of the points'
        spectrum over its median in the searched band; ``residual`` = RMS distance of the
        used atoms from their sites, pixels; ``n_sites_used`` = atoms in the final fit;
        ``spacing_sigma`` = 1-sigma relative error of the spacings from the fit's covariance.

    Raises
    ------
    LatticeNotFound
        Fewer than :data:`MIN_LATTICE_ATOMS` single atoms, no periodic arrangement, only
        one direction, or atoms farther than :data:`MAX_RESIDUAL` spacing (RMS) from the sites
        of the lattice found (not the atoms' lattice).
    """
    from latticeread.core.lattice import canonical_basis

    data = _as_stack(image_or_stack)
    shape = data.shape[1:]
    if atoms is None:
        atoms = locate_atoms(data, fwhm=fwhm)
    sel = atoms.single
    n_single = int(sel.sum())
    if n_single < MIN_LATTICE_ATOMS:
        raise LatticeNotFound(f"only {n_single} single atoms were found (of {len(atoms)} spots); at least "
                              f"{MIN_LATTICE_ATOMS} are needed to read the lattice from their positions")
    x, y, sig, frame = atoms.x[sel], atoms.y[sel], atoms.sigma[sel], atoms.frame[sel]
    # |b| of a lattice of spacing a is 1/a (square) to 2/(sqrt(3) a) (triangular)
    kmin = 0.9 / (spacing_range[1] * fwhm)
    kmax = min(0.5, 1.25 / (spacing_range[0] * fwhm))
    try:
        recip, ratio = _reciprocal_from_points(shape, x, y, frame, kmin=kmin, kmax=kmax)
        basis = np.linalg.inv(recip)
        a1, a2 = basis[:, 0], basis[:, 1]
    except LatticeNotFound:
        if start is None:
            raise
        a1, a2, ratio = np.asarray(start.a1, float), np.asarray(start.a2, float), float("nan")
    a1, a2 = (np.asarray(v) for v in canonical_basis(a1, a2))
    centre = np.array([(shape[1] - 1) / 2.0, (shape[0] - 1) / 2.0])
    n_f = data.shape[0]
    # per-frame starting offset: the single atom nearest the frame centre
    offsets = np.tile(centre, (n_f, 1))
    for f in range(n_f):
        mine = np.flatnonzero(frame == f)
        if mine.size:
            k = mine[np.argmin(np.hypot(x[mine] - centre[0], y[mine] - centre[1]))]
            offsets[f] = (x[k], y[k])
    spacing = min(np.hypot(*a1), np.hypot(*a2))
    offsets = _phase_offsets(x, y, frame, np.column_stack([a1, a2]), offsets, centre=centre, radius=8 * spacing)
    extent = np.hypot(*shape)
    # the first disk: eight spacings, or wider until it holds MIN_LATTICE_ATOMS atoms
    near = np.sort(np.hypot(x - centre[0], y - centre[1]))
    radius = max(8 * spacing, float(near[min(MIN_LATTICE_ATOMS, near.size) - 1]) + 1.0)
    while True:
        a1, a2, offsets, cov, used = _fit_positions(x, y, frame, sig, a1, a2, offsets, centre=centre,
                                                    radius=None if radius >= extent else radius)
        if radius >= extent:
            break
        radius *= 2
    # a second pass on every atom with the final vectors (indices re-assigned)
    a1, a2, offsets, cov, used = _fit_positions(x, y, frame, sig, a1, a2, offsets, centre=centre)
    a1, a2 = (np.asarray(v) for v in canonical_basis(a1, a2))
    basis = np.column_stack([a1, a2])
    d = np.stack([x, y]) - offsets[frame].T
    d = d - basis @ np.rint(np.linalg.inv(basis) @ d)
    residual = float(np.sqrt(np.mean(np.sum(d[:, used] ** 2, axis=0))))
    spacing_sigma = _spacing_sigma(cov, a1, a2)
    # atoms spread at random over a cell sit ~0.4 spacing from its corner (RMS); on the right
    # lattice they sit within their localisation error (measured: <= 0.12 spacing on crowded frames)
    if residual > MAX_RESIDUAL * min(np.hypot(*a1), np.hypot(*a2)):
        raise LatticeNotFound(f"the located atoms do not sit on the lattice their spectrum suggests (RMS distance "
                              f"{residual:.2f} px from the sites, spacing {min(np.hypot(*a1), np.hypot(*a2)):.2f} px)")
    _check_coherence(x, y, np.hypot(d[0], d[1]), basis)
    _check_half_cell(x, y, frame, basis, offsets)
    warnings = []
    if int(used.sum()) < MIN_LATTICE_ATOMS:
        warnings.append(f"only {int(used.sum())} atoms define the lattice: the geometry rests on few atoms")
    # offset of frame 0 as the site nearest the frame centre
    off = offsets[0]
    frac = np.linalg.inv(basis) @ (centre - off)
    off = off + basis @ np.rint(frac)
    quality = LatticeQuality(peak_to_background=ratio, residual=residual, n_sites_used=int(used.sum()),
                             warnings=tuple(warnings), spacing_sigma=spacing_sigma)
    log.debug("lattice from %d atoms: a1=%s a2=%s offset=%s residual %.3f px", used.sum(), a1, a2, off, residual)
    return LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(off), quality=quality)


def _check_half_cell(x, y, frame, basis, offsets) -> None:
    """Raise :class:`LatticeNotFound` when many single atoms sit half a cell off the sites.

    The spectrum of crowded points can show a subharmonic or a wrong pair of peaks: a cell
    twice too large, whose sites hold only every second row of atoms; the atoms of the other
    rows then sit half a cell off. A half-cell translate of the lattice that has
    significantly more atoms near it than chance (:data:`COHERENCE_Z`) and at least
    :data:`HALF_CELL_FRACTION` as many as the sites themselves means the cell cannot be
    trusted (merged pairs also sit half a cell off, but most fail the single-atom tests).
    """
    inv = np.linalg.inv(basis)
    spacing = min(np.hypot(*basis[:, 0]), np.hypot(*basis[:, 1]))
    radius = COHERENCE_RADIUS * spacing
    p0 = min(np.pi * radius**2 / abs(np.linalg.det(basis)), 0.5)
    n = x.size
    rel = np.stack([x, y]) - offsets[frame].T
    counts = {}
    for h in ((0.0, 0.0), (0.5, 0.0), (0.0, 0.5), (0.5, 0.5)):
        r = rel - (basis @ np.array(h))[:, None]
        d = r - basis @ np.rint(inv @ r)
        near = int(np.sum(np.hypot(d[0], d[1]) <= radius))
        counts[h] = (near, (near - n * p0) / np.sqrt(n * p0 * (1 - p0)))
    n0 = counts[(0.0, 0.0)][0]
    for h in ((0.5, 0.0), (0.0, 0.5), (0.5, 0.5)):
        nh, z = counts[h]
        if z >= COHERENCE_Z and nh >= HALF_CELL_FRACTION * n0:
            raise LatticeNotFound(
                f"{nh} single atoms sit half a cell off the sites of the lattice found ({n0} on them): the cell is "
                "probably twice too large (crowded atoms whose spectrum shows a subharmonic)")


def _check_coherence(x, y, dist, basis, *, tiles: int = 3, min_atoms: int = 20) -> None:
    """Raise :class:`LatticeNotFound` when some part of the frame has no more atoms near a site than chance.

    ``dist`` is every atom's distance from its nearest site, pixels.
    """
    spacing = min(np.hypot(*basis[:, 0]), np.hypot(*basis[:, 1]))
    radius = COHERENCE_RADIUS * spacing
    p0 = min(np.pi * radius**2 / abs(np.linalg.det(basis)), 0.5)
    ex = np.linspace(x.min(), x.max() + 1e-9, tiles + 1)
    ey = np.linspace(y.min(), y.max() + 1e-9, tiles + 1)
    ix = np.clip(np.searchsorted(ex, x, side="right") - 1, 0, tiles - 1)
    iy = np.clip(np.searchsorted(ey, y, side="right") - 1, 0, tiles - 1)
    for t in range(tiles * tiles):
        m = (iy * tiles + ix) == t
        n = int(m.sum())
        if n < min_atoms:
            continue
        near = int(np.sum(dist[m] <= radius))
        z = (near - n * p0) / np.sqrt(n * p0 * (1 - p0))
        if z < COHERENCE_Z:
            raise LatticeNotFound(
                f"the located atoms fit the lattice only in part of the frame: in one ninth of it {near} of {n} sit "
                f"within {COHERENCE_RADIUS} spacing of a site, {n * p0:.0f} would by chance ({z:.1f} sigma); the "
                "vectors or the atoms found there are wrong")


@dataclass(frozen=True)
class FrameOffset:
    """A frame's lattice offset from its single atoms (vectors held fixed).

    Attributes
    ----------
    offset : (float, float)
        Pixels; the lattice translate nearest the reference offset.
    sigma : (float, float)
        1-sigma error of each component, pixels.
    n_atoms : int
        Single atoms in the fit.
    """

    offset: tuple[float, float]
    sigma: tuple[float, float]
    n_atoms: int


def offset_from_atoms(image, geometry: LatticeGeometry, *, fwhm: float, reference=None,
                      min_atoms: int = 5, atoms: LocatedAtoms | None = None) -> FrameOffset:
    """Offset of one frame from the positions of its single atoms, the vectors held fixed.

    The model ``r_n = offset + i_n a1 + j_n a2`` is linear in the two offset components once
    every atom has the indices of its nearest site, so the offset is the weighted mean of the
    atoms' displacements from their sites (weights: inverse position variance), with atoms
    more than :data:`OUTLIER_SIGMA` robust standard deviations off dropped and the indices
    re-assigned until they no longer change. Beyond the optical cut-off this uses what a
    linear fit of the image cannot: that every spot is one atom on one site.

    Parameters
    ----------
    image : (H, W) array_like
        One frame in photons per pixel.
    geometry : LatticeGeometry
        Lattice vectors (pixels) and the reference offset.
    fwhm : float
        PSF FWHM, pixels.
    reference : (float, float), optional
        Offset whose nearest lattice translate is returned (default ``geometry.offset``).
    min_atoms : int
        Fewest single atoms accepted.
    atoms : LocatedAtoms, optional
        Atoms already located in this frame.

    Raises
    ------
    LatticeNotFound
        Fewer than ``min_atoms`` single atoms.
    """
    if atoms is None:
        atoms = locate_atoms(image, fwhm=fwhm)
    sel = atoms.single
    if int(sel.sum()) < min_atoms:
        raise LatticeNotFound(f"only {int(sel.sum())} single atoms in the frame; at least {min_atoms} are needed "
                              "to fit its lattice offset from their positions")
    x, y, sig = atoms.x[sel], atoms.y[sel], np.maximum(atoms.sigma[sel], 0.02)
    basis = geometry.basis
    inv = np.linalg.inv(basis)
    ref = np.asarray(geometry.offset if reference is None else reference, float)
    # displacement of every atom from its nearest site of the reference lattice, wrapped into
    # one cell; the circular mean in the cell's fractional coordinates gives a first offset
    frac = inv @ (np.stack([x, y]) - ref[:, None])
    phase = np.exp(2j * np.pi * frac)
    start = np.angle(np.sum(phase / sig**2, axis=1)) / (2 * np.pi)
    offset = ref + basis @ start
    use = np.ones(x.size, bool)
    w = 1.0 / sig**2
    for _ in range(5):
        rel = np.stack([x, y]) - offset[:, None]
        d = rel - basis @ np.rint(inv @ rel)
        new = offset + (d[:, use] * w[use]).sum(axis=1) / w[use].sum()
        rel = np.stack([x, y]) - new[:, None]
        d = rel - basis @ np.rint(inv @ rel)
        dn = np.hypot(d[0], d[1]) / sig
        scale = np.median(dn[use]) / 1.1774
        keep = dn <= OUTLIER_SIGMA * max(scale, 1e-9)
        done = np.allclose(new, offset, atol=1e-4) and np.array_equal(keep, use)
        offset, use = new, keep
        if done or use.sum() < min_atoms:
            break
    if use.sum() < min_atoms:
        raise LatticeNotFound(f"only {int(use.sum())} single atoms sit on the lattice; at least {min_atoms} are "
                              "needed to fit the frame's offset")
    rel = np.stack([x, y]) - offset[:, None]
    d = rel - basis @ np.rint(inv @ rel)
    # error of the weighted mean, scaled by the scatter actually seen (chi-square per atom)
    chi2 = float(np.sum((d[:, use] ** 2).sum(axis=0) * w[use]) / max(2 * use.sum() - 2, 1))
    err = np.sqrt(max(chi2, 1.0) / w[use].sum())
    frac = inv @ (offset - ref)
    offset = offset - basis @ np.rint(frac)
    return FrameOffset(offset=(float(offset[0]), float(offset[1])), sigma=(float(err), float(err)),
                       n_atoms=int(use.sum()))



#: A part of the frame whose atoms sit off the lattice by more than this many spacings (and
#: by more than :data:`CHECK_SIGNIFICANCE` of their own error) fails the geometry check.
CHECK_TOLERANCE = 0.05
CHECK_SIGNIFICANCE = 4.0


@dataclass(frozen=True)
class GeometryCheck:
    """Whether a lattice explains where the atoms are, tile by tile.

    Attributes
    ----------
    max_deviation : float
        Largest mean displacement of a tile's atoms from their nearest sites, in units of the
        smallest spacing (a tile is one of ``tiles x tiles`` parts of the atoms' bounding box).
    significance : float
        That displacement over its own 1-sigma error.
    n_atoms : int
        Single atoms used.
    ok : bool
        False when some tile is off by more than :data:`CHECK_TOLERANCE` spacings and more than
        :data:`CHECK_SIGNIFICANCE` sigma.
    warning : str
        Why not ok ("" when ok).
    """

    max_deviation: float
    significance: float
    n_atoms: int
    ok: bool
    warning: str = ""


def check_geometry(atoms: LocatedAtoms, geometry: LatticeGeometry, *, offsets=None, tiles: int = 3) -> GeometryCheck:
    """Test the lattice against the positions of the single atoms, part of the frame by part.

    A wrong spacing or angle moves the sites away from the atoms in proportion to the distance
    from where the lattice was pinned; a wrong offset moves them all; a distorted image moves
    the corners. In every tile of a ``tiles x tiles`` grid over the atoms' bounding box the
    weighted mean displacement of the atoms from their nearest sites is measured with its
    error (weights: the atoms' own position errors, the error scaled up by the scatter seen).
    Unlike the fit's statistical uncertainty, this sees a geometry that is simply wrong.

    Parameters
    ----------
    atoms : LocatedAtoms
        From :func:`locate_atoms` (only ``single`` atoms are used).
    geometry : LatticeGeometry
        Vectors and offset, pixels.
    offsets : (n_frames, 2) array_like, optional
        Offset of every frame of ``atoms`` (default ``geometry.offset`` for all).
    tiles : int
        Tiles per axis.
    """
    sel = atoms.single
    x, y, sig, frame = atoms.x[sel], atoms.y[sel], np.maximum(atoms.sigma[sel], 0.02), atoms.frame[sel]
    spacing = min(geometry.spacings)
    if x.size < 2 * tiles * tiles:
        return GeometryCheck(float("nan"), float("nan"), int(x.size), True, "")
    offs = (np.tile(np.asarray(geometry.offset, float), (atoms.n_frames, 1)) if offsets is None
            else np.asarray(offsets, float).reshape(-1, 2))
    basis = geometry.basis
    rel = np.stack([x, y]) - offs[frame].T
    d = rel - basis @ np.rint(np.linalg.inv(basis) @ rel)
    # atoms much farther off than their error are other things (merged spots): leave them out
    dn = np.hypot(d[0], d[1]) / sig
    keep = dn <= OUTLIER_SIGMA * max(np.median(dn) / 1.1774, 1e-9)
    x, y, sig, d = x[keep], y[keep], sig[keep], d[:, keep]
    ex = np.linspace(x.min(), x.max() + 1e-9, tiles + 1)
    ey = np.linspace(y.min(), y.max() + 1e-9, tiles + 1)
    ix = np.clip(np.searchsorted(ex, x, side="right") - 1, 0, tiles - 1)
    iy = np.clip(np.searchsorted(ey, y, side="right") - 1, 0, tiles - 1)
    worst, worst_sig, worst_tile = 0.0, 0.0, None
    w = 1.0 / sig**2
    for t in range(tiles * tiles):
        m = (iy * tiles + ix) == t
        if m.sum() < 5:
            continue
        mean = (d[:, m] * w[m]).sum(axis=1) / w[m].sum()
        chi2 = float(np.sum(((d[:, m] - mean[:, None]) ** 2).sum(axis=0) * w[m]) / max(2 * m.sum() - 2, 1))
        err = np.sqrt(max(chi2, 1.0) / w[m].sum())
        dev = float(np.hypot(*mean))
        if dev / spacing > worst:
            worst, worst_sig, worst_tile = dev / spacing, dev / err, t
    ok = not (worst > CHECK_TOLERANCE and worst_sig > CHECK_SIGNIFICANCE)
    text = ""
    if not ok:
        row, col = divmod(worst_tile, tiles)
        where = (("top", "middle", "bottom")[row] if tiles == 3 else f"row {row}") + " " + \
            (("left", "centre", "right")[col] if tiles == 3 else f"column {col}")
        text = (f"the lattice misses the atoms in the {where} of the frame by {worst:.2f} spacing "
                f"({worst_sig:.0f} sigma): the geometry does not explain the data there (wrong vectors, a "
                "distorted image or a drifting lattice); sites there may be misplaced")
    return GeometryCheck(max_deviation=float(worst), significance=float(worst_sig), n_atoms=int(x.size), ok=ok,
                         warning=text)
