"""PSF width fitted on dense frames, for when no isolated atoms exist.

:func:`latticeread.core.psf_estimate.estimate_psf` measures the full PSF shape from isolated
atoms, which crowded frames (filling of tens of percent) do not have. Those frames still fix
the PSF *width*: with the lattice known, every frame is a linear model

    ``image = background + sum_k a_k PSF(r - r_k)``

in the unknown site amplitudes ``a_k`` (photons) once the PSF is chosen, and a PSF of the
wrong width leaves a larger residual. :func:`fit_psf_width` therefore minimises, over the
FWHM (pixels), the residual sum of squares of the least-squares fit of that model
(:class:`latticeread.core.amplitudes.SiteBasis`, lattice offset re-fitted per frame) on a
few frames, for a round Gaussian and for an Airy pattern (parametrised by ``lambda/NA`` in
pixels, FWHM = 0.5145 lambda/NA), and keeps the shape with the lower residual.

Scope and limits: only the width (and the choice Gaussian/Airy) is fitted, not aberrations
or ellipticity; the fit is unweighted least squares (unbiased for the width when the model
is right, not the most precise). The result carries a warning saying so.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from latticeread.core.amplitudes import SiteBasis
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import AIRY_FWHM_PER_LAMBDA_OVER_NA, PSFModel, gaussian_psf
from latticeread.errors import FrameError, ReconstructionError

__all__ = ["PSFWidthFit", "fit_psf_width", "WIDTH_FIT_SOURCE", "WIDTH_FIT_WARNING"]

log = logging.getLogger(__name__)

#: Provenance stored in the PSF params of a width fit.
WIDTH_FIT_SOURCE = "width fit on dense frames"
#: Warning attached to every width-fitted PSF.
WIDTH_FIT_WARNING = ("the PSF is a width fit on dense frames (round {kind}, FWHM {fwhm:.3f} pixels), not measured "
                     "from isolated atoms; sparse frames (--psf estimate) or the optics (--psf airy) give a "
                     "better PSF")
#: Largest side, pixels, of the window (around the brightest part of the frames) that is fitted.
FIT_WINDOW = 128
#: Default FWHM search range in units of the smallest lattice spacing.
FWHM_RANGE = (0.25, 2.0)
#: Smallest FWHM searched, pixels (below it pixel integration hides the width).
MIN_FWHM = 0.7
#: The sites must explain at least this many times the residual energy that free amplitudes
#: would absorb from pure noise, else the frames hold no atoms to fit a width on.
MIN_SIGNAL_RATIO = 5.0
#: A best width within this distance of a bound (in log FWHM, i.e. 2 %) counts as at the edge.
EDGE_LOG = 0.02


@dataclass(frozen=True)
class PSFWidthFit:
    """Result of :func:`fit_psf_width`.

    Attributes
    ----------
    psf : PSFModel
        The chosen PSF (kind ``"gaussian"`` or ``"airy"``); its ``params`` hold ``source``,
        ``n_frames``, ``residual_<kind>`` and ``warnings``.
    kind : str
        ``"gaussian"`` or ``"airy"``.
    fwhm : float
        Fitted full width at half maximum, pixels.
    fwhm_by_kind : dict
        Best FWHM (pixels) for every shape tried.
    residual_by_kind : dict
        Residual sum of squares (photons^2, summed over the fitted frames) at that FWHM.
    n_frames : int
        Frames used.
    signal_ratio : float
        Energy explained by the sites over the energy free amplitudes absorb from noise
        (dimensionless; ~1 means no atoms).
    warnings : tuple of str
        Why this PSF may mislead.
    """

    psf: PSFModel
    kind: str
    fwhm: float
    fwhm_by_kind: dict = field(default_factory=dict)
    residual_by_kind: dict = field(default_factory=dict)
    n_frames: int = 0
    signal_ratio: float = float("nan")
    warnings: tuple[str, ...] = ()


def _model_psf(kind: str, fwhm: float) -> PSFModel:
    """Round Gaussian or Airy PSF of the given FWHM (pixels), default stamp radius."""
    gauss = gaussian_psf(fwhm=fwhm)
    if kind == "gaussian":
        return gauss
    lam_na = fwhm / AIRY_FWHM_PER_LAMBDA_OVER_NA
    return PSFModel(kind="airy", fwhm=float(fwhm), radius=gauss.radius, params={"lambda_over_na": float(lam_na)})


def _as_frames(frames) -> np.ndarray:
    arr = np.asarray(frames, dtype=float)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[0] == 0:
        raise FrameError(f"expected a frame (H, W) or a stack (n, H, W) in photons, got shape {arr.shape}")
    if not np.isfinite(arr).all():
        raise FrameError("the frames for the PSF width fit hold NaN or infinite pixels; replace them first")
    return arr


def _window(mean_image, size: int) -> tuple[int, int, int, int]:
    """(y0, y1, x0, x1) of a window of at most ``size`` pixels around the light's centroid."""
    height, width = mean_image.shape
    light = np.clip(mean_image - np.median(mean_image), 0, None)
    total = light.sum()
    yy, xx = np.mgrid[0:height, 0:width]
    cy = float((light * yy).sum() / total) if total > 0 else (height - 1) / 2
    cx = float((light * xx).sum() / total) if total > 0 else (width - 1) / 2
    h, w = min(height, size), min(width, size)
    y0 = int(np.clip(round(cy - h / 2), 0, height - h))
    x0 = int(np.clip(round(cx - w / 2), 0, width - w))
    return y0, y0 + h, x0, x0 + w


def _residual(basis: SiteBasis, image, offset, pixels) -> float:
    """Squared residual (photons^2) of the least-squares site model of one frame, computed exactly.

    The amplitudes come from :meth:`SiteBasis.linear`; the model image is rebuilt from the
    basis's own sparse stamp matrix (not from the interpolated projections), so a wide,
    ill-conditioned trial PSF cannot report a residual below the true one.
    """
    fit = basis.linear(image, offset=offset)
    bt = basis._basis_t(basis._shift(offset))  # the exact sparse model the solver works with
    hp, wp = basis.padded_shape
    h, w = basis.frame_shape
    pad = basis.pad
    model = np.asarray(bt.T @ fit.amplitudes).reshape(hp, wp)[pad:pad + h, pad:pad + w] + fit.background
    return float(np.sum((image - model)[pixels] ** 2))


def _check_signal(images, n_sites: int, residual: float) -> float:
    """Energy the sites explain over what free amplitudes take out of pure noise; raise if small.

    Each free amplitude absorbs about one noise variance from pure noise, so without atoms
    the ratio is near 1; every atom adds ``photons^2 sum(PSF^2)``.
    """
    background_only = float(sum(np.sum((im - im.mean()) ** 2) for im in images))
    n_pix = sum(im.size for im in images)
    n_par = len(images) * n_sites
    noise_var = residual / max(n_pix - n_par, 1)
    ratio = (background_only - residual) / (n_par * noise_var) if noise_var > 0 else np.inf
    if not ratio > MIN_SIGNAL_RATIO:
        raise ReconstructionError(
            f"the frames show no atoms to fit the PSF width on (the sites explain {ratio:.1f} times the noise, "
            f"need {MIN_SIGNAL_RATIO:.0f})")
    return float(ratio)


def fit_psf_width(frames, *, geometry: LatticeGeometry, kinds=("gaussian", "airy"), n_frames: int = 2,
                  fwhm_bounds: tuple[float, float] | None = None, window: int = FIT_WINDOW) -> PSFWidthFit:
    """Fit the width of a round PSF to dense frames with a known lattice.

    Parameters
    ----------
    frames : (H, W) or (n, H, W) array_like
        Frames in photons per pixel (finite); the first ``n_frames`` evenly spread ones are used.
    geometry : LatticeGeometry
        Lattice vectors and a reference offset, pixels; the offset is re-fitted per frame.
    kinds : sequence of {"gaussian", "airy"}
        PSF shapes tried; the one with the lower residual is returned.
    n_frames : int
        Frames used (1-3 is plenty: about a thousand sites per frame in the window).
    fwhm_bounds : (float, float), optional
        FWHM search range, pixels (default :data:`FWHM_RANGE` times the smallest lattice
        spacing, at least :data:`MIN_FWHM`).
    window : int
        Largest side, pixels, of the region whose residual is fitted (around the centroid of
        the light); a border of two stamp radii (at the widest trial) around it is fitted too.

    Returns
    -------
    PSFWidthFit

    Raises
    ------
    ReconstructionError
        The frames hold no atoms (the sites explain no more than noise) or the best width
        lies at the edge of the search range.
    FrameError
        Frames of the wrong shape or with non-finite pixels.

    Notes
    -----
    For a PSF ``P`` the residual is ``RSS(P) = ||y - D theta||^2`` with ``theta`` the
    least-squares site amplitudes and background, summed over frames on the same pixels for
    every trial, so residuals of different widths and shapes compare directly. Only pixels
    at least two stamp radii from the window's edge count (see the code). A bounded Brent
    search on ``log(FWHM)`` finds the minimum to about 0.3 %.
    """
    stack = _as_frames(frames)
    unknown = [k for k in kinds if k not in ("gaussian", "airy")]
    if unknown or not kinds:
        raise ReconstructionError(f"unknown PSF shape(s) {unknown or list(kinds)} for the width fit; "
                                  "use 'gaussian' and/or 'airy'")
    n_use = max(1, min(int(n_frames), stack.shape[0]))
    pick = np.unique(np.linspace(0, stack.shape[0] - 1, n_use).round().astype(int))
    spacing = float(min(geometry.spacings))
    if fwhm_bounds is None:
        lo, hi = max(MIN_FWHM, FWHM_RANGE[0] * spacing), max(2 * MIN_FWHM, FWHM_RANGE[1] * spacing)
    else:
        lo, hi = float(fwhm_bounds[0]), float(fwhm_bounds[1])
        if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo < hi):
            raise ReconstructionError(f"the FWHM range must be two increasing positive numbers of pixels, got "
                                      f"{fwhm_bounds}")

    # pixels near the window's edge see atoms outside the window, which the model does not
    # hold, and the sites there are fitted to that stray light: only pixels at least two
    # stamp radii (of the widest trial) from the edge enter the residual, so every pixel that
    # counts sees only sites fitted on clean pixels (and the pixel set is the same for every
    # trial width)
    border = 2 * gaussian_psf(fwhm=hi).radius
    y0, y1, x0, x1 = _window(stack[pick].mean(axis=0), int(window) + 2 * border)
    # the constant background is fitted anyway; removing most of it first keeps the numbers small
    images = [stack[i, y0:y1, x0:x1] - np.median(stack[i, y0:y1, x0:x1]) for i in pick]
    shape = images[0].shape
    geom = geometry.with_offset((geometry.offset[0] - x0, geometry.offset[1] - y0))
    sites = lattice_sites(geom, shape)
    inner = np.zeros(shape, bool)
    inner[border:shape[0] - border, border:shape[1] - border] = True
    n_inner = len(lattice_sites(geom, shape, mask=inner)) if inner.any() else 0
    if n_inner < 9:
        raise ReconstructionError(f"only {n_inner} lattice sites lie in the {shape[0]}x{shape[1]} pixel window at "
                                  f"least {border} pixels from its edge; too few to fit the PSF width")

    # per-frame lattice offsets: found once with a middle-width PSF, then polished per trial
    start_basis = SiteBasis(geom, frame_shape=shape, psf=gaussian_psf(fwhm=float(np.sqrt(lo * hi))), sites=sites)
    starts = [start_basis.fit_offset(im, search=True)[0] for im in images]
    first = sum(_residual(start_basis, im, o, inner) for im, o in zip(images, starts))
    _check_signal([im[inner] for im in images], n_inner, first)

    def rss(kind: str, fwhm: float) -> float:
        basis = SiteBasis(geom, frame_shape=shape, psf=_model_psf(kind, fwhm), sites=sites)
        total = 0.0
        for im, start in zip(images, starts):
            offset, _ = basis.fit_offset(im, start=start)
            total += _residual(basis, im, offset, inner)
        return total

    best_fwhm, best_rss = {}, {}
    log_lo, log_hi = np.log(lo), np.log(hi)
    for kind in kinds:
        # bounded Brent search on log(FWHM): its first points sit inside the range, so the
        # costly wide trials (large stamps) are only evaluated when the minimum lies there
        res = optimize.minimize_scalar(lambda u: rss(kind, float(np.exp(u))), bounds=(log_lo, log_hi),
                                       method="bounded", options={"xatol": 3e-3})
        f_best, r_best = float(np.exp(res.x)), float(res.fun)
        if min(res.x - log_lo, log_hi - res.x) < EDGE_LOG:
            raise ReconstructionError(
                f"the PSF width fit ({kind}) ran to the edge of its range ({f_best:.2f} pixels of "
                f"{lo:.2f}-{hi:.2f}); the frames do not fix the PSF width")
        best_fwhm[kind], best_rss[kind] = f_best, r_best
        log.info("PSF width fit: %s FWHM %.4f px, residual %.6g photons^2 (%d trials)", kind, f_best, r_best,
                 res.nfev)

    kind = min(best_rss, key=best_rss.get)
    fwhm = best_fwhm[kind]
    ratio = _check_signal([im[inner] for im in images], n_inner, best_rss[kind])
    warning = WIDTH_FIT_WARNING.format(kind=kind, fwhm=fwhm)
    base = _model_psf(kind, fwhm)
    params = dict(base.params, source=WIDTH_FIT_SOURCE, n_frames=int(len(images)),
                  **{f"residual_{k}": float(v) for k, v in best_rss.items()},
                  **{f"fwhm_{k}": float(v) for k, v in best_fwhm.items()}, warnings=[warning])
    psf = PSFModel(kind=base.kind, fwhm=base.fwhm, radius=base.radius, params=params, supersample=base.supersample)
    return PSFWidthFit(psf=psf, kind=kind, fwhm=fwhm, fwhm_by_kind=best_fwhm, residual_by_kind=best_rss,
                       n_frames=int(len(images)), signal_ratio=float(ratio), warnings=(warning,))
