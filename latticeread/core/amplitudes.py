"""Site amplitudes: how many photons each lattice site sent to the camera.

The image model (all in photons, see :meth:`CameraModel.counts_to_photons`) is

    image(p) = background(p) + sum_k A_k * s_k(p) + noise(p),

where ``s_k`` is the pixel-integrated PSF stamp of site ``k`` (it sums to 1 over its
``(2 r + 1)^2`` window, so ``A_k`` is the flux of the site inside the window) and the
background is a constant or a plane. Three estimators are offered:

``"linear"`` (default)
    Weighted least squares on the sparse per-site basis ``B`` (one column per site, one row
    per pixel) plus the background columns. The normal matrix ``G = B^T W B`` is a banded
    symmetric positive-definite matrix (sites only couple to neighbours within two stamp
    radii); it is factorised ONCE per geometry, PSF, frame shape and pixel mask
    (:class:`SiteBasis`), so a frame costs one sparse matrix-vector product ``B^T W y`` and
    one banded triangular solve.
``"nonlinear"``
    Uses the binary nature of occupation. Below a spacing of about 0.7 FWHM the linear
    problem is degenerate: for an Airy PSF the optical cut-off ``2 NA / lambda = 1.03 / FWHM``
    lies inside the lattice's Brillouin zone (its corner is at ``1 / (sqrt(2) d)``), so some
    occupation patterns leave no trace in the image at all and the linear estimate's noise
    explodes. Every site is instead re-tested, in turn, with all other sites' current
    contributions subtracted: the per-site statistic ``t_k = atom n_k + s_k^T W r / s_k^T W s_k``
    is the site's own matched-filter amplitude, and a site is flipped when that lowers the
    squared residual (the log-likelihood ratio of the two states under Gaussian noise with the
    weights' variance). See :meth:`SiteBasis._refine`.
``"wiener"`` / ``"richardson_lucy"``
    Deconvolution of the whole frame followed by summing the deconvolved image over each
    site's cell (the pixels nearer to that site than to any other; :func:`cell_integrate`).

The frame-to-frame phase
------------------------
The lattice vectors are fixed by the calibration; only the offset moves, by a shift
``delta`` that the phase refit keeps within about half a lattice spacing. Two facts let the
factorisation be reused for every frame:

* The normal matrix only depends on the *relative* positions of sites: ``G_kl`` is the
  pixel sum of ``s_k s_l``. By the Poisson summation formula the pixel sum equals the
  continuous overlap integral, independent of where the pair sits relative to the pixel
  grid, as long as the product of two pixel-integrated PSFs has no spatial frequency above
  one cycle per pixel -- exactly true for an Airy PSF with FWHM above about 1.03 pixels
  (cut-off ``2 NA / lambda``), and to high accuracy for Gaussian PSFs with FWHM above 2
  pixels. What breaks it: stamps cut by the frame border (those sites are flagged EDGE) and
  the truncation of each stamp to its ``(2 r + 1)^2`` window (measured: amplitude errors of
  about 1 % of an atom on noiseless frames shifted by a fraction of a pixel, far below the
  shot noise).
* The projection ``B^T W y`` does depend on the sub-pixel phase. Per frame, the region
  around the sites is correlated once with the centred stamp (one real FFT pair, the
  kernel's spectrum cached) and the correlation is read off at the site centres by cubic
  spline interpolation -- it is band-limited like the PSF, so any sub-pixel position is
  exact up to the interpolation error (checked against the explicit sparse basis in the
  tests). No PSF is evaluated per frame and no basis matrix is rebuilt.

Only the pixels of that region (the sites' bounding box widened by a stamp radius and a
lattice spacing) enter the fit, including the background: give the reconstruction a region
with some empty lattice around the atoms (:func:`latticeread.core.pipeline.calibrate` does),
otherwise a constant background and a uniform offset of all amplitudes cannot be told apart.

Flags
-----
Per-site flags (:mod:`latticeread.core.flags`): EDGE when more than 5 % of the site's stamp
falls outside the frame, MASKED when more than 5 % falls on pixels excluded by the mask,
SATURATED / NONFINITE when more than 1 % falls on saturated / NaN pixels. Saturated and
non-finite pixels are left out of the fit (the factorisation is corrected with a low-rank
Woodbury update), so their sites still get an estimate, but flagged.
"""

from __future__ import annotations

import collections
import contextlib
import hashlib
import logging
import threading
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.linalg
import scipy.sparse
import scipy.sparse.linalg
from scipy import ndimage, signal

from latticeread.core import flags as site_flags
from latticeread.core.geometry import LatticeGeometry, SiteGrid, lattice_sites
from latticeread.core.psf import PSFModel
from latticeread.errors import ReconstructionError

__all__ = [
    "AMPLITUDE_METHODS",
    "BACKGROUND_MODELS",
    "WEIGHTINGS",
    "AmplitudeResult",
    "OffsetFit",
    "camera_weights",
    "SiteBasis",
    "extract_amplitudes",
    "wiener_deconvolve",
    "richardson_lucy_deconvolve",
    "cell_labels",
    "cell_integrate",
    "deconvolution_amplitudes",
]

log = logging.getLogger(__name__)

try:  # optional: keep BLAS single-threaded inside the small banded solves (threads only add overhead
    # there, and on a busy machine OpenBLAS's spinning threads slow them down a hundredfold)
    from threadpoolctl import ThreadpoolController as _ThreadpoolController
except ImportError:  # pragma: no cover - without it BLAS keeps its default threads
    _ThreadpoolController = None


class _OneThread:
    """Context manager limiting BLAS to one thread while it is active (no-op without threadpoolctl)."""

    def __init__(self):
        self._controller = _ThreadpoolController() if _ThreadpoolController is not None else None

    def __call__(self):
        if self._controller is None:
            return contextlib.nullcontext()
        return self._controller.limit(limits=1, user_api="blas")

#: Estimators understood by :func:`extract_amplitudes` and the pipeline.
AMPLITUDE_METHODS = ("linear", "nonlinear", "wiener", "richardson_lucy")

#: Pixel weightings of the linear fit understood by the pipeline (see :func:`camera_weights`).
WEIGHTINGS = ("none", "camera")

#: Fraction of a site's stamp outside the frame / on masked pixels that sets EDGE / MASKED.
EDGE_FRACTION = 0.05
#: Fraction of a site's stamp on saturated / non-finite pixels that sets SATURATED / NONFINITE.
BAD_PIXEL_FRACTION = 0.01
#: Largest number of excluded (NaN or saturated) pixels handled by the low-rank correction.
MAX_BAD_PIXELS = 4000


@dataclass(frozen=True)
class AmplitudeResult:
    """Site amplitudes of one frame.

    Attributes
    ----------
    amplitudes : (N,) ndarray of float
        Photons per site inside the PSF window (background removed).
    background : float
        Mean background in photons per pixel over the frame.
    flags : (N,) ndarray of uint8
        Bit flags from :mod:`latticeread.core.flags` (EDGE, MASKED, SATURATED, NONFINITE).
    x, y : (N,) ndarray of float
        Site centres used for this frame, pixels.
    method : str
        Estimator that produced the amplitudes.
    iterations : int
        Refinement passes (``"nonlinear"``) or deconvolution iterations; 0 for ``"linear"``.
    warnings : tuple of str
        Reasons why the amplitudes may mislead.
    background_coefficients : (m,) ndarray or None
        The fitted background's coefficients (:meth:`SiteBasis.background_image` makes the
        image of them); None where the estimator does not fit them.
    """

    amplitudes: np.ndarray = field(repr=False)
    background: float
    flags: np.ndarray = field(repr=False)
    x: np.ndarray = field(repr=False)
    y: np.ndarray = field(repr=False)
    method: str = "linear"
    iterations: int = 0
    warnings: tuple[str, ...] = ()
    background_coefficients: np.ndarray | None = field(default=None, repr=False, compare=False)


@dataclass(frozen=True)
class OffsetFit:
    """A frame's lattice offset from a real-space fit of its occupied sites (:meth:`SiteBasis.fit_offset_sites`).

    Attributes
    ----------
    offset : (float, float)
        Pixels.
    sigma : (float, float)
        1-sigma error of each component, pixels (NaN when it could not be estimated).
    n_atoms : int
        Occupied sites in the fit.
    iterations : int
    atom_photons : float
        Photons of one atom fitted to the pattern.
    """

    offset: tuple[float, float]
    sigma: tuple[float, float]
    n_atoms: int
    iterations: int
    atom_photons: float


def _as_image(image, frame_shape=None) -> np.ndarray:
    image = np.asarray(image)
    if image.ndim != 2:
        raise ReconstructionError(
            f"expected one 2-D frame, got an array of shape {image.shape}; pass frames one at a time")
    if not (np.issubdtype(image.dtype, np.number) and not np.iscomplexobj(image)):
        raise ReconstructionError(f"frame must hold real numbers, got dtype {image.dtype}")
    if frame_shape is not None and image.shape != tuple(frame_shape):
        raise ReconstructionError(
            f"frame is {image.shape[0]}x{image.shape[1]} pixels but the site basis was built for "
            f"{frame_shape[0]}x{frame_shape[1]}")
    return image


class SiteBasis:
    """The sparse per-site PSF basis of one lattice in one frame shape, factorised once.

    Parameters
    ----------
    geometry : LatticeGeometry
        Lattice vectors and the reference offset (pixels). Frames whose offset differs are
        handled by passing ``offset=`` to the per-frame methods.
    frame_shape : (int, int)
        ``(height, width)`` in pixels.
    psf : PSFModel
        Image of one atom; its ``radius`` sets the stamp window.
    sites : SiteGrid, optional
        Sites to fit, at the reference offset (default: every site whose centre is in the
        frame). The site list, and hence the matrix shape, never changes afterwards.
    mask : (H, W) ndarray of bool, optional
        Pixels to use (True). Excluded pixels carry no weight in the fit.
    pixel_weights : (H, W) ndarray of float, optional
        Inverse noise variance per pixel (1/photons^2), e.g. from a per-pixel read-noise map or
        :func:`camera_weights`. Default: uniform weights (unweighted least squares). Weights fixed
        on the pixels make the normal matrix depend on the frame's lattice phase; the linear
        estimator corrects for that per frame by iterative refinement (:meth:`_phase_corrected`),
        which converges when the weights vary little within a stamp. The binary refinement and
        the offset fit use the reference-phase matrix as they are.
    background : {"constant", "plane", "poly2", "poly3", "none"}
        ``poly2`` / ``poly3``: a smooth background, a polynomial of degree 2 / 3 in the frame
        coordinates (a gradient with a broad hump or dip), fitted per frame with the sites.
        Background model fitted together with the sites.
    ridge : float
        Relative Tikhonov term added to the diagonal of the normal matrix (times its mean
        diagonal) so that sites without usable pixels do not make it singular.
    local_psfs : sequence of PSFModel, optional
        A PSF that changes across the field: site ``k``'s stamp is the mix
        ``sum_j local_weights[k, j] * stamp_j`` of these PSFs (each with ``psf.radius``). The
        normal matrix is still factorised once; a frame costs one stamp correlation per PSF
        that some site uses. Default: ``psf`` everywhere.
    local_weights : (N, J) ndarray, optional
        Non-negative mixing weights of the sites (rows sum to 1), required with ``local_psfs``.

    Notes
    -----
    Cost: building the basis tabulates the pixel-integrated PSF once, builds the sparse basis
    at the reference offset and factorises the banded normal matrix (about a second for a
    few thousand sites); per frame, :meth:`project` is one FFT correlation of the site region
    plus a spline lookup and :meth:`solve` a banded triangular solve (with the bandwidth in
    :attr:`_factor.bandwidth`).
    """

    def __init__(self, geometry: LatticeGeometry, *, frame_shape, psf: PSFModel, sites: SiteGrid | None = None,
                 mask=None, pixel_weights=None, background: str = "constant", ridge: float = 1e-6,
                 local_psfs=None, local_weights=None):
        if background not in BACKGROUND_MODELS:
            raise ReconstructionError(f"unknown background model {background!r}; use one of "
                                      f"{', '.join(repr(b) for b in BACKGROUND_MODELS)}")
        self.geometry = geometry
        self.frame_shape = (int(frame_shape[0]), int(frame_shape[1]))
        self.psf = psf
        self.sites = sites if sites is not None else lattice_sites(geometry, self.frame_shape)
        if len(self.sites) == 0:
            raise ReconstructionError("no lattice site lies inside the frame; check the lattice geometry")
        self.background_model = background
        height, width = self.frame_shape
        r = int(psf.radius)
        self.radius = r
        # padding: the stamp radius plus room for the phase to move by a lattice spacing
        self.pad = r + int(np.ceil(max(geometry.spacings))) + 1
        self.padded_shape = (height + 2 * self.pad, width + 2 * self.pad)
        hp, wp = self.padded_shape

        weights = np.ones(self.frame_shape) if pixel_weights is None else np.asarray(pixel_weights, float)
        if weights.shape != self.frame_shape:
            raise ReconstructionError(f"pixel weights are {weights.shape} but the frame is {self.frame_shape}")
        if not np.all(np.isfinite(weights)) or np.any(weights < 0):
            raise ReconstructionError("pixel weights must be finite and non-negative")
        inside = np.zeros(self.padded_shape)
        inside[self.pad:self.pad + height, self.pad:self.pad + width] = 1.0
        self._inside = inside.ravel()
        if mask is not None:
            mask = np.asarray(mask, dtype=bool)
            if mask.shape != self.frame_shape:
                raise ReconstructionError(f"mask is {mask.shape[0]}x{mask.shape[1]} pixels but the frame is "
                                          f"{height}x{width}")
            weights = weights * mask
        self.mask = mask
        # only pixels near the sites enter the fit (the sites' bounding box widened by the stamp
        # radius and a lattice spacing): per-frame work does not grow with the frame size
        allow = max(geometry.spacings) + 1.0
        y0 = max(int(np.floor(self.sites.y.min() - allow)) - r - 4, -self.pad)
        y1 = min(int(np.ceil(self.sites.y.max() + allow)) + r + 5, height + self.pad)
        x0 = max(int(np.floor(self.sites.x.min() - allow)) - r - 4, -self.pad)
        x1 = min(int(np.ceil(self.sites.x.max() + allow)) + r + 5, width + self.pad)
        self._roi = (y0, y1, x0, x1)
        self.crop = (slice(max(y0, 0), max(min(y1, height), 0)), slice(max(x0, 0), max(min(x1, width), 0)))
        in_roi = np.zeros(self.frame_shape)
        in_roi[self.crop] = 1.0
        weights = weights * in_roi
        w = np.zeros(self.padded_shape)
        w[self.pad:self.pad + height, self.pad:self.pad + width] = weights
        self._weights = w.ravel()
        self._usable = (w > 0).astype(float).ravel()
        self._uniform = pixel_weights is None and mask is None
        self._weighted_pixels = pixel_weights is not None

        self._stamps = cached_table("stamps", psf, _StampSampler)
        self._mix = None
        if local_psfs is not None:
            self._set_local_psfs(local_psfs, local_weights)
        oy, ox = np.mgrid[-r:r + 1, -r:r + 1]
        self._window = (oy.ravel() * wp + ox.ravel()).astype(np.int64)
        n = len(self.sites)
        self._indptr = np.arange(0, n * self._window.size + 1, self._window.size, dtype=np.int64)
        self._cache_key = None
        self._cache = None

        # background columns (padded frame coordinates), weighted later
        yy, xx = np.mgrid[0:hp, 0:wp]
        cols = [(c * inside).ravel() for c in _background_columns(background, yy - self.pad, xx - self.pad,
                                                                   self.frame_shape)]
        self._bg = np.stack(cols, axis=1) if cols else np.zeros((hp * wp, 0))
        self._bg_nz = np.flatnonzero(self._inside)

        self._prepare_projection(weights, mask, pixel_weights)
        self._one_thread = _OneThread()
        with self._one_thread():
            self._factorise(ridge)

    def _set_local_psfs(self, psfs, weights):
        """Per-site mixes of several PSFs; PSFs no site uses are dropped."""
        psfs = list(psfs)
        weights = np.asarray(weights, float)
        if weights.shape != (len(self.sites), len(psfs)):
            raise ReconstructionError(f"local PSF weights are {weights.shape} but there are {len(self.sites)} sites "
                                      f"and {len(psfs)} local PSFs")
        if not np.all(np.isfinite(weights)) or np.any(weights < 0) or \
                not np.allclose(weights.sum(axis=1), 1.0, atol=1e-6):
            raise ReconstructionError("local PSF weights must be non-negative and sum to 1 for every site")
        if any(int(p.radius) != self.radius for p in psfs):
            raise ReconstructionError(f"every local PSF needs the stamp radius of the main PSF ({self.radius} pixels)")
        used = np.flatnonzero(weights.max(axis=0) > 0)
        self._mix = weights[:, used]
        self._local = [psfs[j] for j in used]
        self._local_stamps = [cached_table("stamps", psfs[j], _StampSampler) for j in used]

    def _factorise(self, ridge):
        """Normal matrix at the reference offset, its banded Cholesky factor, background couplings."""
        n = len(self.sites)
        bt = self._basis_t((0.0, 0.0))
        wbt = scipy.sparse.csr_matrix((bt.data * self._weights[bt.indices], bt.indices, bt.indptr), shape=bt.shape)
        gram = (wbt @ bt.T).tocsr()
        diag = gram.diagonal()
        scale = float(np.mean(diag[diag > 0])) if np.any(diag > 0) else 1.0
        self._ridge = ridge * scale
        gram = gram + scipy.sparse.identity(n, format="csr") * self._ridge
        self.gram = gram
        self.gram_diagonal = gram.diagonal().copy()
        # sites by pixel row (or column): for a lattice turned against the pixel axes a narrower
        # band than the lattice's own row order
        sx, sy = np.asarray(self.sites.x, float), np.asarray(self.sites.y, float)
        self._factor = _BandedSPD(gram, orders=(np.lexsort((sx, sy)), np.lexsort((sy, sx))))
        # couplings to the background columns and the Schur complement
        wbg = self._bg * self._weights[:, None]
        self._v = np.asarray(bt @ wbg) if self._bg.shape[1] else np.zeros((n, 0))
        self._e = self._bg.T @ wbg
        if self._bg.shape[1]:
            self._z = self._factor.solve(self._v)
            schur = self._e - self._v.T @ self._z
            self._schur = scipy.linalg.cho_factor(schur)
        self._n_bg_pixels = float(np.sum(self._weights > 0))

    def _prepare_projection(self, weights, mask, pixel_weights):
        height, width = self.frame_shape
        r = self.radius
        geometry = self.geometry
        background = self.background_model
        # per-frame projections: correlation of the frame with the centred stamp on a region
        # around the sites, then cubic-spline interpolation at the (shifted) site centres
        self._kernel = self.psf.stamps([0.0], [0.0])[0][::-1, ::-1].copy()
        self._kernels = None if self._mix is None else \
            np.stack([p.stamps([0.0], [0.0])[0][::-1, ::-1] for p in self._local])
        self._wcrop = None if self._uniform else weights[self.crop]
        yy, xx = np.mgrid[0:height, 0:width]
        bgf = _background_columns(background, yy, xx, self.frame_shape)
        self._bg_crop = np.stack([b[self.crop].ravel() for b in bgf]) if bgf else np.zeros((0, 0))
        self._frac_inside = self._spline(np.ones(self.frame_shape))
        self._frac_usable = self._spline(weights > 0) if mask is not None or pixel_weights is not None \
            else self._frac_inside

    # --- per-frame geometry --------------------------------------------------------------
    def positions(self, offset=None) -> tuple[np.ndarray, np.ndarray]:
        """Site centres ``(x, y)`` in pixels for a frame whose lattice offset is ``offset``."""
        dx, dy = self._shift(offset)
        return self.sites.x + dx, self.sites.y + dy

    def _shift(self, offset) -> tuple[float, float]:
        if offset is None:
            return 0.0, 0.0
        return float(offset[0] - self.geometry.offset[0]), float(offset[1] - self.geometry.offset[1])

    def _basis_t(self, shift) -> scipy.sparse.csr_matrix:
        """Transposed basis ``B^T`` (N sites x padded pixels) for a frame shifted by ``shift``."""
        key = (float(shift[0]), float(shift[1]))
        if self._cache_key == key:
            return self._cache
        x = self.sites.x + shift[0]
        y = self.sites.y + shift[1]
        lim = self.pad - self.radius
        ix = np.clip(np.rint(x).astype(np.int64), -lim, self.frame_shape[1] - 1 + lim)
        iy = np.clip(np.rint(y).astype(np.int64), -lim, self.frame_shape[0] - 1 + lim)
        if self._mix is None:
            data = self._stamps(x - ix, y - iy).reshape(len(x), -1)
        else:
            data = np.zeros((len(x), self._window.size))
            for j, sampler in enumerate(self._local_stamps):
                sel = np.flatnonzero(self._mix[:, j] > 0)
                data[sel] += self._mix[sel, j, None] * sampler(x[sel] - ix[sel], y[sel] - iy[sel]).reshape(sel.size, -1)
        hp, wp = self.padded_shape
        anchor = (iy + self.pad) * wp + (ix + self.pad)
        indices = (anchor[:, None] + self._window[None, :]).ravel()
        bt = scipy.sparse.csr_matrix((data.ravel(), indices, self._indptr), shape=(len(x), hp * wp))
        self._cache_key, self._cache = key, bt
        return bt

    def _padded(self, image) -> np.ndarray:
        h, w = self.frame_shape
        buf = np.zeros(self.padded_shape)
        buf[self.pad:self.pad + h, self.pad:self.pad + w] = image
        return buf.ravel()

    # --- the linear estimator --------------------------------------------------------------
    def _spline(self, image) -> np.ndarray:
        """Cubic-spline coefficients of ``image`` correlated with the centred stamp, on the region.

        With local PSFs: one coefficient array per local PSF, stacked on the first axis.
        """
        y0, y1, x0, x1 = self._roi
        image = np.asarray(image, float)
        if image.shape == self.frame_shape:
            image = image[self.crop]
        buf = np.zeros((y1 - y0, x1 - x0))
        ys, xs = self.crop
        buf[ys.start - y0:ys.stop - y0, xs.start - x0:xs.stop - x0] = image
        # linear correlation via one real FFT pair; the kernel's spectrum is computed once
        k = self._kernel.shape[0]
        shape = buf.shape
        if getattr(self, "_kernel_fft_shape", None) != shape:
            fshape = tuple(scipy.fft.next_fast_len(n + k - 1, real=True) for n in shape)
            kernels = self._kernel if self._kernels is None else self._kernels
            self._kernel_fft = scipy.fft.rfft2(kernels, s=fshape)
            self._kernel_fft_shape, self._fshape = shape, fshape
        full = scipy.fft.irfft2(scipy.fft.rfft2(buf, s=self._fshape) * self._kernel_fft, s=self._fshape)
        h0 = (k - 1) // 2
        corr = full[..., h0:h0 + shape[0], h0:h0 + shape[1]]
        if corr.ndim == 2:
            return ndimage.spline_filter(corr, order=3, mode="mirror")
        return np.stack([ndimage.spline_filter(c, order=3, mode="mirror") for c in corr])

    def _sample(self, coef, offset, extra=(0.0, 0.0), every: int = 1) -> np.ndarray:
        """Spline ``coef`` sampled at the site centres for ``offset`` (+ ``extra``), pixels."""
        dx, dy = self._shift(offset)
        y0, _, x0, _ = self._roi
        sy, sx = self.sites.y[::every], self.sites.x[::every]
        coords = np.stack([sy + dy + extra[1] - y0, sx + dx + extra[0] - x0])
        if coef.ndim == 2:
            return ndimage.map_coordinates(coef, coords, order=3, prefilter=False, mode="mirror")
        mix = self._mix[::every]
        out = np.zeros(sy.size)
        for j in range(coef.shape[0]):
            sel = np.flatnonzero(mix[:, j] > 0)
            out[sel] += mix[sel, j] * ndimage.map_coordinates(coef[j], coords[:, sel], order=3, prefilter=False,
                                                              mode="mirror")
        return out

    def _weighted(self, image, bad_pixels=None) -> np.ndarray:
        """The fitted part of a frame (the region around the sites), bad pixels zeroed, weighted."""
        y = np.asarray(image[self.crop], float)
        if bad_pixels is not None:
            y = np.where(bad_pixels[self.crop], 0.0, y)
        return y if self._wcrop is None else y * self._wcrop

    def project(self, image, *, offset=None, bad_pixels=None):
        """Right-hand side of the normal equations for one frame.

        Parameters
        ----------
        image : (H, W) ndarray
            Frame in photons per pixel. Non-finite pixels must be listed in ``bad_pixels``.
        offset : (float, float), optional
            Lattice offset of this frame, pixels (default: the reference offset).
        bad_pixels : (H, W) ndarray of bool, optional
            Pixels to leave out of this frame's fit (NaN, saturated).

        Returns
        -------
        c : (N,) ndarray
            ``B^T W y`` (photons): the frame correlated with the PSF stamp and interpolated at
            the site centres (cubic spline; the correlation is band-limited like the PSF, so the
            interpolation error is far below the shot noise for FWHM >= 2 pixels).
        d : (m,) ndarray
            Background projections.
        """
        image = _as_image(image, self.frame_shape)
        y = self._weighted(image, bad_pixels)
        c = self._sample(self._spline(y), offset)
        return c, self._background_projection(y)

    def _background_projection(self, y) -> np.ndarray:
        if self.background_model == "none":
            return np.zeros(0)
        if self.background_model == "constant":
            return np.array([y.sum()])
        return np.einsum("ij,j->i", self._bg_crop, y.ravel())

    def project_exact(self, image, *, offset=None):
        """``B^T W y`` from the explicit sparse basis (stamps at the exact positions); for checks."""
        image = _as_image(image, self.frame_shape)
        full = np.zeros(self.frame_shape)
        full[self.crop] = self._weighted(image)
        return self._basis_t(self._shift(offset)) @ self._padded(full)

    def solve(self, c, d, *, correction=None):
        """Solve the normal equations for site amplitudes and background coefficients.

        Parameters
        ----------
        c, d : ndarray
            Output of :meth:`project`.
        correction : _LowRank, optional
            Low-rank correction for pixels left out of this frame.

        Returns
        -------
        amplitudes : (N,) ndarray, photons
        background : (m,) ndarray, background coefficients (photons per pixel)
        """
        if correction is not None:
            return correction.solve(c, d)
        return self._solve_full(c, d)

    def _solve_full(self, c, d):
        c = np.asarray(c, float)
        a0 = self._factor.solve(c)
        if not self._bg.shape[1]:
            return a0, np.zeros((0,) + c.shape[1:])
        rhs = d - np.einsum("ij,i...->j...", self._v, a0)
        b = rhs / self._schur[0][0, 0] ** 2 if self._v.shape[1] == 1 else scipy.linalg.cho_solve(self._schur, rhs)
        return a0 - np.einsum("ij,j...->i...", self._z, b), b

    def _low_rank(self, bad_flat, offset):
        """Woodbury correction for leaving the padded-frame pixels ``bad_flat`` out of the fit."""
        bt = self._basis_t(self._shift(offset))
        sw = np.sqrt(self._weights[bad_flat])
        u_sites = (bt[:, bad_flat].toarray()) * sw[None, :]  # (N, nb)
        u_bg = self._bg[bad_flat].T * sw[None, :]  # (m, nb)
        return _LowRank(self, u_sites, u_bg)

    def background_level(self, coefficients) -> float:
        """Mean background over the frame in photons per pixel from fitted coefficients."""
        if coefficients.size == 0:
            return 0.0
        if self.background_model.startswith("poly"):  # the mean of the fitted surface over the fitted region
            return float(self._bg_crop.mean(axis=1) @ coefficients)
        return float(coefficients[0])

    def background_image(self, coefficients) -> np.ndarray:
        """The fitted background over the frame (photons per pixel) from fitted coefficients."""
        height, width = self.frame_shape
        yy, xx = np.mgrid[0:height, 0:width]
        cols = _background_columns(self.background_model, yy, xx, self.frame_shape)
        out = np.zeros(self.frame_shape)
        for c, b in zip(cols, np.asarray(coefficients, float)):
            out += b * c
        return out

    # --- the lattice phase by model fitting --------------------------------------------------
    def explained(self, image, *, offset) -> float:
        """Weighted image energy explained by the least-squares fit at ``offset`` (photons^2).

        ``||y||^2 - ||y - D theta||^2 = theta . D^T W y`` for the least-squares ``theta`` (site
        amplitudes and background): the larger, the better the lattice at ``offset`` fits.
        """
        c, d = self.project(image, offset=offset)
        a, b = self._solve_full(c, d)
        return float(np.einsum("i,i->", a, c) + np.einsum("i,i->", b, d))

    def fit_offset(self, image, *, start=None, search: bool = False, atom_photons: float | None = None,
                   max_iter: int = 8, tol: float = 3e-3) -> tuple[tuple[float, float], int]:
        """Lattice offset of one frame by fitting the image model (vectors kept).

        Alternates (i) the site amplitudes at the current offset (least squares, or the binary
        refinement when ``atom_photons`` is given) and (ii) the offset that best fits the image
        with those amplitudes held fixed: minimising ``||y - bg - B(delta) a||^2`` over ``delta``
        means maximising ``a . c(delta)`` (``B^T B`` does not depend on ``delta``, see the module
        notes), a 2-D Newton search on the cubic-spline correlation image -- no new solve.
        Works at any spacing, also where the lattice's Fourier peaks lie beyond the optical
        cut-off (spacing below ~1 FWHM for an Airy PSF).

        Parameters
        ----------
        image : (H, W) ndarray
            Frame in photons per pixel (finite).
        start : (float, float), optional
            Starting offset, pixels (default: the reference offset).
        search : bool
            First scan a 6 x 6 grid over one unit cell around ``start`` for the largest
            matched-filter energy ``sum_k c_k^2`` (when no reliable start is known).
        atom_photons : float, optional
            Photons of one atom: use binary amplitudes (for spacings below ~0.7 FWHM).
        max_iter : int
            Largest number of alternations.
        tol : float
            Stop when the offset moves less than this, pixels.

        Returns
        -------
        offset : (float, float)
            Pixels; the lattice translate nearest the reference offset (indices stay stable).
        iterations : int
        """
        with self._one_thread():
            return self._fit_offset(image, start=start, search=search, atom_photons=atom_photons,
                                    max_iter=max_iter, tol=tol)[:2]

    def fit_offset_model(self, image, *, start=None, search: bool = False, max_iter: int = 8,
                         tol: float = 3e-3) -> OffsetFit:
        """:meth:`fit_offset` with least-squares amplitudes, and the offset's 1-sigma error.

        The 1-sigma is the heteroscedasticity-robust ("sandwich", HC0) covariance of a weighted
        least-squares parameter (White 1980, from memory): with ``g`` the derivative of the
        model image with respect to the offset, made orthogonal to the site and background
        columns (the amplitudes are re-fitted at every offset), ``W`` the pixel weights and
        ``r`` the residual, ``cov = A^-1 M A^-1`` with ``A = g^T W g`` and
        ``M = g^T W r r^T W g`` summed pixel by pixel. It needs no noise model and holds for
        Poisson noise that differs between atoms and background.

        Returns
        -------
        OffsetFit
            ``n_atoms`` counts the sites with an amplitude above half the median of the upper
            half; ``atom_photons`` is NaN (least-squares amplitudes).
        """
        with self._one_thread():
            offset, it, y = self._fit_offset(image, start=start, search=search, atom_photons=None,
                                             max_iter=max_iter, tol=tol)
            sigma, a = self._offset_sigma(image, offset)
        bright = a[a > 0]
        level = 0.5 * float(np.median(bright[bright >= np.median(bright)])) if bright.size else np.inf
        return OffsetFit(offset=offset, sigma=sigma, n_atoms=int(np.sum(a > level)), iterations=it,
                         atom_photons=float("nan"))

    def _offset_sigma(self, image, offset):
        """1-sigma (x, y) of a least-squares offset (see :meth:`fit_offset_model`) and the amplitudes there."""
        image = _as_image(image, self.frame_shape).astype(float)
        raw = np.where(np.isfinite(image[self.crop]), image[self.crop], 0.0)
        w = (np.ones(raw.shape) if self._wcrop is None else np.asarray(self._wcrop, float)).ravel()
        ys, xs = self.crop
        hp, wp = self.padded_shape
        idx = ((np.arange(ys.start, ys.stop) + self.pad)[:, None] * wp
               + (np.arange(xs.start, xs.stop) + self.pad)[None, :]).ravel()
        bt = self._basis_t(self._shift(offset))

        def fit(cols):  # least-squares sites and background for pixel columns of the crop
            pad = np.zeros((hp * wp, cols.shape[1]))
            pad[idx] = w[:, None] * cols
            d = np.stack([self._background_projection((w * col).reshape(raw.shape)) for col in cols.T], axis=1)
            a, b = self._solve_full(np.asarray(bt @ pad), d)
            sites = np.asarray(bt.T @ a)
            model = sites[idx]
            if b.size:
                model = model + self._bg_crop.T @ b
            return a[:, 0], sites[:, 0], model

        a, sites, model = fit(raw.reshape(-1, 1))
        resid = raw.ravel() - model[:, 0]
        # the model image's derivative with respect to the offset is minus its spatial gradient;
        # the site image is PSF-blurred (band-limited), so the spectral derivative is accurate.
        # Taken on the crop widened by the padding (the stamps of the sites that reach the crop).
        r0, r1 = ys.start, ys.stop + 2 * self.pad
        c0, c1 = xs.start, xs.stop + 2 * self.pad
        window = sites.reshape(hp, wp)[r0:r1, c0:c1]
        shape = (scipy.fft.next_fast_len(window.shape[0], real=True),
                 scipy.fft.next_fast_len(window.shape[1], real=True))
        spectrum = scipy.fft.rfft2(window, s=shape)
        kx = 2 * np.pi * scipy.fft.rfftfreq(shape[1])
        ky = 2 * np.pi * scipy.fft.fftfreq(shape[0])
        if shape[1] % 2 == 0:
            kx[-1] = 0.0
        if shape[0] % 2 == 0:
            ky[shape[0] // 2] = 0.0
        inner = (slice(self.pad, self.pad + raw.shape[0]), slice(self.pad, self.pad + raw.shape[1]))
        g = np.stack([-scipy.fft.irfft2(1j * kx[None, :] * spectrum, s=shape)[inner].ravel(),
                      -scipy.fft.irfft2(1j * ky[:, None] * spectrum, s=shape)[inner].ravel()], axis=1)
        g = g - fit(g)[2]  # the part of the offset's signature the amplitudes cannot absorb
        info = g.T @ (w[:, None] * g)
        score = g * (w * resid)[:, None]
        try:
            inv = np.linalg.inv(info)
        except np.linalg.LinAlgError:
            return (float("nan"), float("nan")), a
        cov = inv @ (score.T @ score) @ inv
        return (float(np.sqrt(max(cov[0, 0], 0.0))), float(np.sqrt(max(cov[1, 1], 0.0)))), a

    def _offset_start(self, image, *, start, search):
        """Weighted frame, its spline and background projection, and the starting offset.

        The start is ``start`` (or the calibration's offset); with ``search`` the best of a
        6 x 6 grid over one cell by matched-filter energy, from at most 1500 sites.
        Returns ``(y, coef, d, best, ref)``.
        """
        image = _as_image(image, self.frame_shape).astype(float)
        ref = np.asarray(self.geometry.offset, float)
        best = ref.copy() if start is None else np.asarray(start, float).reshape(2).copy()
        y = self._weighted(image)
        y = np.where(np.isfinite(y), y, 0.0)
        coef = self._spline(y)
        d = self._background_projection(y)
        if search:
            a1, a2 = np.asarray(self.geometry.a1), np.asarray(self.geometry.a2)
            step = max(1, len(self.sites) // 1500)
            grid = (np.arange(6) - 2.5) / 6
            trials = [best + u * a1 + v * a2 for u in grid for v in grid]
            energy = [float(np.sum(self._sample(coef, t, every=step) ** 2)) for t in trials]
            best = trials[int(np.argmax(energy))]
        return y, coef, d, best, ref

    def _fit_offset(self, image, *, start, search, atom_photons, max_iter, tol):
        y, coef, d, best, ref = self._offset_start(image, start=start, search=search)
        a1, a2 = np.asarray(self.geometry.a1), np.asarray(self.geometry.a2)
        h = 0.05
        stencil = np.array([(0, 0), (1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (-1, -1)], float) * h
        zeros_bg = np.zeros((d.size, 2))
        pattern = None
        it = 0
        for it in range(1, max_iter + 1):
            cs = [self._sample(coef, best, extra=e) for e in stencil]
            jac = np.stack([cs[1] - cs[2], cs[3] - cs[4]], axis=1) / (2 * h)
            dxx = (cs[1] - 2 * cs[0] + cs[2]) / h**2
            dyy = (cs[3] - 2 * cs[0] + cs[4]) / h**2
            dxy = (cs[5] - cs[1] - cs[3] + 2 * cs[0] - cs[2] - cs[4] + cs[6]) / (2 * h**2)
            if atom_photons is None:
                # Newton on the explained energy E(delta) = c^T K c (amplitudes re-fitted jointly);
                # K c and K J in one banded solve with three right-hand sides
                sol, bsol = self._solve_full(np.column_stack([cs[0], jac]),
                                             np.column_stack([d[:, None], zeros_bg]))
                a, b, kj = sol[:, 0], bsol[:, 0], sol[:, 1:]
                curv = jac.T @ kj
            else:
                a, b = self._solve_full(cs[0], d)
                # binary amplitudes held fixed while the offset moves: maximise a . c(delta)
                starts = None if pattern is None else (pattern,)
                stat, _ = self._refine(cs[0], d, a, b, atom=atom_photons, correction=None, max_iter=200,
                                       starts=starts)
                pattern = stat > atom_photons / 2
                a = atom_photons * pattern
                curv = np.zeros((2, 2))
            grad = 2 * jac.T @ a
            hess = 2 * curv + 2 * np.array([[a @ dxx, a @ dxy], [a @ dxy, a @ dyy]])
            if np.all(np.linalg.eigvalsh(hess) < 0):
                step = -np.linalg.solve(hess, grad)
            else:  # not near a maximum yet: move uphill by a bounded step
                step = grad / (np.linalg.norm(grad) or 1.0) * 0.25
            norm = np.hypot(*step)
            if norm > 0.5:
                step *= 0.5 / norm
            best = best + step
            if np.hypot(*step) < tol:
                break
        frac = self.geometry.reciprocal @ (best - ref)
        best = best - np.rint(frac[0]) * a1 - np.rint(frac[1]) * a2
        return (float(best[0]), float(best[1])), it, y

    def fit_offset_sites(self, image, *, atom_photons: float, start=None, search: bool = False, max_iter: int = 6,
                         tol: float = 1e-3) -> OffsetFit:
        """Lattice offset of one frame by a linearised real-space fit of its occupied sites (vectors kept).

        The model is the image of the frame's occupied sites, each one atom (the linear amplitudes
        at the current offset thresholded at half ``atom_photons``; the brightness of one atom is
        the least-squares scale of that pattern). With the pattern held, the offset that fits the
        image best solves ``sum_k <d s_k / d delta, y - model> = 0`` over the occupied sites ``k``:
        the frame's correlation with the PSF differentiated at each occupied site (the cubic
        spline of :meth:`_spline`), minus what the model's own neighbouring atoms put there (the
        derivative of the stamp's autocorrelation at the sites' separations, a sparse matrix made
        once). Newton steps on the spline's second derivatives. Only sites whose neighbourhood
        (twice the stamp radius) lies wholly among the fitted sites enter the sums, so atoms
        outside the fitted sites never pull the lattice. Works where the lattice's Fourier peaks
        lie beyond the optical cut-off: the binary pattern is what a linear fit lacks there.

        Parameters
        ----------
        image : (H, W) ndarray
            Frame in photons per pixel (non-finite pixels count as 0).
        atom_photons : float
            Photons of one atom (sets the threshold of the pattern).
        start : (float, float), optional
            Starting offset, pixels (default: the reference offset).
        search : bool
            First scan a 6 x 6 grid over one unit cell for the largest matched-filter energy.
        max_iter : int
            Largest number of pattern / Newton steps.
        tol : float
            Stop when the offset moves less than this, pixels.

        Returns
        -------
        OffsetFit
            The offset (the lattice translate nearest the reference offset), its 1-sigma error
            per component (pixels; cluster-robust: the scatter of the score over blocks of 4 x 4
            sites, so a wrong PSF or pattern widens it) and the occupied sites used.
        """
        if not np.isfinite(atom_photons) or atom_photons <= 0:
            raise ReconstructionError(f"the offset fit from occupied sites needs the photons of one atom as a positive "
                                      f"number, got {atom_photons}")
        with self._one_thread():
            return self._fit_offset_sites(image, atom=float(atom_photons), start=start, search=search,
                                          max_iter=max_iter, tol=tol)

    def _pull_tables(self):
        """Sparse ``D_x``, ``D_y`` (site x site): the gradient of the stamp's autocorrelation at each pair's separation,
        and the sites whose neighbourhood lies wholly among the fitted sites (made once)."""
        if getattr(self, "_pulls", None) is not None:
            return self._pulls
        stamp = self._kernel[::-1, ::-1]
        auto = signal.correlate(stamp, stamp, mode="full")  # R(delta) = sum_p s(p) s(p - delta), centre at 2r
        coef = ndimage.spline_filter(auto, order=3, mode="mirror")
        centre = 2 * self.radius
        coo = self.gram.tocoo()
        off = coo.row != coo.col
        k, l = coo.row[off], coo.col[off]
        dx = self.sites.x[k] - self.sites.x[l]
        dy = self.sites.y[k] - self.sites.y[l]
        h = 0.05

        def at(ex, ey):
            return ndimage.map_coordinates(coef, [dy + ey + centre, dx + ex + centre], order=3, prefilter=False,
                                           mode="constant", cval=0.0)

        n = len(self.sites)
        gx = (at(h, 0.0) - at(-h, 0.0)) / (2 * h)
        gy = (at(0.0, h) - at(0.0, -h)) / (2 * h)
        d_x = scipy.sparse.csr_matrix((gx, (k, l)), shape=(n, n))
        d_y = scipy.sparse.csr_matrix((gy, (k, l)), shape=(n, n))
        # inner sites: every lattice site within twice the stamp radius (plus a pixel) is a fitted site
        s = self.sites
        mask = s.to_matrix(np.ones(n, bool), fill=False)
        a1, a2 = np.asarray(self.geometry.a1), np.asarray(self.geometry.a2)
        reach = 2 * self.radius + 1.0
        m = int(np.ceil(reach / min(np.hypot(*a1), np.hypot(*a2)) * 2)) + 1
        di, dj = np.mgrid[-m:m + 1, -m:m + 1]
        foot = np.hypot(*(a1[:, None, None] * di + a2[:, None, None] * dj)) <= reach
        inner = ndimage.binary_erosion(mask, structure=foot, border_value=0)
        self._pulls = (d_x, d_y, s.from_matrix(inner).astype(bool))
        return self._pulls

    def _fit_offset_sites(self, image, *, atom, start, search, max_iter, tol):
        d_x, d_y, inner = self._pull_tables()
        y, coef, d, best, ref = self._offset_start(image, start=start, search=search)
        a1, a2 = np.asarray(self.geometry.a1), np.asarray(self.geometry.a2)
        h = 0.05
        stencil = np.array([(0, 0), (1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (-1, -1)], float) * h
        y0, _, x0, _ = self._roi
        it, used, scores, hess, scale = 0, np.zeros(0, np.int64), np.zeros((0, 2)), np.eye(2), atom
        for it in range(1, max_iter + 1):
            c0 = self._sample(coef, best)
            a, b = self._solve_full(c0, d)
            n = a > atom / 2
            nf = n.astype(float)
            norm = float(nf @ (self.gram @ nf))
            rhs = c0 - (self._v @ b if self._v.shape[1] else 0.0)
            scale = float(nf @ rhs) / norm if norm > 0 else atom
            used = np.flatnonzero(n & inner)
            if used.size == 0:
                break
            dx, dy = self._shift(best)
            sy = self.sites.y[used] + dy - y0
            sx = self.sites.x[used] + dx - x0
            cs = [ndimage.map_coordinates(coef, [sy + e[1], sx + e[0]], order=3, prefilter=False, mode="mirror")
                  for e in stencil]
            pull_x = scale * (d_x[used] @ nf)
            pull_y = scale * (d_y[used] @ nf)
            scores = np.stack([(cs[1] - cs[2]) / (2 * h) - pull_x, (cs[3] - cs[4]) / (2 * h) - pull_y], axis=1)
            dxx = float(np.sum(cs[1] - 2 * cs[0] + cs[2])) / h**2
            dyy = float(np.sum(cs[3] - 2 * cs[0] + cs[4])) / h**2
            dxy = float(np.sum(cs[5] - cs[1] - cs[3] + 2 * cs[0] - cs[2] - cs[4] + cs[6])) / (2 * h**2)
            hess = np.array([[dxx, dxy], [dxy, dyy]])
            grad = scores.sum(axis=0)
            if np.all(np.linalg.eigvalsh(hess) < 0):
                move = -np.linalg.solve(hess, grad)
            else:  # not near a maximum yet: move uphill by a bounded step
                move = grad / (np.linalg.norm(grad) or 1.0) * 0.25
            norm_move = np.hypot(*move)
            if norm_move > 0.5:
                move *= 0.5 / norm_move
            best = best + move
            if np.hypot(*move) < tol:
                break
        sigma = (float("nan"), float("nan"))
        if used.size >= 2 and np.all(np.linalg.eigvalsh(hess) < 0):
            # cluster-robust covariance: the score summed over blocks of 4 x 4 sites
            s = self.sites
            block = ((s.rows[used] - s.row_min) // 4) * (s.n_cols // 4 + 1) + (s.cols[used] - s.col_min) // 4
            _, which = np.unique(block, return_inverse=True)
            sums = np.zeros((which.max() + 1, 2))
            np.add.at(sums, which, scores)
            k = sums.shape[0]
            sums -= sums.mean(axis=0)
            meat = sums.T @ sums * (k / max(k - 1, 1))
            inv = np.linalg.inv(hess)
            cov = inv @ meat @ inv
            sigma = (float(np.sqrt(max(cov[0, 0], 0.0))), float(np.sqrt(max(cov[1, 1], 0.0))))
        frac = self.geometry.reciprocal @ (best - ref)
        best = best - np.rint(frac[0]) * a1 - np.rint(frac[1]) * a2
        return OffsetFit(offset=(float(best[0]), float(best[1])), sigma=sigma, n_atoms=int(used.size),
                         iterations=it, atom_photons=scale)

    # --- flags ---------------------------------------------------------------------------
    def flags(self, *, offset=None, saturated=None, nonfinite=None, artefacts=None) -> np.ndarray:
        """Per-site flags (uint8) for a frame with the given offset and bad pixels."""
        key = self._shift(offset)
        if getattr(self, "_flags_key", None) != key:
            inside = self._sample(self._frac_inside, offset)
            usable = self._sample(self._frac_usable, offset) if self._frac_usable is not self._frac_inside \
                else inside
            base = np.zeros(len(self.sites), np.uint8)
            base[inside < 1 - EDGE_FRACTION] |= site_flags.EDGE
            base[inside - usable > EDGE_FRACTION] |= site_flags.MASKED
            self._flags_key, self._flags_base = key, base
        out = self._flags_base.copy()
        if saturated is not None:
            out[self._sample(self._spline(saturated), offset) > BAD_PIXEL_FRACTION] |= site_flags.SATURATED
        if nonfinite is not None:
            out[self._sample(self._spline(nonfinite), offset) > BAD_PIXEL_FRACTION] |= site_flags.NONFINITE
        if artefacts is not None:
            out[self._sample(self._spline(artefacts), offset) > BAD_PIXEL_FRACTION] |= site_flags.ARTEFACT
        return out

    # --- whole-frame estimators ------------------------------------------------------------
    def linear(self, image, *, offset=None, saturated=None, artefacts=None) -> AmplitudeResult:
        """Least-squares amplitudes of one frame (see module notes).

        Parameters
        ----------
        image : (H, W) ndarray
            Frame in photons per pixel; NaN/inf pixels are left out and flagged.
        offset : (float, float), optional
            Lattice offset of this frame in pixels.
        saturated : (H, W) ndarray of bool, optional
            Pixels that reached the camera's saturation value (left out and flagged).
        artefacts : (H, W) ndarray of bool, optional
            Cosmic-ray hits and hot pixels (:mod:`latticeread.core.artefacts`): left out, and
            their sites flagged ARTEFACT.
        """
        return self._run(image, offset=offset, saturated=saturated, artefacts=artefacts, refine_level=None)

    def nonlinear(self, image, *, atom_photons, offset=None, saturated=None, artefacts=None,
                  max_iter: int = 200) -> AmplitudeResult:
        """Linear amplitudes refined with the binary occupation (see module notes).

        Parameters
        ----------
        image : (H, W) ndarray
            Frame in photons per pixel.
        atom_photons : float
            Mean photons of one atom (the occupied peak of the histogram); the refined
            statistic is to be thresholded near ``atom_photons / 2``.
        max_iter : int
            Largest number of local-search passes.
        """
        if not np.isfinite(atom_photons) or atom_photons <= 0:
            raise ReconstructionError(f"the binary refinement needs the photons of one atom as a positive number, "
                                      f"got {atom_photons}")
        return self._run(image, offset=offset, saturated=saturated, artefacts=artefacts,
                         refine_level=float(atom_photons), max_iter=max_iter)

    def binary_energy(self, image, *, atom_photons, offset=None) -> float:
        """Lowest squared residual (photons^2, up to a constant) of binary patterns of fixed brightness.

        Used to choose the photons of one atom: the true value minimises it (see :func:`calibrate`).
        """
        with self._one_thread():
            image = np.asarray(image, float)
            c, d = self.project(np.where(np.isfinite(image), image, 0.0), offset=offset)
            a, b = self._solve_full(c, d)
            self._refine(c, d, a, b, atom=float(atom_photons), correction=None, max_iter=300, fit_atom=False)
        return self.last_energy

    def _run(self, image, **kwargs) -> AmplitudeResult:
        with self._one_thread():
            return self._run_frame(image, **kwargs)

    def _run_frame(self, image, *, offset, saturated, refine_level, max_iter=200, artefacts=None) -> AmplitudeResult:
        image = _as_image(image, self.frame_shape)
        image = image.astype(float, copy=False)
        warnings = []
        nonfinite = None
        if not np.isfinite(image[self.crop]).all():
            nonfinite = np.zeros(self.frame_shape, bool)
            nonfinite[self.crop] = ~np.isfinite(image[self.crop])
        if saturated is not None:
            saturated = np.asarray(saturated, dtype=bool)
            if saturated.shape != self.frame_shape:
                raise ReconstructionError(f"saturation mask is {saturated.shape} but the frame is {self.frame_shape}")
            saturated = saturated if saturated[self.crop].any() else None
        if artefacts is not None:
            artefacts = np.asarray(artefacts, dtype=bool)
            if artefacts.shape != self.frame_shape:
                raise ReconstructionError(f"artefact mask is {artefacts.shape} but the frame is {self.frame_shape}")
            artefacts = artefacts if artefacts[self.crop].any() else None
        bad = None
        if nonfinite is not None or saturated is not None or artefacts is not None:
            bad = np.zeros(self.frame_shape, bool)
            if artefacts is not None:
                bad |= artefacts
            if nonfinite is not None:
                bad |= nonfinite
                warnings.append(f"{int(nonfinite.sum())} non-finite pixel(s) were left out of the fit")
            if saturated is not None:
                bad |= saturated
                warnings.append(f"{int(saturated.sum())} saturated pixel(s) were left out of the fit")
            if bad[self.crop].all():
                raise ReconstructionError("every pixel of the frame is NaN, infinite or saturated")
        c, d = self.project(image, offset=offset, bad_pixels=bad)
        correction = None
        if bad is not None:
            h, w = self.frame_shape
            yy, xx = np.nonzero(bad)
            flat = (yy + self.pad) * self.padded_shape[1] + (xx + self.pad)
            flat = flat[self._weights[flat] > 0]
            if flat.size > MAX_BAD_PIXELS:
                raise ReconstructionError(
                    f"{flat.size} pixels of the frame are NaN, infinite or saturated (at most {MAX_BAD_PIXELS} "
                    f"can be left out); mask the bad region instead")
            if flat.size:
                correction = self._low_rank(flat, offset)
        amps, bg = self.solve(c, d, correction=correction)
        if self._weighted_pixels and self._shift(offset) != (0.0, 0.0):
            amps, bg, converged = self._phase_corrected(c, d, amps, bg, offset=offset, bad=bad,
                                                        correction=correction)
            if not converged:
                warnings.append("the pixel weights vary too much within a site for this frame's lattice phase; "
                                "its amplitudes use the normal matrix of the reference phase (approximate)")
        iterations = 0
        if refine_level is not None:
            amps, iterations = self._refine(c, d, amps, bg, atom=refine_level, correction=correction,
                                            max_iter=max_iter)
        flags = self.flags(offset=offset, saturated=saturated, nonfinite=nonfinite, artefacts=artefacts)
        x, y = self.positions(offset)
        return AmplitudeResult(amplitudes=amps, background=self.background_level(bg), flags=flags, x=x, y=y,
                               method="linear" if refine_level is None else "nonlinear",
                               iterations=iterations, warnings=tuple(warnings), background_coefficients=bg)

    def _phase_corrected(self, c, d, amps, bg, *, offset, bad, correction, max_steps: int = 6, rtol: float = 1e-7):
        """Iterative refinement of the linear solution with the normal matrix of this frame's phase.

        With non-uniform pixel weights the normal matrix ``B(delta)^T W B(delta)`` depends on
        where the sites sit on the weight map, so the factor made at the reference offset is
        only approximately that of a shifted frame. Each step computes the exact residual of the
        normal equations at this frame's offset (the model image rendered from the explicit
        sparse basis, weighted, projected back: sparse products only) and corrects the solution
        with the reference factor as preconditioner; it converges fast because smoothed weights
        change the matrix little. Without this the error grows with the atoms' brightness.

        Returns ``(amplitudes, background, converged)``; when the corrections grow instead of
        shrinking (weights varying strongly within a stamp) the uncorrected solution is returned
        with ``converged=False``.
        """
        bt = self._basis_t(self._shift(offset))
        w = self._weights
        if bad is not None:
            yy, xx = np.nonzero(bad)
            w = w.copy()
            w[(yy + self.pad) * self.padded_shape[1] + (xx + self.pad)] = 0.0
        start = (amps, bg)
        scale = float(np.linalg.norm(amps)) + 1e-12
        previous = np.inf
        for _ in range(max_steps):
            wm = w * (bt.T @ amps + (self._bg @ bg if self._bg.shape[1] else 0.0))
            rc = c - bt @ wm
            rd = d - (self._bg.T @ wm if self._bg.shape[1] else 0.0)
            da, db = self.solve(rc, rd, correction=correction)
            step = float(np.linalg.norm(da))
            if not np.isfinite(step) or step > previous:
                return start[0], start[1], False
            amps, bg = amps + da, bg + db
            previous = step
            if step < rtol * scale:
                break
        return amps, bg, True

    # --- binary refinement ---------------------------------------------------------------
    def _refine(self, c, d, amps, bg, *, atom, correction, max_iter, starts=None, fit_atom=True):
        """Binary refinement: local search over occupation patterns with neighbours subtracted.

        The energy ``E(n) = || y - bg - atom * B n ||_W^2`` (up to a constant) is lowered by
        flipping single sites; in site space ``E = atom^2 n^T G n - 2 atom n^T h`` with
        ``h = B^T W (y - bg)``, so a flip costs one sparse row of ``G``. Flips of strongly coupled
        sites are never made in the same pass (only the best flip of each neighbourhood), so every
        pass lowers the energy. Two starts are tried -- the linear estimate thresholded at half an
        atom, and the empty lattice (a greedy, brightest-first fill) -- and the lower energy wins.

        Returns the per-site statistic ``t_k = atom * n_k + (B^T W r)_k / G_kk`` (photons): the
        site's own matched-filter amplitude with every other site's current contribution removed;
        thresholding it at ``atom / 2`` reproduces the final pattern.
        """
        gram, diag = self.gram, self.gram_diagonal
        v = self._v
        if correction is not None:
            gram, v = correction.gram, correction.v
            diag = gram.diagonal()
        rhs = c - (v @ bg if v.shape[1] else 0.0)
        pattern = self._pattern_of(gram, diag)
        # sites with (almost) no usable pixels cannot be tested: they stay empty
        dead = diag < 0.05 * np.median(diag)
        best = None
        if starts is None:
            starts = (amps > atom / 2, np.zeros(amps.size, bool))
        for start in starts:
            n, g, passes = self._local_search(start & ~dead, rhs, gram, diag, pattern, atom=atom, max_iter=max_iter,
                                              dead=dead, moves=self._moves(gram))
            gn = gram @ n.astype(float)  # G n, kept for the energy and the atom's brightness below
            energy = atom * atom * (n @ gn) - 2 * atom * (n @ rhs)
            if best is None or energy < best[0]:
                best = (energy, n, g, passes, gn)
        _, n, g, passes, gn = best
        # the brightness of one atom: least-squares scale of the pattern, then search again (an
        # empty pattern means the guess was too bright: halve it)
        for _ in range(12 if fit_atom else 0):
            nf = n.astype(float)
            norm = float(nf @ gn)
            new_atom = float(nf @ rhs) / norm if norm > 0 else 0.5 * atom
            if not np.isfinite(new_atom) or new_atom <= 0:
                break
            if abs(new_atom - atom) <= 1e-3 * atom:
                break
            atom = float(np.clip(new_atom, 0.5 * atom, 2.0 * atom))
            n, g, more = self._local_search(n.copy(), rhs, gram, diag, pattern, atom=atom, max_iter=max_iter,
                                            dead=dead, moves=self._moves(gram))
            gn = gram @ n.astype(float)
            passes += more
        self._last_pattern = n
        self.last_atom_photons = atom
        self.last_energy = float(atom * atom * (n @ gn) - 2 * atom * (n @ rhs))
        return atom * n + g / diag, passes

    def _pattern_of(self, gram, diag):
        """:meth:`_interaction_pattern` of ``gram``, kept while the same matrix object is used."""
        if getattr(self, "_pattern_gram", None) is gram:  # the object is held, so its identity is not reused
            return self._pattern_cache
        self._pattern_gram, self._pattern_cache = gram, self._interaction_pattern(gram, diag)
        return self._pattern_cache

    def _moves(self, gram):
        """Ordered pairs of nearest and diagonal neighbours ``(k, l)`` and ``G_kk + G_ll - 2 G_kl``."""
        if getattr(self, "_moves_gram", None) is gram:  # the object is held, so its identity is not reused
            return self._moves_cache
        s = self.sites
        lookup = s.to_matrix(np.arange(len(s)), fill=-1, dtype=np.int64)
        src, dst = [], []
        for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
            r2, c2 = s.rows - s.row_min + dr, s.cols - s.col_min + dc
            ok = (r2 >= 0) & (r2 < s.n_rows) & (c2 >= 0) & (c2 < s.n_cols)
            k = np.flatnonzero(ok)
            l = lookup[r2[ok], c2[ok]]
            k, l = k[l >= 0], l[l >= 0]
            src += [k, l]
            dst += [l, k]
        src, dst = np.concatenate(src), np.concatenate(dst)
        diag = gram.diagonal()
        gkl = np.asarray(gram[src, dst]).ravel()
        self._moves_gram, self._moves_cache = gram, (src, dst, diag[src] + diag[dst] - 2 * gkl)
        return self._moves_cache

    @staticmethod
    def _interaction_pattern(gram, diag):
        """Sparse pattern of site pairs coupled by more than 1 % of the diagonal (for exclusion)."""
        coo = gram.tocoo()
        strong = np.abs(coo.data) > 0.01 * np.sqrt(diag[coo.row] * diag[coo.col])
        return scipy.sparse.csr_matrix((np.ones(int(strong.sum())), (coo.row[strong], coo.col[strong])),
                                       shape=gram.shape)

    @staticmethod
    def _local_search(n, rhs, gram, diag, pattern, *, atom, max_iter, dead=None, moves=None):
        """Single-site flips; when none helps, moves of an atom to a neighbouring empty site.

        A move ``k -> l`` changes the energy by ``atom^2 (G_kk + G_ll - 2 G_kl) - 2 atom (g_l - g_k)``
        with ``g = h - atom G n``: at small spacings the typical error is an atom on the wrong one
        of two neighbouring sites, which no single flip can repair without first raising the energy.
        """
        g = rhs - atom * (gram @ n.astype(float))
        order = np.arange(n.size) * 1e-12  # deterministic tie-break
        indptr, indices = pattern.indptr, pattern.indices
        nonempty = np.diff(indptr) > 0
        passes = 0

        def neighbourhood_min(values, rows):
            """``min(values[l])`` over the pattern's row ``k``, at the sites ``rows`` (inf elsewhere).

            Only rows that can decide anything are reduced (those of sites with a negative value):
            in late passes a few dozen instead of every site's neighbourhood.
            """
            out = np.full(n.size, np.inf)
            if rows.size > n.size // 8:
                out[nonempty] = np.minimum.reduceat(values[indices], indptr[:-1][nonempty])
                return out
            rows = rows[nonempty[rows]]
            if rows.size == 0:
                return out
            starts = indptr[rows]
            lengths = indptr[rows + 1] - starts
            firsts = np.cumsum(lengths) - lengths
            gather = np.arange(int(firsts[-1] + lengths[-1])) + np.repeat(starts - firsts, lengths)
            out[rows] = np.minimum.reduceat(values[indices[gather]], firsts)
            return out

        self_cost = atom * atom * diag
        tie = 1 + order
        if moves is not None:
            src, dst, cost = moves  # cost = G_kk + G_ll - 2 G_kl for each ordered pair
            move_cost = atom * atom * cost
            move_tie = 1 + order[src]
        for passes in range(1, max_iter + 1):
            d_e = self_cost + np.where(n, 2 * atom * g, -2 * atom * g)
            d_e = d_e * tie
            if dead is not None:
                d_e[dead] = np.inf
            if np.any(d_e < 0):
                # a site flips when it is the best of its neighbourhood; only sites with d_e < 0
                # can be, and for them the neighbours with d_e >= 0 never decide
                negative = np.flatnonzero(d_e < 0)
                flip = (d_e < 0) & (d_e <= neighbourhood_min(d_e, negative))
                idx = np.flatnonzero(flip)
                delta = np.where(n[idx], -1.0, 1.0)
                n[idx] = ~n[idx]
                g -= atom * _rows_sum(gram, idx, delta)
                continue
            if moves is None:
                break
            ok = n[src] & ~n[dst]
            if dead is not None:
                ok &= ~dead[dst]
            ok = np.flatnonzero(ok)  # moves of an atom to an empty site
            d_m = (move_cost[ok] - 2 * atom * (g[dst[ok]] - g[src[ok]])) * move_tie[ok]
            # best lowering move touching each site (moves that raise the energy never decide whether a
            # lowering one is the best of its neighbourhood, so only those enter)
            lower = d_m < 0
            if not lower.any():
                break
            cand, cm = ok[lower], d_m[lower]
            cs, cd = src[cand], dst[cand]
            best = np.full(n.size, np.inf)
            np.minimum.at(best, cs, cm)
            np.minimum.at(best, cd, cm)
            near = neighbourhood_min(best, np.unique(np.concatenate([cs, cd])))
            take = cand[(cm <= near[cs]) & (cm <= near[cd])]
            # one move per site even if two moves tie
            _, first = np.unique(np.concatenate([src[take], dst[take]]), return_index=True)
            used = np.zeros(2 * take.size, bool)
            used[first] = True
            take = take[used[:take.size] & used[take.size:]]
            if take.size == 0:
                break
            k, l = src[take], dst[take]
            n[k] = False
            n[l] = True
            g -= atom * (_rows_sum(gram, l, np.ones(l.size)) - _rows_sum(gram, k, np.ones(k.size)))
        return n, g, passes

def _rows_sum(matrix, rows, weights) -> np.ndarray:
    """``matrix[rows].T @ weights`` for a CSR ``matrix`` without building the sub-matrix.

    The rows' entries are gathered in the same order and summed per column by ``np.bincount``,
    which adds them in that order as the sparse product does: the same numbers, bit for bit.
    """
    rows = np.asarray(rows, dtype=np.int64)
    n = matrix.shape[1]
    if rows.size == 0:
        return np.zeros(n)
    indptr = matrix.indptr
    starts = indptr[rows]
    lengths = indptr[rows + 1] - starts
    firsts = np.cumsum(lengths) - lengths
    total = int(firsts[-1] + lengths[-1])
    gather = np.arange(total) + np.repeat(starts - firsts, lengths)
    values = matrix.data[gather] * np.repeat(np.asarray(weights, float), lengths)
    return np.bincount(matrix.indices[gather], weights=values, minlength=n)


#: Background models of :class:`SiteBasis`.
BACKGROUND_MODELS = ("constant", "plane", "poly2", "poly3", "none")
_POLY_DEGREE = {"constant": 0, "plane": 1, "poly2": 2, "poly3": 3}


def _background_columns(model: str, yy, xx, frame_shape) -> list:
    """Background basis images at pixel rows ``yy`` and columns ``xx``: 1, u, v, u^2 - 1/12, u v, ...

    ``u``, ``v`` are the column and row in units of the frame width and height, 0 at the
    frame centre; the even powers have their mean over the frame removed (u^2 - 1/12), so the
    first coefficient stays close to the mean background.
    """
    if model == "none":
        return []
    height, width = frame_shape
    u = (xx - (width - 1) / 2) / max(width, 1)
    v = (yy - (height - 1) / 2) / max(height, 1)
    cols = [np.ones(np.shape(u))]
    for degree in range(1, _POLY_DEGREE[model] + 1):
        for j in range(degree + 1):
            term = u ** (degree - j) * v ** j
            if degree == 2 and j != 1:
                term = term - 1.0 / 12.0
            cols.append(term)
    return cols


def pixel_integrated_table(psf: PSFModel, *, oversample: int = 4) -> tuple[np.ndarray, int, int]:
    """The PSF averaged over one pixel, tabulated every ``1 / (oversample * s)`` pixel.

    Each table value is the same ``s x s`` sub-sample average that :meth:`PSFModel.stamps`
    takes over a pixel centred there (``s = psf.supersample``); the sub-sample offsets fall
    exactly on the grid.

    Returns
    -------
    table : (2 half + 1, 2 half + 1) ndarray
        Pixel-integrated density (per pixel, unit flux), centre at ``[half, half]``.
    k : int
        Grid points per pixel.
    half : int
        Grid points from the centre to the edge, covering ``psf.radius + 2`` pixels.
    """
    s, r = int(psf.supersample), int(psf.radius)
    k = int(oversample) * s  # grid points per pixel
    sub = np.rint(((np.arange(s) + 0.5) / s - 0.5) * k).astype(int)  # sub-sample offsets in grid steps
    half = (r + 2) * k
    margin = int(np.abs(sub).max())
    u = np.arange(-half - margin, half + margin + 1) / k
    dens = psf.density(u[None, :], u[:, None])
    n = 2 * half + 1
    acc = np.zeros((n, n))
    for oy in sub:
        for ox in sub:
            acc += dens[margin + oy:margin + oy + n, margin + ox:margin + ox + n]
    return acc / (s * s), k, half


#: Largest memory (bytes) of the blocks cut from one fine table; a larger PSF window reads its
#: stamps value by value instead (slower, same numbers).
BLOCK_TABLE_BYTES = 2 ** 27


class _StampBlocks:
    """Fine tables read at all pixels of a stamp at once.

    A table tabulated every ``1 / k`` pixel is read for an emitter at sub-pixel offset ``d`` at
    the grid coordinates ``(p - d) k + origin`` of the stamp pixels ``p = -r .. r``: the grid
    index advances by exactly ``k`` from one stamp pixel to the next, so every pixel of the
    stamp falls at the same fraction of a grid step. The tables are therefore cut once into
    blocks ``D[j] = T[j + k P]`` (``P = 0 .. 2 r``, along both axes), one for every grid index
    ``j`` that an emitter within half a pixel of the stamp's middle pixel reaches, and a stamp is
    the weighted sum of the ``2 x 2`` (linear, ``order=1``) or ``4 x 4`` (cubic B-spline,
    ``order=3``, the weights of ``scipy.ndimage.map_coordinates`` with ``prefilter=False``)
    whole blocks around its start: contiguous blocks gathered instead of single values, and
    the same numbers as the value-by-value interpolation (checked in the tests).

    ``blocks`` is None when the blocks would take more than :data:`BLOCK_TABLE_BYTES`.
    """

    def __init__(self, tables, *, k: int, origin: int, radius: int, order: int):
        if order not in (1, 3):
            raise ValueError(f"block reading supports linear (1) or cubic (3) interpolation, got {order}")
        self.k, self.origin, self.radius, self.order = int(k), int(origin), int(radius), order
        size = 2 * self.radius + 1
        self.size = size
        self.lead = 1 if order == 3 else 0  # nodes before the floor of the coordinate
        self.m = order + 1  # nodes per axis
        low = self.origin - self.radius * self.k - 0.5 * self.k  # first grid coordinate at d = +1/2
        high = self.origin - self.radius * self.k + 0.5 * self.k  # ... and at d = -1/2
        self.j0 = int(np.floor(low)) - self.lead
        j1 = int(np.floor(high)) - self.lead + self.m - 1
        n_j = j1 - self.j0 + 1
        self.n_j = n_j
        n = np.shape(tables[0])[0]
        self.blocks = None
        self._sums = None
        if self.j0 < 0 or j1 + self.k * (size - 1) > n - 1 or n_j * n_j * size * size * 8 > BLOCK_TABLE_BYTES:
            return
        rows = (self.j0 + np.arange(n_j))[:, None] + self.k * np.arange(size)[None, :]  # (n_j, size)
        self.blocks = [np.ascontiguousarray(np.asarray(t, float)[rows[:, None, :, None], rows[None, :, None, :]]
                                            .reshape(n_j * n_j, size * size)) for t in tables]
        nodes = np.arange(self.m)
        self._node_offsets = (nodes[:, None] * n_j + nodes[None, :]).ravel()

    def _weights(self, d):
        """First block index along one axis, node weights (n, m) and whether the blocks cover ``d``."""
        t = (-self.radius - d) * self.k + self.origin  # grid coordinate of the stamp's first pixel
        i = np.floor(t)
        f = t - i
        j = i.astype(np.int64) - self.lead - self.j0
        ok = (j >= 0) & (j + self.m - 1 < self.n_j)
        if self.order == 1:
            w = np.stack([1.0 - f, f], axis=1)
        else:  # cubic B-spline weights of the nodes floor - 1 .. floor + 2
            g = 1.0 - f
            w = np.stack([g * g * g / 6.0, (3.0 * f * f * f - 6.0 * f * f + 4.0) / 6.0,
                          (-3.0 * f * f * f + 3.0 * f * f + 3.0 * f + 1.0) / 6.0, f * f * f / 6.0], axis=1)
        return j, w, ok

    def covers(self, dx, dy) -> np.ndarray:
        """Which emitters (offsets in pixels from the middle pixel) the blocks can read."""
        if self.blocks is None:
            return np.zeros(np.shape(dx), bool)
        return self._weights(np.asarray(dx, float))[2] & self._weights(np.asarray(dy, float))[2]

    def sums(self, dx, dy, which=None) -> list:
        """Sums over the stamp window of the interpolated tables ``which``: each (N,).

        Every emitter must be covered (:meth:`covers`).
        """
        which = range(len(self.blocks)) if which is None else which
        if self._sums is None:
            self._sums = [b.sum(axis=1) for b in self.blocks]
        index, weight = self._index(dx, dy)
        return [np.einsum("ij,ij->i", weight, self._sums[t][index]) for t in which]

    def _index(self, dx, dy):
        dx = np.asarray(dx, float)
        dy = np.asarray(dy, float)
        jx, wx, okx = self._weights(dx)
        jy, wy, oky = self._weights(dy)
        if not (np.all(okx) and np.all(oky)):
            raise ValueError("an emitter lies more than half a pixel from its stamp's middle pixel")
        index = (jy * self.n_j + jx)[:, None] + self._node_offsets[None, :]  # (N, m * m)
        return index, (wy[:, :, None] * wx[:, None, :]).reshape(dx.size, -1)

    def __call__(self, dx, dy, which=None) -> list:
        """Interpolated tables ``which`` (default all) at every stamp pixel: each (N, size * size).

        Every emitter must be covered (:meth:`covers`).
        """
        which = range(len(self.blocks)) if which is None else which
        index, weight = self._index(dx, dy)
        out = [np.empty((index.shape[0], self.size * self.size)) for _ in which]
        # one small product per emitter: faster than batched products, which first copy the
        # gathered blocks (measured with numpy 2 / OpenBLAS)
        for o, t in zip(out, which):
            blocks = self.blocks[t]
            for e in range(dx.size):
                np.dot(weight[e], blocks[index[e]], out=o[e])
        return out


#: PSF tables kept for reuse (a fit builds many site bases of one PSF); the oldest goes first.
_TABLE_CACHE_SIZE = 4
_table_cache: collections.OrderedDict = collections.OrderedDict()
_table_cache_lock = threading.Lock()


def _psf_key(psf: PSFModel) -> tuple:
    """What identifies a PSF's tables: kind, width, window, sub-sampling, parameters and kernel."""
    kernel = None
    if psf.kernel is not None:
        k = np.ascontiguousarray(psf.kernel, dtype=float)
        kernel = (k.shape, hashlib.sha1(k.tobytes()).hexdigest())
    return (psf.kind, float(psf.fwhm), int(psf.radius), int(psf.supersample), repr(sorted(psf.params.items())),
            kernel)


def cached_table(kind: str, psf: PSFModel, make):
    """``make(psf)`` for this PSF, made once and reused while it is among the last few used.

    The tables are read-only after they are made, so one object serves every caller.
    """
    key = (kind, _psf_key(psf))
    with _table_cache_lock:
        if key in _table_cache:
            _table_cache.move_to_end(key)
            return _table_cache[key]
    value = make(psf)
    with _table_cache_lock:
        _table_cache[key] = value
        while len(_table_cache) > _TABLE_CACHE_SIZE:
            _table_cache.popitem(last=False)
    return value


class _StampSampler:
    """Pixel-integrated, window-normalised PSF stamps at any sub-pixel position, fast.

    :meth:`PSFModel.stamps` averages the PSF density over ``s x s`` sub-samples of every pixel
    for every stamp. Here that same sub-sample average is tabulated once on a grid of step
    ``1 / (4 s)`` pixel (the sub-sample offsets fall exactly on the grid) and stamps are read
    off by cubic-spline interpolation, whole blocks at a time (:class:`_StampBlocks`):
    agreement with :meth:`PSFModel.stamps` is checked in the tests.
    """

    def __init__(self, psf: PSFModel, oversample: int = 4):
        table, k, half = pixel_integrated_table(psf, oversample=oversample)
        self.coef = ndimage.spline_filter(table, order=3, mode="mirror")
        self.k, self.origin, self.radius = k, half, int(psf.radius)
        self.blocks = _StampBlocks([self.coef], k=k, origin=half, radius=self.radius, order=3)

    def _points(self, dx, dy) -> np.ndarray:
        """The stamps read value by value (``scipy.ndimage.map_coordinates``), unnormalised."""
        p = np.arange(-self.radius, self.radius + 1, dtype=float)
        size = p.size
        out = np.empty((dx.size, size, size))
        for start in range(0, dx.size, 2048):
            sl = slice(start, start + 2048)
            cy = (p[None, :, None] - dy[sl, None, None]) * self.k + self.origin
            cx = (p[None, None, :] - dx[sl, None, None]) * self.k + self.origin
            cy, cx = np.broadcast_arrays(cy, cx)
            out[sl] = ndimage.map_coordinates(self.coef, [cy.ravel(), cx.ravel()], order=3, prefilter=False,
                                              mode="mirror").reshape(-1, size, size)
        return out

    def __call__(self, dx, dy) -> np.ndarray:
        """(N, 2r+1, 2r+1) stamps of emitters at offsets ``(dx, dy)`` pixels from the middle pixel."""
        dx = np.atleast_1d(np.asarray(dx, float))
        dy = np.atleast_1d(np.asarray(dy, float))
        size = 2 * self.radius + 1
        ok = self.blocks.covers(dx, dy)
        if np.all(ok):
            out = self.blocks(dx, dy)[0].reshape(dx.size, size, size)
        else:
            out = np.empty((dx.size, size, size))
            if np.any(ok):
                out[ok] = self.blocks(dx[ok], dy[ok])[0].reshape(-1, size, size)
            out[~ok] = self._points(dx[~ok], dy[~ok])
        out /= out.sum(axis=(1, 2), keepdims=True)
        return out


class _BandedSPD:
    """Cholesky factor of a sparse SPD matrix stored as a band (ordering chosen to narrow it)."""

    def __init__(self, matrix, orders=()):
        coo = matrix.tocoo()
        n = matrix.shape[0]
        self.n = n
        bw = int(np.max(np.abs(coo.row - coo.col))) if coo.nnz else 0
        # reverse Cuthill-McKee, or another ordering offered (``orders``: permutations, e.g. the
        # sites by pixel row), only if it narrows the band; the factor's cost grows as its square
        perm = None
        from scipy.sparse.csgraph import reverse_cuthill_mckee

        half = coo.row < coo.col  # the matrix is symmetric: one triangle gives the band
        pair_rows, pair_cols = coo.row[half], coo.col[half]
        for p in (reverse_cuthill_mckee(matrix.tocsr(), symmetric_mode=True), *orders):
            p = np.asarray(p)
            inv = np.empty_like(p)
            inv[p] = np.arange(n)
            bw_p = int(np.max(np.abs(inv[pair_rows] - inv[pair_cols]))) if pair_rows.size else 0
            if bw_p < bw:
                perm, bw, chosen = p, bw_p, inv
        self.perm = perm
        self.bandwidth = bw
        if n * (bw + 1) > 4e8:
            raise ReconstructionError(
                f"the site basis is too large to factorise ({n} sites coupled over {bw} neighbours); restrict "
                f"the reconstruction to the region holding atoms")
        rows, cols = (coo.row, coo.col) if perm is None else (chosen[coo.row], chosen[coo.col])
        upper = rows <= cols
        band = np.zeros((bw + 1, n))
        band[bw + rows[upper] - cols[upper], cols[upper]] = coo.data[upper]
        try:
            self.factor = scipy.linalg.cholesky_banded(band, lower=False)
        except np.linalg.LinAlgError as exc:
            raise ReconstructionError(f"the site basis is degenerate (the normal matrix is not positive "
                                      f"definite): {exc}") from exc

    def solve(self, rhs):
        rhs = np.asarray(rhs, float)
        if self.perm is None:
            return scipy.linalg.cho_solve_banded((self.factor, False), rhs, check_finite=False)
        out = scipy.linalg.cho_solve_banded((self.factor, False), rhs[self.perm], check_finite=False)
        res = np.empty_like(out)
        res[self.perm] = out
        return res


class _LowRank:
    """Normal equations with some pixels removed: ``K' = K - U U^T`` solved by Woodbury's identity."""

    def __init__(self, basis: SiteBasis, u_sites, u_bg):
        self.basis = basis
        self.u_sites = u_sites
        self.u_bg = u_bg
        # K^{-1} U for every removed pixel
        y_sites, y_bg = basis._solve_full(u_sites, u_bg)
        self.y_sites, self.y_bg = y_sites, y_bg
        cap = np.eye(u_sites.shape[1]) - (u_sites.T @ y_sites + u_bg.T @ y_bg)
        try:
            self.cap = scipy.linalg.lu_factor(cap, check_finite=False)
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise ReconstructionError(f"the bad pixels leave too little data to fit: {exc}") from exc
        us = scipy.sparse.csr_matrix(u_sites)
        self.gram = (basis.gram - us @ us.T).tocsr()
        self.v = basis._v - u_sites @ u_bg.T if basis._v.shape[1] else basis._v

    def solve(self, c, d):
        a0, b0 = self.basis._solve_full(c, d)
        w = scipy.linalg.lu_solve(self.cap, self.u_sites.T @ a0 + self.u_bg.T @ b0, check_finite=False)
        return a0 + self.y_sites @ w, b0 + self.y_bg @ w


# --- deconvolution alternatives ---------------------------------------------------------------

def _transfer_function(kernel, shape) -> np.ndarray:
    """Real-FFT transfer function of a centred odd-sized kernel on a periodic ``shape`` grid."""
    padded = np.zeros(shape)
    padded[:kernel.shape[0], :kernel.shape[1]] = kernel
    padded = np.roll(padded, (-(kernel.shape[0] // 2), -(kernel.shape[1] // 2)), axis=(0, 1))
    return scipy.fft.rfft2(padded)


def wiener_deconvolve(image, *, psf_image, balance: float = 0.05) -> np.ndarray:
    """Wiener-Hunt deconvolution with a Laplacian regulariser (periodic boundaries).

    ``X = conj(H) Y / (|H|^2 + balance |L|^2)`` with ``H`` the transfer function of the PSF and
    ``L`` that of the discrete Laplacian; the DC gain is exactly 1, so fluxes are kept.

    Parameters
    ----------
    image : (H, W) ndarray
        Frame, photons per pixel (background removed).
    psf_image : (M, M) ndarray
        Centred pixel-integrated PSF (odd size, sums to 1).
    balance : float
        Regularisation strength (dimensionless); larger = smoother, less noise.

    Returns
    -------
    (H, W) ndarray, photons per pixel.
    """
    image = _as_image(image).astype(float)
    if balance < 0:
        raise ReconstructionError(f"Wiener balance must be >= 0, got {balance}")
    laplacian = np.array([[0.0, -1.0, 0.0], [-1.0, 4.0, -1.0], [0.0, -1.0, 0.0]])
    h = _transfer_function(np.asarray(psf_image, float), image.shape)
    lap = _transfer_function(laplacian, image.shape)
    filt = np.conj(h) / (np.abs(h) ** 2 + balance * np.abs(lap) ** 2)
    return scipy.fft.irfft2(filt * scipy.fft.rfft2(image), s=image.shape)


def richardson_lucy_deconvolve(image, *, psf_image, n_iter: int = 30, background: float = 0.0) -> np.ndarray:
    """Richardson-Lucy deconvolution (Poisson maximum likelihood), zero outside the frame.

    Parameters
    ----------
    image : (H, W) ndarray
        Frame, photons per pixel (background included when ``background`` > 0).
    psf_image : (M, M) ndarray
        Centred pixel-integrated PSF (odd size, sums to 1).
    n_iter : int
        Iterations.
    background : float
        Known background in photons per pixel, kept in the forward model
        (``image ~ psf * x + background``) so the estimate ``x`` is background-free.

    Returns
    -------
    (H, W) ndarray, photons per pixel.
    """
    image = _as_image(image).astype(float)
    if n_iter < 1:
        raise ReconstructionError(f"Richardson-Lucy needs at least one iteration, got {n_iter}")
    psf_image = np.asarray(psf_image, float)
    mirror = psf_image[::-1, ::-1]
    estimate = np.full(image.shape, 0.5)
    for _ in range(int(n_iter)):
        blurred = signal.fftconvolve(estimate, psf_image, mode="same") + background + 1e-12
        estimate = estimate * signal.fftconvolve(image / blurred, mirror, mode="same")
    return estimate


def cell_labels(geometry: LatticeGeometry, sites: SiteGrid, frame_shape) -> np.ndarray:
    """Index (into ``sites``) of the site whose cell holds each pixel, -1 for none.

    A pixel belongs to the site with the nearest integer lattice indices (the cell is the
    parallelogram around the site spanned by ``a1`` and ``a2``).
    """
    height, width = int(frame_shape[0]), int(frame_shape[1])
    yy, xx = np.mgrid[0:height, 0:width]
    fr, fc = geometry.fractional_indices(xx.ravel(), yy.ravel())
    r = np.rint(fr).astype(np.int64) - sites.row_min
    c = np.rint(fc).astype(np.int64) - sites.col_min
    lookup = np.full(sites.matrix_shape, -1, np.int64)
    lookup[sites.rows - sites.row_min, sites.cols - sites.col_min] = np.arange(len(sites))
    ok = (r >= 0) & (r < sites.n_rows) & (c >= 0) & (c < sites.n_cols)
    out = np.full(r.shape, -1, np.int64)
    out[ok] = lookup[r[ok], c[ok]]
    return out.reshape(height, width)


def cell_integrate(image, *, labels, n_sites: int) -> np.ndarray:
    """Sum of ``image`` over each site's cell (photons), from :func:`cell_labels`."""
    image = np.asarray(image, float)
    lab = np.asarray(labels).ravel()
    ok = (lab >= 0) & np.isfinite(image.ravel())
    return np.bincount(lab[ok], weights=image.ravel()[ok], minlength=n_sites)[:n_sites]


# --- one-call convenience -------------------------------------------------------------------

def extract_amplitudes(image, *, geometry: LatticeGeometry, psf: PSFModel, sites: SiteGrid | None = None,
                       method: str = "linear", atom_photons: float | None = None, saturation: float | None = None,
                       mask=None, balance: float = 0.05, n_iter: int = 30) -> AmplitudeResult:
    """Site amplitudes of one frame in photons (builds a fresh :class:`SiteBasis`).

    For many frames of one setting build a :class:`SiteBasis` (or use
    :class:`latticeread.core.pipeline.Reconstructor`) instead, so the factorisation is reused.

    Parameters
    ----------
    image : (H, W) ndarray
        Frame in photons per pixel.
    geometry : LatticeGeometry
        Lattice of this frame (pixels).
    psf : PSFModel
        Image of one atom.
    sites : SiteGrid, optional
        Sites to estimate (default: all sites with their centre in the frame).
    method : {"linear", "nonlinear", "wiener", "richardson_lucy"}
    atom_photons : float, optional
        Mean photons of one atom, required by ``"nonlinear"``.
    saturation : float, optional
        Saturated pixel value in photons.
    mask : (H, W) ndarray of bool, optional
        Pixels to use.
    balance : float
        Wiener regularisation.
    n_iter : int
        Richardson-Lucy iterations.

    Returns
    -------
    AmplitudeResult
    """
    if method not in AMPLITUDE_METHODS:
        raise ReconstructionError(f"unknown amplitude method {method!r}; use one of {', '.join(AMPLITUDE_METHODS)}")
    image = _as_image(image)
    basis = SiteBasis(geometry, frame_shape=image.shape, psf=psf, sites=sites, mask=mask)
    saturated = None
    if saturation is not None:
        with np.errstate(invalid="ignore"):
            saturated = np.asarray(image) >= saturation
    if method == "linear":
        return basis.linear(image, saturated=saturated)
    if method == "nonlinear":
        if atom_photons is None:
            raise ReconstructionError("the nonlinear amplitude method needs the photons of one atom (atom_photons)")
        return basis.nonlinear(image, atom_photons=atom_photons, saturated=saturated)
    return deconvolution_amplitudes(image, basis=basis, method=method, saturated=saturated, balance=balance,
                                    n_iter=n_iter)


def deconvolution_amplitudes(image, *, basis: SiteBasis, method: str, offset=None, saturated=None,
                             balance: float = 0.05, n_iter: int = 30, labels=None) -> AmplitudeResult:
    """Amplitudes by Wiener or Richardson-Lucy deconvolution and cell integration.

    The background is the constant of the least-squares fit of ``basis`` (a parameter of the
    same image model), removed before integration. NaN pixels are replaced by that background.
    """
    image = _as_image(image, basis.frame_shape).astype(float)
    lin = basis.linear(image, offset=offset, saturated=saturated)
    bg = lin.background
    clean = np.where(np.isfinite(image), image, bg)
    psf_image = basis.psf.image()
    if method == "wiener":
        deconv = wiener_deconvolve(clean - bg, psf_image=psf_image, balance=balance)
        iterations = 0
    elif method == "richardson_lucy":
        deconv = richardson_lucy_deconvolve(np.clip(clean, 0, None), psf_image=psf_image, n_iter=n_iter,
                                            background=max(bg, 0.0))
        iterations = int(n_iter)
    else:
        raise ReconstructionError(f"unknown deconvolution method {method!r}; use 'wiener' or 'richardson_lucy'")
    geometry = basis.geometry if offset is None else basis.geometry.with_offset(offset)
    if labels is None:
        labels = cell_labels(geometry, _shifted_sites(basis, offset), basis.frame_shape)
    amps = cell_integrate(deconv, labels=labels, n_sites=len(basis.sites))
    return AmplitudeResult(amplitudes=amps, background=bg, flags=lin.flags, x=lin.x, y=lin.y, method=method,
                           iterations=iterations, warnings=lin.warnings)


def _shifted_sites(basis: SiteBasis, offset) -> SiteGrid:
    x, y = basis.positions(offset)
    s = basis.sites
    return SiteGrid(rows=s.rows, cols=s.cols, x=x, y=y, row_min=s.row_min, col_min=s.col_min,
                    n_rows=s.n_rows, n_cols=s.n_cols)


def camera_weights(reference, *, camera, smoothing: float = 0.0, floor: float = 1e-3) -> np.ndarray:
    """Fixed per-pixel weights of the linear fit: the inverse camera-noise variance of a reference image.

    Parameters
    ----------
    reference : (H, W) ndarray of float
        Mean photons per pixel expected in the frames (e.g. the mean photon image of the
        calibration frames), photons. Negative values (noise around a zero background) count as 0.
    camera : CameraModel
        Noise model; :meth:`CameraModel.photon_variance` gives the variance (photons^2) of a
        pixel holding a mean number of photons: excess noise factor F^2 (2 for an EMCCD at
        high gain) times the photoelectrons and clock-induced charge, plus read noise.
    smoothing : float
        RMS width (pixels) of a Gaussian the reference is smoothed with first (0: none). The
        pipeline smooths over the larger of the lattice spacing and the PSF FWHM, so that the
        weights carry no structure on the scale of one site (see Notes).
    floor : float
        The variance is kept above ``floor`` times its largest value, so that a pixel with no
        light, no read noise and no clock-induced charge does not get an infinite weight.

    Returns
    -------
    (H, W) ndarray of float
        ``1 / photon_variance(reference)``, 1/photons^2.

    Raises
    ------
    ReconstructionError
        The reference is not a finite 2-D image, or the camera model gives no noise at all.

    Notes
    -----
    The weight that makes least squares the maximum-likelihood fit under Gaussian noise is the
    inverse variance of each pixel *in the frame being fitted*; for photon shot noise that
    depends on the frame's own atoms. Using it would change the normal matrix ``B^T W B`` in
    every frame and need a new banded factorisation per frame. A fixed weight from the mean
    image keeps one factorisation for every frame; it follows the slowly varying part of the
    noise (stray-light background, the mean light of the atom cloud against its empty
    margin, the read noise in the photon scale) but not the shot noise of an individual atom.
    Because the lattice phase moves from frame to frame while the weights stay put on the
    pixels, the normal matrix factorised at the reference offset is only valid for every
    frame if the weights are nearly constant over a stamp: hence the smoothing.
    """
    reference = np.asarray(reference, dtype=float)
    if reference.ndim != 2:
        raise ReconstructionError(f"the reference image for camera weights must be 2-D, got shape {reference.shape}")
    if not np.all(np.isfinite(reference)):
        raise ReconstructionError("the reference image for camera weights holds NaN or infinite pixels")
    if smoothing < 0 or not np.isfinite(smoothing):
        raise ReconstructionError(f"the smoothing width must be >= 0 pixels, got {smoothing}")
    ref = np.clip(reference, 0.0, None)
    if smoothing > 0:
        ref = ndimage.gaussian_filter(ref, smoothing, mode="nearest")
    variance = np.asarray(camera.photon_variance(ref), dtype=float)
    top = float(variance.max())
    if not np.isfinite(top) or top <= 0:
        raise ReconstructionError("the camera model gives zero noise for the reference image (no light, no read "
                                  "noise, no clock-induced charge); camera weights are undefined, use no weighting")
    return 1.0 / np.maximum(variance, floor * top)
