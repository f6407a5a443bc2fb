"""From camera frames to occupation matrices: the one pipeline shared by GUI, CLI and batch runs.

Steps per frame (:class:`Reconstructor`): counts -> photons (camera model), re-fit the
lattice phase (the vectors stay those of the calibration), site amplitudes
(:mod:`latticeread.core.amplitudes`, the factorisation reused from frame to frame),
classification against the threshold (:mod:`latticeread.core.classify`).

:func:`calibrate` makes the :class:`~latticeread.core.calibration.Calibration` from a stack:
geometry and PSF (estimated when not given), the amplitude method (the binary refinement
when the lattice spacing is below 0.7 PSF FWHM) and the threshold on the pooled histogram.

Re-classifying with a new threshold (:func:`reclassify`) never recomputes amplitudes.
"""

from __future__ import annotations

import dataclasses
import logging
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field

import numpy as np

from latticeread.core import flags as site_flags
from latticeread.core.amplitudes import (
    AMPLITUDE_METHODS,
    WEIGHTINGS,
    AmplitudeResult,
    SiteBasis,
    camera_weights,
    cell_labels,
    deconvolution_amplitudes,
)
from latticeread.core.artefacts import (
    ARTEFACT_WARNING,
    ArtefactFinder,
    PixelModel,
    clean_stack,
    fill_pixels,
    hot_pixel_mask,
    model_fill,
    refit_near_artefacts,
)
from latticeread.core.calibration import Calibration, ReconstructionOptions, ReferenceImage
from latticeread.core.camera import CameraModel
from latticeread.core.frame_check import FrameCheck
from latticeread.core.frame_check import (EXPLAINED_WARN, OUTSIDE_REFUSE, OUTSIDE_WARN, RESIDUAL_WARN,
                                           amplitude_unit, check_frame)
from latticeread.core.frame_check import WARNING_PREFIX as MODEL_WARNING
from latticeread.core.classify import ThresholdResult, classify, select_threshold
from latticeread.core.geometry import LatticeGeometry, SiteGrid, lattice_sites
from latticeread.core.psf import PSFModel
from latticeread.core.region import sites_in_region
from latticeread.errors import CalibrationError, FrameError, LatticeNotFound, ReconstructionError

__all__ = ["FrameResult", "Reconstructor", "calibrate", "reconstruct_stack", "reclassify", "pooled_threshold",
           "estimate_geometry",
           "with_camera_weighting", "uncertain", "frame_iter", "offset_warning", "NONLINEAR_BELOW", "UNCERTAIN_RANGE"]

log = logging.getLogger(__name__)

#: Spacing / PSF FWHM below which :func:`calibrate` chooses the binary ("nonlinear") refinement.
NONLINEAR_BELOW = 0.7
#: Posterior range flagged UNCERTAIN.
UNCERTAIN_RANGE = (0.1, 0.9)
#: Sites of margin kept around the region where atoms were seen (see :func:`calibrate`).
REGION_MARGIN = 4
#: Largest side, in sites, of the central block on which the lattice phase is fitted.
PHASE_BLOCK = 40
#: Spacing / PSF FWHM below which each frame's offset comes from its single atoms by default:
#: an ideal Airy PSF passes no lattice frequency below 0.97 FWHM (the incoherent cut-off
#: 2 NA / lambda; Born & Wolf, from memory), and near it the image-model fit with free
#: amplitudes barely feels the offset.
ATOMS_OFFSET_BELOW = 1.0
#: The lattice read from the atoms is refined by the image-model fit when it leaves the
#: farthest atom's site uncertain by more than this many spacings (1 sigma: twice this is
#: the 0.02-spacing placement the project aims at).
ATOM_SITE_SIGMA = 0.01
#: PSF stamp half-width, in FWHM, of that image-model fit.
REFINE_WINDOW_FWHM = 1.6
#: It stops when no site moves by more than this many spacings in a step.
REFINE_TOL = 0.002
#: A frame's offset from its atoms is reported as poorly determined with fewer atoms than
#: this, or a 1-sigma error above :data:`OFFSET_SIGMA_WARN` spacings.
OFFSET_MIN_ATOMS = 10
OFFSET_SIGMA_WARN = 0.02
#: The offsets from the atoms that stand apart and from all occupied sites must agree within
#: this many combined 1-sigma errors for the more precise one to be used (about 1e-4 by chance
#: for two normal errors in 2-D).
OFFSET_AGREEMENT = 4.0



@dataclass(frozen=True)
class FrameResult:
    """Reconstruction of one frame.

    Attributes
    ----------
    frame_index : int
        0-based index of the frame in its stack.
    geometry : LatticeGeometry
        Lattice of this frame (calibration vectors, re-fitted offset), pixels.
    sites : SiteGrid
        The calibration's site set with this frame's centres ``x``, ``y`` (pixels).
    amplitudes : (N,) ndarray of float
        Photons per site (background removed).
    occupied : (N,) ndarray of uint8
        1 = atom, 0 = empty.
    p_occupied : (N,) ndarray of float
        Posterior probability of an atom.
    flags : (N,) ndarray of uint8
        Quality bits, :mod:`latticeread.core.flags`.
    threshold : float
        Threshold used, photons.
    threshold_result : ThresholdResult or None
        The histogram fit behind the threshold (None for a bare number).
    background : float
        Fitted background, photons per pixel.
    method : str
        Amplitude estimator.
    warnings : tuple of str
        Why this frame's result may mislead.
    offset_method : str
        How this frame's lattice offset was found: ``"atoms"`` (positions of its single atoms,
        :func:`latticeread.core.atoms.offset_from_atoms`), ``"sites"`` (a real-space fit of all its
        occupied sites started there, :meth:`SiteBasis.fit_offset_sites`, used when its 1-sigma is
        the smaller and the two agree), ``"model"`` (image-model fit),
        ``"fourier"`` (Fourier phase, then the model fit) or ``"calibration"`` (not re-fitted).
    offset_sigma : (float, float)
        1-sigma error of the offset's x and y, pixels (NaN where the method gives none).
    excluded : SiteGrid or None
        Sites fitted but left out of the analysed region (:mod:`latticeread.core.region`),
        with this frame's centres; they have no result (exports mark them EXCLUDED).
    check : FrameCheck or None
        Does the site model explain the frame (:func:`latticeread.core.frame_check.check_frame`:
        light outside the region, residual against the camera noise, bright light explained);
        None for the deconvolution methods.
    """

    frame_index: int
    geometry: LatticeGeometry
    sites: SiteGrid = field(repr=False)
    amplitudes: np.ndarray = field(repr=False)
    occupied: np.ndarray = field(repr=False)
    p_occupied: np.ndarray = field(repr=False)
    flags: np.ndarray = field(repr=False)
    threshold: float = float("nan")
    threshold_result: ThresholdResult | None = None
    background: float = 0.0
    method: str = "linear"
    warnings: tuple[str, ...] = ()
    offset_method: str = "calibration"
    offset_sigma: tuple[float, float] = (float("nan"), float("nan"))
    excluded: SiteGrid | None = field(default=None, repr=False)
    check: FrameCheck | None = field(default=None, repr=False)

    @property
    def n_atoms(self) -> int:
        """Number of sites called occupied."""
        return int(np.count_nonzero(self.occupied))

    def occupation_matrix(self, fill: int = 255) -> np.ndarray:
        """(n_rows, n_cols) uint8 matrix: 1 atom, 0 empty, ``fill`` where there is no site."""
        return self.sites.to_matrix(self.occupied, fill=fill, dtype=np.uint8)

    def amplitude_matrix(self) -> np.ndarray:
        """(n_rows, n_cols) amplitudes in photons, NaN where there is no site."""
        return self.sites.to_matrix(self.amplitudes.astype(float), fill=np.nan)


def uncertain(p_occupied) -> np.ndarray:
    """True where the posterior lies inside :data:`UNCERTAIN_RANGE` (the UNCERTAIN flag)."""
    lo, hi = UNCERTAIN_RANGE
    with np.errstate(invalid="ignore"):
        return (p_occupied > lo) & (p_occupied < hi)


def reclassify(result: FrameResult, threshold) -> FrameResult:
    """The same frame classified against another threshold; amplitudes are not recomputed.

    Parameters
    ----------
    result : FrameResult
    threshold : ThresholdResult or float
        New threshold (photons), e.g. dragged by the user on the histogram. A float keeps the
        components of ``result.threshold_result`` (if any) for the posterior.

    Returns
    -------
    FrameResult
    """
    if not isinstance(threshold, ThresholdResult) and result.threshold_result is not None:
        threshold = result.threshold_result.with_threshold(float(threshold))
    occupied, p = classify(result.amplitudes, threshold)
    flags = result.flags & np.uint8(~site_flags.UNCERTAIN & 0xFF)
    flags = flags | (uncertain(p) * site_flags.UNCERTAIN).astype(np.uint8)
    t = threshold.threshold if isinstance(threshold, ThresholdResult) else float(threshold)
    return dataclasses.replace(result, occupied=occupied, p_occupied=p, flags=flags, threshold=float(t),
                               threshold_result=threshold if isinstance(threshold, ThresholdResult) else None)


def pooled_threshold(amplitudes, *, calibration: Calibration, flags=None) -> ThresholdResult:
    """The threshold fit on one histogram of amplitudes, with the calibration's method and camera.

    The one function behind every automatic threshold: the pooled histogram of a stack
    (the window, ``reconstruct``, ``batch`` and ``watch`` per input file) and each frame's
    own histogram (policy ``per_frame``). Non-finite amplitudes are left out, and the rest is
    sorted first, so the result does not depend on the order in which frames were
    reconstructed or pooled (the fit sums in floating point).

    Parameters
    ----------
    amplitudes : array_like of float
        Site amplitudes in photons (any shape).
    calibration : Calibration
        Gives ``threshold_method`` and the camera (noise-model-aware mixture).
    flags : array_like of uint8, optional
        Per-site flags, same size (saturated sites are reported in the fit's warnings).

    Returns
    -------
    ThresholdResult

    Raises
    ------
    ReconstructionError
        Fewer than 3 finite amplitudes.
    """
    a = np.asarray(amplitudes, dtype=float).ravel()
    keep = np.isfinite(a)
    order = np.argsort(a[keep], kind="stable")
    a = a[keep][order]
    if flags is not None:
        flags = np.asarray(flags, dtype=np.uint8).ravel()[keep][order]
    return select_threshold(a, method=calibration.threshold_method or "mixture", camera=calibration.camera,
                            flags=flags)


def _calibration_threshold(calibration: Calibration):
    """The calibration's fixed threshold as a ThresholdResult when its fit was stored, else float/None."""
    if calibration.threshold is None:
        return None
    tr = calibration.threshold_fit
    if tr is not None:
        if tr.threshold != calibration.threshold:
            tr = tr.with_threshold(calibration.threshold)
        return tr
    return float(calibration.threshold)


class Reconstructor:
    """Turn frames of one setting into :class:`FrameResult` objects.

    Everything that does not change from frame to frame (site set, PSF stamp table, the
    factorised normal matrix) is prepared once here.

    Parameters
    ----------
    calibration : Calibration
        Geometry (vectors; the offset is the reference for the phase refit), PSF, camera,
        frame shape, threshold and amplitude method.
    method : {"linear", "nonlinear", "wiener", "richardson_lucy"}, optional
        Overrides ``calibration.amplitude_method``.
    mask : (H, W) ndarray of bool, optional
        Pixels to use (True); sites that rely on excluded pixels are flagged MASKED.
    refit_phase : bool, optional
        Re-find the lattice offset in every frame (True) or use the calibration's offset
        (default: ``calibration.options.refit_phase``).
    phase_method : {"atoms", "model", "fourier"}, optional
        How the offset is re-found (default: ``calibration.options.phase_method``, which
        :func:`calibrate` sets to ``"atoms"`` when the spacing is below
        :data:`ATOMS_OFFSET_BELOW` PSF FWHM). ``"atoms"``: the weighted mean displacement of the
        frame's single atoms (and, in a filled core, its isolated holes:
        :func:`latticeread.core.atoms.locate_holes`) from their nearest sites
        (:func:`latticeread.core.atoms.offset_from_atoms`; the vectors fixed, two parameters,
        with a 1-sigma error); beyond the optical cut-off the lattice leaves no trace in a
        linear fit of the image, but every lone spot is one atom on one site. A frame whose
        offset rests on fewer than :data:`OFFSET_MIN_ATOMS` atoms or is uncertain by more than
        :data:`OFFSET_SIGMA_WARN` spacing (1 sigma) gets a warning (:func:`offset_warning`).
        Falls back to ``"model"`` (with a warning) in a frame with too few single atoms.
        ``"model"``: search one unit cell for the best
        matched-filter energy, then Newton steps on the least-squares fit of the whole image
        model (:meth:`SiteBasis.fit_offset`); works at every spacing, also where the lattice's
        Fourier peaks lie beyond the optical cut-off (spacing below ~1 FWHM for an Airy PSF).
        ``"fourier"``: start from :func:`latticeread.core.lattice.refine_phase`, then the
        same model polish; below :data:`ATOMS_OFFSET_BELOW` FWHM, where that phase means
        nothing, ``"atoms"`` is used instead and every frame says so.
    index_bounds : (row_min, row_max, col_min, col_max), optional
        Restrict the sites to these indices (default: ``calibration.options.index_bounds``;
        None there = every site whose centre lies in the frame).
    weighting : {"none", "camera"}, optional
        Pixel weights of the least-squares fit (default: ``calibration.options.weighting``). ``"none"``: every pixel counts the same. ``"camera"``: each pixel is
        weighted by the inverse of its camera-noise variance (photons^2,
        :meth:`CameraModel.photon_variance`) evaluated at a fixed reference image, smoothed
        over the larger of the lattice spacing and the PSF FWHM (:func:`camera_weights`).
        The weights are fixed, so the normal matrix is still factorised once and reused for
        every frame; a weight from each frame's own Poisson variance would need a new
        factorisation per frame. The fixed weight approximates the mean noise of each
        region of the frame (stray-light background, the cloud's mean light against its
        empty margin, read noise), not the shot noise of each individual atom.
    reference : (H, W) ndarray of float, optional
        Mean photons per pixel for ``weighting="camera"`` (default: the calibration's stored
        mean image, ``calibration.options.reference``, written by :func:`with_camera_weighting`).

    Raises
    ------
    CalibrationError
        The calibration is not usable (no frame shape, unknown method or weighting, mask of
        another size, camera weighting without a reference image).
    """

    def __init__(self, calibration: Calibration, *, method: str | None = None, mask=None,
                 refit_phase: bool | None = None, index_bounds=None, phase_method: str | None = None,
                 weighting: str | None = None, reference=None):
        if not isinstance(calibration, Calibration):
            raise CalibrationError(f"expected a Calibration, got {type(calibration).__name__}")
        shape = tuple(int(s) for s in calibration.frame_shape)
        if len(shape) != 2 or min(shape) <= 0:
            raise CalibrationError(f"the calibration has no valid frame shape ({calibration.frame_shape}); "
                                   "recalibrate from frames")
        method = method or calibration.amplitude_method or "linear"
        if method not in AMPLITUDE_METHODS:
            raise CalibrationError(f"unknown amplitude method {method!r}; use one of {', '.join(AMPLITUDE_METHODS)}")
        if mask is not None:
            mask = np.asarray(mask, dtype=bool)
            if mask.shape != shape:
                raise CalibrationError(f"the mask is {mask.shape[0]}x{mask.shape[1]} pixels but the calibration was "
                                       f"made for {shape[0]}x{shape[1]}")
            if not mask.any():
                raise CalibrationError("the mask excludes every pixel")
        options = calibration.options
        phase_method = options.phase_method if phase_method is None else phase_method
        refit_phase = options.refit_phase if refit_phase is None else refit_phase
        hot = hot_pixel_mask(options.hot_pixels, shape)
        if hot.any():  # hot pixels are left out once, in the factorisation
            mask = ~hot if mask is None else mask & ~hot
        self.hot_pixels = hot if hot.any() else None
        if phase_method not in ("atoms", "model", "fourier"):
            raise CalibrationError(f"unknown phase method {phase_method!r}; use 'atoms', 'model' or 'fourier'")
        if weighting is None:
            weighting = options.weighting
        if weighting not in WEIGHTINGS:
            raise CalibrationError(f"unknown pixel weighting {weighting!r}; use 'none' (every pixel counts the same) "
                                   "or 'camera' (inverse camera-noise variance)")
        self.weighting = weighting
        self.calibration = calibration
        self.method = method
        # below the optical cut-off the lattice's Fourier phase is noise: never move sites by it
        self._phase_note = ""
        ratio = min(calibration.geometry.spacings) / calibration.psf.fwhm
        if phase_method == "fourier" and ratio < ATOMS_OFFSET_BELOW:
            self._phase_note = (f"the Fourier phase was not used: at a spacing of {ratio:.2f} PSF FWHM the lattice's "
                                "Fourier peaks are at or beyond the optical cut-off and their phase means nothing; the "
                                "offset came from the frame's atoms instead")
            phase_method = "atoms"
        self.phase_method = phase_method
        self.refit_phase = bool(refit_phase)
        self.frame_shape = shape
        self.camera: CameraModel = calibration.camera
        if index_bounds is None:
            index_bounds = options.index_bounds
        self.index_bounds = None if index_bounds is None else tuple(int(v) for v in index_bounds)
        # every site is fitted (the light of an excluded site must not leak into its neighbours);
        # only the sites of the analysed region are reported (``sites``); an applied lens
        # distortion places them
        self.fit_sites, keep = region_sites(calibration, index_bounds=self.index_bounds)
        if len(self.fit_sites) == 0:
            raise CalibrationError("no lattice site of the calibration lies inside the frame")
        self.sites, self.excluded, self._keep = self.fit_sites, None, None
        fs = self.fit_sites
        if not keep.all():
            if not keep.any():
                raise CalibrationError(f"the analysed region ({options.region.describe()}) holds no lattice site "
                                       "of the frame; draw it over the atoms or clear it")
            self._keep = keep
            self.sites = _site_subset(fs, keep)
            self.excluded = _site_subset(fs, ~keep)
        self.pixel_weights = None
        if weighting == "camera":
            self.pixel_weights = _camera_pixel_weights(calibration, shape, reference)
        self.basis = SiteBasis(calibration.geometry, frame_shape=shape, sites=self.fit_sites, mask=mask,
                               pixel_weights=self.pixel_weights, background=options.background,
                               **_basis_psfs(calibration, self.fit_sites))
        # the phase is one global number: fit it on a central block of at most PHASE_BLOCK^2 sites
        # (its own, much narrower factorisation) instead of on every site
        self.phase_basis = self.basis
        if fs.n_rows > PHASE_BLOCK or fs.n_cols > PHASE_BLOCK:
            rc, cc = int(np.median(fs.rows)), int(np.median(fs.cols))
            h = PHASE_BLOCK // 2
            block = _placed(calibration, lattice_sites(calibration.geometry, shape, index_bounds=(
                max(rc - h, fs.row_min), min(rc + h - 1, fs.row_min + fs.n_rows - 1),
                max(cc - h, fs.col_min), min(cc + h - 1, fs.col_min + fs.n_cols - 1))))
            if len(block) >= 100:
                self.phase_basis = SiteBasis(calibration.geometry, frame_shape=shape, sites=block, mask=mask,
                                             pixel_weights=self.pixel_weights, background=options.background,
                                             **_basis_psfs(calibration, block))
        self.threshold = _calibration_threshold(calibration)
        atom = options.photons_per_atom
        if atom is None and calibration.threshold is not None:
            atom = 2.0 * float(calibration.threshold)
        self.atom_photons = None if atom is None or not np.isfinite(atom) or atom <= 0 else float(atom)
        self._last_offset = calibration.geometry.offset
        self.artefacts = ArtefactFinder(calibration, shape, crop=self.basis.crop)
        self._offset_info = ("calibration", (float("nan"), float("nan")))

    # --- steps ------------------------------------------------------------------------------
    def _check(self, image, where: str) -> np.ndarray:
        image = np.asarray(image)
        if image.ndim != 2:
            raise FrameError(f"{where} has shape {image.shape}; expected one 2-D frame (pass a stack frame by frame)")
        if not np.issubdtype(image.dtype, np.number) or np.iscomplexobj(image):
            raise FrameError(f"{where} holds {image.dtype} values; expected real camera counts")
        self.calibration.check_frame_shape(image.shape, where=where)
        self._check_camera(image, where)
        self._check_pixels(image, where)
        return image

    def _check_pixels(self, image, where: str) -> None:
        """Apply the calibration's frame policy: NaN/inf or saturated pixels fail the frame when it says so.

        With the default policy ("flag") nothing happens here: the amplitude fit leaves those
        pixels out and flags the sites that rely on them (NONFINITE, SATURATED).
        """
        policy = self.calibration.frame_policy
        crop = self.basis.crop
        if policy.nonfinite == "fail" and np.issubdtype(image.dtype, np.floating):
            bad = int(np.count_nonzero(~np.isfinite(image[crop])))
            if bad:
                raise FrameError(f"{where} has {bad} NaN or infinite pixel(s) under the lattice and the calibration's "
                                 "frame policy says such frames fail (frame_policy.nonfinite = 'fail')")
        if policy.saturated == "fail":
            with np.errstate(invalid="ignore"):
                bad = int(np.count_nonzero(image[crop] >= self.camera.saturation))
            if bad:
                raise FrameError(f"{where} has {bad} saturated pixel(s) under the lattice and the calibration's "
                                 "frame policy says such frames fail (frame_policy.saturated = 'fail')")

    def _check_camera(self, image, where: str) -> None:
        """Refuse frames whose dark pixels lie far below the calibrated bias (another camera).

        With the right camera, at least the darkest 5 % of pixels sit at the bias within the
        read noise; a frame well below it was recorded with another camera, gain or offset
        setting, and its photon numbers would be wrong. Checked on every 8th pixel per axis.
        """
        cam = self.camera
        if cam.offset_map is not None or cam.bias <= 0:
            return
        sample = np.asarray(image[::8, ::8], dtype=float)
        finite = sample[np.isfinite(sample)]
        if finite.size < 16:
            return
        dark = float(np.percentile(finite, 5))
        tolerance = max(5.0 * cam.read_noise, 0.05 * cam.bias) + 3.0
        if dark < cam.bias - tolerance:
            raise CalibrationError(
                f"{where}: its darkest pixels ({dark:.0f} counts, 5th percentile) lie well below the camera bias "
                f"of the calibration ({cam.bias:.0f} counts); the calibration was probably made for another "
                "camera or other camera settings (bias, gain)")

    def _saturated(self, image) -> np.ndarray | None:
        """Pixels at the camera's saturation value, looked for where the fit reads (None if none)."""
        crop = self.basis.crop
        with np.errstate(invalid="ignore"):
            sat = image[crop] >= self.camera.saturation
        if not sat.any():
            return None
        full = np.zeros(self.frame_shape, bool)
        full[crop] = sat
        return full

    def _photons(self, image) -> np.ndarray:
        """Counts -> photons where the fit reads (the region around the sites); zero elsewhere."""
        if self.camera.offset_map is not None or self.camera.gain_map is not None:
            return self.camera.counts_to_photons(image)
        crop = self.basis.crop
        out = np.zeros(self.frame_shape)
        out[crop] = self.camera.counts_to_photons(image[crop])
        return out

    def _frame_geometry(self, photons) -> tuple[LatticeGeometry, list[str], bool]:
        self._offset_info = ("calibration", (float("nan"), float("nan")))
        geometry = self.calibration.geometry
        if not self.refit_phase:
            return geometry, [], False
        crop = self.basis.crop
        clean = photons
        if not np.isfinite(photons[crop]).all():
            clean = photons.copy()
            clean[crop] = np.where(np.isfinite(photons[crop]), photons[crop], np.nanmedian(photons[crop]))
        warnings: list[str] = [self._phase_note] if self._phase_note else []
        poor = False
        start, search = None, True
        if self.phase_method == "atoms":
            from latticeread.core.atoms import check_geometry, locate_atoms, locate_holes, merge_located, \
                offset_from_atoms

            fwhm = self.calibration.psf.fwhm
            atoms = _on_perfect_lattice(locate_atoms(clean, fwhm=fwhm), self.calibration)
            holes = locate_holes(clean, fwhm=fwhm)  # empty sites in a filled core sit on the lattice too
            points = merge_located(atoms, _on_perfect_lattice(holes, self.calibration)) if holes.single.any() else atoms
            try:
                found = offset_from_atoms(clean, geometry, fwhm=fwhm, atoms=points)
            except LatticeNotFound as exc:
                warnings.append(f"the lattice offset could not be fitted from single atoms ({exc}); the image-model "
                                "fit searched the whole unit cell instead")
            else:
                offset, sigma, n_used, source = found.offset, found.sigma, found.n_atoms, "atom(s) that stand apart"
                self._offset_info = ("atoms", found.sigma)
                sites, disagree = self._offset_from_sites(clean, found)
                if disagree:
                    warnings.append(disagree)
                elif sites is not None:
                    offset, sigma, n_used, source = sites.offset, sites.sigma, sites.n_atoms, "occupied site(s)"
                    self._offset_info = ("sites", sites.sigma)
                fitted = geometry.with_offset(offset)
                text = offset_warning(sigma, n_used, min(geometry.spacings), source=source)
                if text:
                    warnings.append(text)
                    poor = True
                check = check_geometry(atoms, fitted)
                if not check.ok:
                    warnings.append(check.warning)
                return fitted, warnings, poor
        if self.phase_method == "fourier":
            from latticeread.core.lattice import refine_phase  # Fourier phase refit

            try:
                fitted = refine_phase(clean, geometry, reference=geometry.offset)
                start, search = fitted.offset, False
                warnings.extend(fitted.quality.warnings)
            except (LatticeNotFound, FrameError) as exc:
                warnings.append(f"the Fourier phase fit failed in this frame ({exc}); the model fit searched "
                                "the whole unit cell instead")
        atom = self.atom_photons if self.method == "nonlinear" else None
        sigma = (float("nan"), float("nan"))
        if atom is None:
            fit = self.phase_basis.fit_offset_model(clean, start=start, search=search)
            offset, sigma = fit.offset, fit.sigma
            err, spacing = float(np.hypot(*sigma)), min(geometry.spacings)
            if not err <= OFFSET_SIGMA_WARN * spacing:  # also when no 1-sigma could be had (NaN)
                warnings.append(f"this frame's lattice offset is poorly determined by the image-model fit: "
                                f"uncertain to {err:.2f} px ({err / spacing:.3f} spacing, 1 sigma); every site of "
                                "the frame may sit that far from its atom")
                poor = True
        else:
            offset, _ = self.phase_basis.fit_offset(clean, start=start, search=search, atom_photons=atom)
        self._offset_info = ("fourier" if self.phase_method == "fourier" else "model", sigma)
        shift = np.hypot(offset[0] - geometry.offset[0], offset[1] - geometry.offset[1])
        if shift > max(geometry.spacings):
            warnings.append(f"the re-fitted lattice moved by {shift:.2f} pixels, more than a lattice spacing; "
                            "the calibration's offset was used")
            self._offset_info = ("calibration", (float("nan"), float("nan")))
            return geometry, warnings, True
        return geometry.with_offset(offset), warnings, poor

    def _offset_from_sites(self, clean, found):
        """The real-space fit of every occupied site (:meth:`SiteBasis.fit_offset_sites`), started at the
        atoms' offset ``found``: ``(fit, "")`` when it is the more precise of the two (smaller 1-sigma),
        ``(None, "")`` when it is not or cannot run (the photons of one atom unknown, as in the first
        pass of a calibration), ``(None, warning)`` when the two disagree by more than
        :data:`OFFSET_AGREEMENT` combined sigma (the atoms' offset is kept).

        The site fit uses every fitted site (not the central phase block: atoms outside a block
        would leak light into its background) and every occupied site, not only those that stand
        apart; on the reference frames beyond the optical cut-off it was 1.5-5 times more precise.
        """
        if self.atom_photons is None:
            return None, ""
        try:
            fit = self.basis.fit_offset_sites(clean, atom_photons=self.atom_photons, start=found.offset)
        except (ReconstructionError, np.linalg.LinAlgError) as exc:
            log.info("offset from occupied sites failed: %s", exc)
            return None, ""
        s_sites, s_atoms = np.hypot(*fit.sigma), np.hypot(*found.sigma)
        if not (np.isfinite(s_sites) and s_sites > 0 and fit.n_atoms >= OFFSET_MIN_ATOMS):
            return None, ""
        if not (np.isfinite(s_atoms) and s_atoms > 0) or s_sites >= s_atoms:
            return None, ""
        apart = float(np.hypot(fit.offset[0] - found.offset[0], fit.offset[1] - found.offset[1]))
        if apart > OFFSET_AGREEMENT * float(np.hypot(s_sites, s_atoms)):
            return None, (f"the lattice offset from the occupied sites lies {apart:.2f} px from the one from the atoms "
                          f"that stand apart, more than {OFFSET_AGREEMENT:g} times their combined 1-sigma; the atoms' "
                          "offset was used")
        return fit, ""

    @property
    def last_offset(self) -> tuple[str, tuple[float, float]]:
        """How the last frame's offset was found and its 1-sigma (x, y) in pixels (see :class:`FrameResult`)."""
        method, sigma = getattr(self, "_offset_info", ("calibration", (float("nan"), float("nan"))))
        return str(method), (float(sigma[0]), float(sigma[1]))

    def extract_full(self, image, *, where: str = "the frame") -> tuple[LatticeGeometry, AmplitudeResult, tuple]:
        """Geometry, amplitudes (with background and flags) and warnings of one frame.

        Parameters
        ----------
        image : (H, W) ndarray
            Raw camera frame in counts.
        """
        image = self._check(image, where)
        photons = self._photons(image)
        saturated = self._saturated(image)
        art, filled, art_warnings = self.artefacts(photons)
        geometry, warnings, poor = self._frame_geometry(filled)
        warnings = warnings + art_warnings
        offset = geometry.offset
        if art is not None and self.method in ("linear", "nonlinear"):
            amp = self._fit_around(photons, filled, art, offset=offset, saturated=saturated)
        elif self.method == "linear":
            amp = self.basis.linear(photons, offset=offset, saturated=saturated, artefacts=self.hot_pixels)
        elif self.method == "nonlinear":
            atom = self.atom_photons
            if atom is None:
                lin = self.basis.linear(photons, offset=offset, saturated=saturated, artefacts=self.hot_pixels)
                tr = select_threshold(lin.amplitudes, method="mixture", camera=self.camera, flags=lin.flags)
                atom = tr.occupied_mean if np.isfinite(tr.occupied_mean) else np.nan
                if not np.isfinite(atom) or atom <= 0:
                    warnings.append("no atoms found for the binary refinement; linear amplitudes were used")
                    amp = lin
                else:
                    amp = self.basis.nonlinear(photons, atom_photons=atom, offset=offset, saturated=saturated,
                                               artefacts=self.hot_pixels)
            else:
                amp = self.basis.nonlinear(photons, atom_photons=atom, offset=offset, saturated=saturated,
                                           artefacts=self.hot_pixels)
        else:
            photons = self.camera.counts_to_photons(image)  # deconvolution works on the whole frame
            bad = art if self.hot_pixels is None else (self.hot_pixels if art is None else art | self.hot_pixels)
            if bad is not None:
                photons = fill_pixels(photons, bad)
            labels = cell_labels(geometry, _with_positions(self.fit_sites, *self.basis.positions(offset)),
                                 self.frame_shape)
            amp = deconvolution_amplitudes(photons, basis=self.basis, method=self.method, offset=offset,
                                           saturated=saturated, labels=labels)
        flags = amp.flags
        if poor:
            flags = flags | np.uint8(site_flags.POOR_FIT)
            amp = dataclasses.replace(amp, flags=flags)
        self.last_check = None
        if amp.method in ("linear", "nonlinear"):
            self.last_check = self._check_model(image, photons, amp, art, saturated)
            warnings = list(warnings) + list(self.last_check.warnings)
        if self._keep is not None:  # the model check above saw every fitted site; report the region's
            k = self._keep
            amp = dataclasses.replace(amp, amplitudes=amp.amplitudes[k], flags=amp.flags[k], x=amp.x[k], y=amp.y[k])
        bright = self.calibration.brightness
        if bright is not None and bright.applied and amp.method != "nonlinear":
            # the photons each atom would give at the centre of the brightness map: one threshold fits all
            amp = dataclasses.replace(amp, amplitudes=amp.amplitudes / bright.factor(amp.x, amp.y))
        return geometry, amp, tuple(warnings) + amp.warnings

    def excluded_at(self, offset) -> SiteGrid | None:
        """The sites left out of the analysed region, centred for a lattice offset (None: no such site)."""
        if self._keep is None:
            return None
        x, y = self.basis.positions(offset)
        return _with_positions(self.excluded, x[~self._keep], y[~self._keep])

    def positions(self, offset) -> tuple[np.ndarray, np.ndarray]:
        """Centres (x, y), pixels, of the reported sites (:attr:`sites`) for a lattice offset."""
        x, y = self.basis.positions(offset)
        if self._keep is not None:
            return x[self._keep], y[self._keep]
        return x, y

    def _check_model(self, image, photons, amp, art, saturated):
        """Does the fitted site model explain this frame? (:func:`latticeread.core.frame_check.check_frame`)."""
        crop = self.basis.crop
        whole = (crop[0].start, crop[0].stop, crop[1].start, crop[1].stop) == (0, self.frame_shape[0], 0,
                                                                                 self.frame_shape[1])
        full = photons if whole or self.camera.offset_map is not None else self.camera.counts_to_photons(image)
        exclude = None
        for part in (art, self.hot_pixels, saturated):
            if part is not None:
                exclude = part if exclude is None else exclude | part
        if getattr(self, "_pixel_model", None) is None:
            self._pixel_model = PixelModel(self.calibration.psf)
        if self.basis.background_model.startswith("poly") and amp.background_coefficients is not None:
            # the check compares with one background level: take the fitted surface's structure out
            surface = self.basis.background_image(amp.background_coefficients) - amp.background
            full = np.array(full, dtype=float)
            full[crop] -= surface[crop]
        return check_frame(full, crop=crop, x=amp.x, y=amp.y, amplitudes=amp.amplitudes, background=amp.background,
                           model=self._pixel_model, camera=self.camera, exclude=exclude,
                           unit=amplitude_unit(self.camera))

    def _fit_around(self, photons, filled, art, *, offset, saturated, steps: int = 2) -> AmplitudeResult:
        """Amplitudes with this frame's cosmic-ray pixels left out, by filling them with the fit.

        A low-rank update of the factorisation per hit pixel would be exact but costs a banded
        solve per pixel; filling the pixels with the model's prediction and refitting
        (:func:`latticeread.core.artefacts.model_fill`) converges to the same fit in a few
        steps at the cost of one fit each.
        """
        def fit(image):
            if self.method == "nonlinear" and self.atom_photons is not None:
                return self.basis.nonlinear(image, atom_photons=self.atom_photons, offset=offset,
                                            saturated=saturated, artefacts=self.hot_pixels)
            return self.basis.linear(image, offset=offset, saturated=saturated, artefacts=self.hot_pixels)

        if getattr(self, "_pixel_model", None) is None:
            self._pixel_model = PixelModel(self.calibration.psf)
        # start from the background under the hits, not from their neighbours' light: a hit on an
        # empty site between atoms, filled from those atoms' wings, looks like an atom and the
        # few fill-and-fit steps do not take that back (they do raise an atom under a hit)
        level = float(np.median(photons[self.basis.crop]))
        amp = fit(np.where(art, level, filled))
        for _ in range(steps):
            filled = model_fill(photons, art, x=amp.x, y=amp.y, amplitudes=amp.amplitudes,
                                background=amp.background, model=self._pixel_model)
            amp = fit(filled)
        if self.method == "linear":
            # the sites whose core a hit covers: refitted on the pixels left around them
            background = amp.background if amp.background_coefficients is None or \
                self.basis.background_model == "constant" else self.basis.background_image(amp.background_coefficients)
            refit = refit_near_artefacts(photons, art, x=amp.x, y=amp.y, amplitudes=amp.amplitudes,
                                         background=background, model=self._pixel_model,
                                         bad=_either(self.hot_pixels, saturated))
            amp = dataclasses.replace(amp, amplitudes=refit)
        flags = amp.flags | (self.basis.flags(offset=offset, artefacts=art) & np.uint8(site_flags.ARTEFACT))
        return dataclasses.replace(amp, flags=flags)

    def extract(self, image):
        """The heavy step: ``(geometry, amplitudes (photons), flags)`` of one frame in counts."""
        geometry, amp, _ = self.extract_full(image)
        return geometry, amp.amplitudes, amp.flags

    def __call__(self, image, *, frame_index: int = 0, threshold=None, where: str | None = None) -> FrameResult:
        """Reconstruct one frame (counts): phase refit, amplitudes, classification.

        Parameters
        ----------
        image : (H, W) ndarray
            Raw camera frame in counts.
        frame_index : int
            Index recorded in the result (and used in error messages).
        threshold : ThresholdResult or float, optional
            Threshold in photons; default: the calibration's, else chosen from this frame's
            histogram with the calibration's threshold method (:func:`pooled_threshold` on one
            frame). A pooled threshold over a stack is applied by :func:`reconstruct_stack`.
        where : str, optional
            How error messages name the frame (default ``"frame <frame_index>"``).
        """
        geometry, amp, warnings = self.extract_full(image, where=where or f"frame {frame_index}")
        result = self.classify(geometry, amp, warnings, frame_index=frame_index, threshold=threshold)
        return dataclasses.replace(result, check=self.last_check)

    def classify(self, geometry, amp, warnings=(), *, frame_index: int = 0, threshold=None) -> FrameResult:
        """The :class:`FrameResult` of an extraction (:meth:`extract_full`) against a threshold.

        Parameters
        ----------
        geometry, amp, warnings :
            The output of :meth:`extract_full`.
        frame_index : int
        threshold : ThresholdResult or float, optional
            As for :meth:`__call__`.
        """
        threshold = threshold if threshold is not None else self.threshold
        if threshold is None:
            threshold = pooled_threshold(amp.amplitudes, calibration=self.calibration, flags=amp.flags)
        elif not isinstance(threshold, ThresholdResult):
            threshold = float(threshold)
        sites = _with_positions(self.sites, amp.x, amp.y)
        result = FrameResult(frame_index=int(frame_index), geometry=geometry, sites=sites,
                             amplitudes=amp.amplitudes, occupied=np.zeros(len(sites), np.uint8),
                             p_occupied=np.zeros(len(sites)), flags=amp.flags, threshold=float("nan"),
                             threshold_result=None, background=amp.background, method=amp.method,
                             warnings=tuple(warnings), offset_method=self._offset_info[0],
                             offset_sigma=self._offset_info[1], excluded=self.excluded_at(geometry.offset))
        return reclassify(result, threshold)


def _camera_pixel_weights(calibration: Calibration, shape, reference) -> np.ndarray:
    """Per-pixel weights (1/photons^2) of ``weighting="camera"``; see :class:`Reconstructor`."""
    if reference is None:
        stored = calibration.options.reference
        if stored is None:
            raise CalibrationError("camera weighting needs the mean photon image of the calibration frames; "
                                   "recalibrate with --weighting camera")
        if stored.shape != tuple(shape):
            raise CalibrationError("the calibration's reference image for camera weighting does not match its frame "
                                   "shape; recalibrate with --weighting camera")
        reference = stored.image()
    reference = np.asarray(reference, dtype=float)
    if reference.shape != tuple(shape):
        raise CalibrationError(f"the reference image for camera weighting is {reference.shape[0]}x"
                               f"{reference.shape[1]} pixels but the calibration was made for {shape[0]}x{shape[1]}")
    smoothing = max(max(calibration.geometry.spacings), float(calibration.psf.fwhm))
    try:
        return camera_weights(reference, camera=calibration.camera, smoothing=smoothing)
    except ReconstructionError as exc:
        raise CalibrationError(f"camera weighting: {exc}") from exc


def with_camera_weighting(calibration: Calibration, frames, *, max_frames: int = 50) -> Calibration:
    """The calibration set up for ``weighting="camera"``: mean photon image of ``frames`` in its options.

    Parameters
    ----------
    calibration : Calibration
        Made from (some of) ``frames``, e.g. by :func:`calibrate`.
    frames : (n, H, W) ndarray, FrameStack or sequence of (H, W) arrays
        Raw camera frames in counts; at most ``max_frames`` (evenly spread) are averaged.
    max_frames : int
        Largest number of frames averaged.

    Returns
    -------
    Calibration
        ``options.weighting = "camera"`` and ``options.reference``: the mean photon
        image (non-finite and saturated pixels left out) as block means over squares of
        ``block`` pixels (the largest whole number of pixels not above the smaller lattice
        spacing; the weights are smoothed over more than that anyway), so the calibration
        file stays small. The threshold is left as it is: the weighted amplitudes have the
        same mean as the unweighted ones.

    Raises
    ------
    FrameError
        No frames, or frames of another size than the calibration's.
    """
    n_total = _n_frames(frames)
    if n_total < 0:
        frames = list(frames)
        n_total = len(frames)
    if n_total == 0:
        raise FrameError("no frames to average for the camera weighting")
    shape = tuple(int(s) for s in calibration.frame_shape)
    pick = np.unique(np.linspace(0, n_total - 1, min(n_total, int(max_frames))).round().astype(int))
    total = np.zeros(shape)
    count = np.zeros(shape)
    camera = calibration.camera
    for i in pick:
        frame = np.asarray(frames[int(i)])
        if frame.shape != shape:
            raise FrameError(f"frame {i} is {frame.shape[0]}x{frame.shape[1]} pixels but the calibration was made "
                             f"for {shape[0]}x{shape[1]}" if frame.ndim == 2 else
                             f"frame {i} has shape {frame.shape}; expected 2-D frames")
        with np.errstate(invalid="ignore"):
            good = np.isfinite(frame) & (frame < camera.saturation)
        photons = camera.counts_to_photons(np.where(good, frame, 0))
        total += np.where(good, photons, 0.0)
        count += good
    mean = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    fill = np.nanmedian(mean) if np.isfinite(mean).any() else 0.0
    mean = np.where(np.isfinite(mean), mean, fill)
    block = max(1, int(np.floor(min(calibration.geometry.spacings))))
    h, w = shape
    hb, wb = -(-h // block), -(-w // block)
    padded = np.pad(mean, ((0, hb * block - h), (0, wb * block - w)), mode="edge")
    values = padded.reshape(hb, block, wb, block).mean(axis=(1, 3))
    reference = ReferenceImage(block=block, shape=(h, w), values=np.round(values, 4), n_frames=int(len(pick)))
    return calibration.with_options(weighting="camera", reference=reference)


def _site_subset(sites: SiteGrid, keep) -> SiteGrid:
    """The sites where ``keep`` is True, in the same matrix frame (row_min, n_rows... unchanged)."""
    return SiteGrid(rows=sites.rows[keep], cols=sites.cols[keep], x=sites.x[keep], y=sites.y[keep],
                    row_min=sites.row_min, col_min=sites.col_min, n_rows=sites.n_rows, n_cols=sites.n_cols)


def region_sites(calibration: Calibration, *, index_bounds=None) -> tuple[SiteGrid, np.ndarray]:
    """The sites a calibration fits and which of them its analysed region keeps.

    Parameters
    ----------
    calibration : Calibration
    index_bounds : (row_min, row_max, col_min, col_max), optional
        Default: ``calibration.options.index_bounds``.

    Returns
    -------
    sites : SiteGrid
        Every fitted site, centres in pixels (calibration lattice, lens distortion applied).
    keep : (N,) ndarray of bool
        True for a site of the analysed region (:func:`latticeread.core.region.sites_in_region`).
    """
    bounds = calibration.options.index_bounds if index_bounds is None else index_bounds
    sites = _placed(calibration, lattice_sites(calibration.geometry, tuple(int(s) for s in calibration.frame_shape),
                                               index_bounds=bounds))
    keep = sites_in_region(calibration.options.region, x=sites.x, y=sites.y, rows=sites.rows, cols=sites.cols)
    return sites, keep


def _either(a, b):
    """The union of two optional pixel masks (None when both are None)."""
    if a is None:
        return b
    return a if b is None else a | b


def _basis_psfs(calibration: Calibration, sites: SiteGrid) -> dict:
    """The PSF keyword arguments of :class:`SiteBasis`: the calibration's PSF, or its applied zone PSFs.

    With zone PSFs the main PSF only sets the stamp radius: the calibration's PSF with the
    zones' common radius.
    """
    zones = calibration.psf_zones
    if zones is None or not zones.applied:
        return {"psf": calibration.psf}
    return {"psf": dataclasses.replace(calibration.psf, radius=zones.radius), "local_psfs": zones.psfs,
            "local_weights": zones.weights(sites.x, sites.y)}


def _placed(calibration: Calibration, sites: SiteGrid) -> SiteGrid:
    """The sites where the calibration's lens distortion puts them (unchanged without an applied field)."""
    field_ = calibration.distortion
    if field_ is None or not field_.applied or len(sites) == 0:
        return sites
    return _with_positions(sites, *field_.place(sites.x, sites.y))


def _on_perfect_lattice(atoms, calibration: Calibration):
    """Located atoms moved back onto the perfect lattice (undoing an applied lens distortion)."""
    field_ = calibration.distortion
    if field_ is None or not field_.applied or len(atoms) == 0:
        return atoms
    x, y = field_.unplace(atoms.x, atoms.y)
    return dataclasses.replace(atoms, x=x, y=y)


def _with_positions(sites: SiteGrid, x, y) -> SiteGrid:
    return SiteGrid(rows=sites.rows, cols=sites.cols, x=np.asarray(x, float), y=np.asarray(y, float),
                    row_min=sites.row_min, col_min=sites.col_min, n_rows=sites.n_rows, n_cols=sites.n_cols)


def _n_frames(frames) -> int:
    try:
        return len(frames)
    except TypeError:
        return -1


def frame_iter(frames) -> Iterator[np.ndarray]:
    """The (H, W) frames of a stack, an array or any iterable of frames, one at a time."""
    if isinstance(frames, np.ndarray):
        if frames.ndim == 2:
            yield frames
            return
        if frames.ndim != 3:
            raise FrameError(f"expected a frame (H, W) or a stack (n, H, W), got shape {frames.shape}")
        yield from frames
        return
    yield from frames


def reconstruct_stack(frames: Iterable, calibration: Calibration, *, method: str | None = None, mask=None,
                      refit_phase: bool | None = None, threshold=None,
                      progress: Callable[[int, int], None] | None = None) -> Iterator[FrameResult]:
    """Reconstruct and classify the frames of one stack under the calibration's threshold policy.

    With a fixed threshold (the calibration's or ``threshold``) or the ``per_frame`` policy,
    each frame is yielded as soon as it is done (memory stays flat in the number of frames).
    With the ``pooled`` policy (the default of a calibration without a fixed threshold) every
    frame is reconstructed first (their amplitudes are kept), then all are classified against
    the threshold of their pooled histogram (:func:`pooled_threshold`).

    Parameters
    ----------
    frames : (n, H, W) ndarray, FrameStack or iterable of (H, W) arrays
        Raw camera frames in counts.
    calibration : Calibration
    method, mask, refit_phase :
        See :class:`Reconstructor`.
    threshold : ThresholdResult or float, optional
        Fixed threshold in photons for every frame.
    progress : callable(done, total), optional
        Called after each frame's reconstruction (``total`` is -1 when unknown).

    Yields
    ------
    FrameResult
        In frame order.
    """
    rec = Reconstructor(calibration, method=method, mask=mask, refit_phase=refit_phase)
    total = _n_frames(frames)
    pooled = threshold is None and calibration.threshold_policy.kind == "pooled"
    kept = []
    for i, frame in enumerate(frame_iter(frames)):
        if pooled:
            kept.append((i, *rec.extract_full(frame, where=f"frame {i}"), rec.last_check))
        else:
            yield rec(frame, frame_index=i, threshold=threshold)
        if progress is not None:
            progress(i + 1, total)
    if not kept:
        return
    fit = pooled_threshold(np.concatenate([amp.amplitudes for _, _, amp, _, _ in kept]), calibration=calibration,
                           flags=np.concatenate([amp.flags for _, _, amp, _, _ in kept]))
    for i, geometry, amp, warnings, check in kept:
        yield dataclasses.replace(rec.classify(geometry, amp, warnings, frame_index=i, threshold=fit), check=check)


def calibrate(frames, *, psf: PSFModel | None = None, camera: CameraModel | None = None,
              pixel_size_nm: float | None = None, geometry: LatticeGeometry | None = None,
              threshold_method: str = "mixture", method: str | None = None, mask=None,
              restrict_region: bool = True, max_frames: int = 50, refine_vectors: bool = False,
              refine_frames: int = 4, lattice_prior: dict | None = None,
              correct_distortion: bool = True, correct_brightness: bool = True, psf_zones=None,
              background: str = "constant") -> Calibration:
    """Make a calibration from a stack of frames.

    Parameters
    ----------
    frames : (n, H, W) or (H, W) ndarray, FrameStack or sequence of (H, W) arrays
        Raw camera frames in counts; at most ``max_frames`` (evenly spread) are used.
    psf : PSFModel, optional
        Known PSF; default: estimated from isolated atoms (:func:`estimate_psf`), or, when the
        frames are too dense for that, a round Gaussian/Airy PSF whose width is fitted on the
        frames (:func:`latticeread.core.psf_width.fit_psf_width`; noted in ``psf_width_fit``
        and ``warnings``).
    camera : CameraModel, optional
        Counts-to-photons conversion; default: 1 count = 1 photon, no offset.
    pixel_size_nm : float, optional
        Camera pixel in the atom plane, nanometres (stored).
    geometry : LatticeGeometry, optional
        Known lattice; default: estimated from the frames (:func:`estimate_lattice`).
    threshold_method : {"mixture", "otsu", "minimum"}
        How the threshold is chosen on the pooled histogram.
    method : str, optional
        Amplitude method; default ``"nonlinear"`` when the spacing is below
        :data:`NONLINEAR_BELOW` PSF FWHM, else ``"linear"``.
    mask : (H, W) ndarray of bool, optional
        Pixels to use.
    restrict_region : bool
        Keep only the sites within :data:`REGION_MARGIN` sites of the bounding box of the
        sites where atoms were seen (fewer unknowns: faster and better conditioned).
    max_frames : int
        Largest number of frames used.
    refine_vectors : bool
        Once the PSF is known, refit the lattice vectors to the full image model of the first
        ``refine_frames`` frames together (shared vectors, an offset per frame;
        :func:`latticeread.core.lattice_model.refine_lattice_model`; several seconds per
        512x512 frame, about a minute below 0.9 FWHM) and keep them when the fit converged
        (noted in ``vectors_model_fit`` with its 1-sigma ``spacing_sigma``; a warning when that
        exceeds :data:`latticeread.core.lattice_model.SPACING_SIGMA_WARN`). Worth it when the
        spacing is near or below the PSF FWHM, where the Fourier estimate is least precise.
    refine_frames : int
        Frames in the joint model fit (``refine_vectors`` and the prior path): the statistical
        error of the spacing falls as one over the square root of their number.
    lattice_prior : dict, optional
        The lab's own knowledge of the lattice: ``spacing_px`` (pixels, one number or one per
        vector), ``angle_deg`` (direction of a1 from +x towards +y, degrees) and optionally
        ``angle_between_deg`` (from a2 to a1, default 90). Used as fixed values by the Fourier
        estimate; when that finds no lattice (below about one PSF FWHM the lattice's Fourier
        peaks vanish) and ``psf`` is given, the geometry is fitted from this prior by
        :func:`latticeread.core.lattice_model.lattice_from_prior` instead (noted in
        ``geometry_from_prior``).
    correct_distortion : bool
        Fit a lens-distortion field to the lattice's shifts in blocks of the first frame
        (:func:`latticeread.core.distortion.fit_distortion`; stored in ``distortion``) and place
        the sites with it when it passes the significance test given there (the lattice
        vectors are refitted together with it); noted in ``distortion``.
    background : {"constant", "plane", "poly2", "poly3", "auto"}
        Background fitted with the sites in every frame (stored in ``options.background``).
        ``"auto"``: a degree-2 surface when it lowers the calibration frames' residual by far
        more than noise would (:data:`BACKGROUND_SIGNIFICANCE`; noted in ``background``), else
        a constant.
    psf_zones : int or (int, int), optional
        Measure the PSF in ``n x n`` (or ``rows x cols``) zones of the analysed region and blend
        them across the field (:func:`latticeread.core.psf_zones.estimate_zone_psfs`; stored in
        ``psf_zones``, zones with too few atoms named in ``warnings``). Default: one PSF
        everywhere. Costs several seconds to a minute per calibration.
    correct_brightness : bool
        With linear (or deconvolution) amplitudes, fit a smooth relative-brightness map to the
        amplitudes of the occupied sites (:func:`latticeread.core.brightness.fit_brightness`;
        stored in ``brightness``); when it passes its significance test every amplitude is
        divided by the map at its site before the threshold is chosen and applied (noted in
        ``brightness``).

    Returns
    -------
    Calibration
        The threshold fitted on the pooled histogram of the calibration frames (fixed from
        then on), its fit in ``threshold_fit``, ``options.index_bounds`` (when restricted) and
        ``options.photons_per_atom``; ``notes`` holds the provenance (``n_frames_used``,
        ``spacing_over_fwhm``, ``threshold_sites``, fit diagnostics, ``warnings``).
    """
    camera = camera or CameraModel()
    n_total = _n_frames(frames)
    if n_total == 0:
        raise FrameError("no frames to calibrate from")
    if isinstance(frames, np.ndarray) and frames.ndim == 2:
        frames = frames[None]
    if isinstance(frames, np.ndarray) and frames.ndim != 3:
        raise FrameError(f"expected a frame (H, W) or a stack (n, H, W), got shape {frames.shape}")
    if n_total < 0:
        frames = list(frames)
        n_total = len(frames)
    pick = np.unique(np.linspace(0, n_total - 1, min(n_total, int(max_frames))).round().astype(int))
    chosen = [np.asarray(frames[int(i)]) for i in pick]
    for i, f in zip(pick, chosen):
        if f.ndim != 2:
            raise FrameError(f"frame {i} has shape {f.shape}; expected 2-D frames")
        if f.shape != chosen[0].shape:
            raise FrameError(f"frame {i} is {f.shape[0]}x{f.shape[1]} pixels but frame {pick[0]} is "
                             f"{chosen[0].shape[0]}x{chosen[0].shape[1]}")
    shape = chosen[0].shape
    photons = np.stack([camera.counts_to_photons(f) for f in chosen])
    finite = np.isfinite(photons)
    clean = np.where(finite, photons, np.nanmedian(photons)) if not finite.all() else photons
    notes: dict = {"n_frames_used": int(len(chosen))}
    # cosmic-ray hits and hot pixels would pass for atoms in the lattice, region and PSF estimates
    raw_clean = clean
    cleaned = clean_stack(raw_clean, psf=psf, camera=camera)
    clean = cleaned.frames
    if geometry is None:
        geometry = _geometry_from_frames(clean, psf=psf, prior=lattice_prior, n_fit=refine_frames, notes=notes)
        notes["geometry_estimated"] = True
    psf_warnings: list[str] = []
    if "geometry_too_fine" in notes:
        psf_warnings.append(notes["geometry_too_fine"]["why"])
    if psf is None:
        from latticeread.core.psf_estimate import estimate_psf  # PSF from isolated atoms

        try:
            psf = estimate_psf(clean, geometry)
        except ReconstructionError as exc:
            # dense frames have no isolated atoms: fit the width of a round PSF on the frames
            from latticeread.core.psf_width import fit_psf_width

            try:
                fitted = fit_psf_width(clean, geometry=geometry)
            except ReconstructionError as fallback:
                raise ReconstructionError(
                    f"{exc}; a PSF width fit on the frames failed too ({fallback}); give the PSF from the optics "
                    "instead (--psf airy --wavelength-nm --na --pixel-size-nm)") from fallback
            psf = fitted.psf
            notes["psf_width_fit"] = {"kind": fitted.kind, "fwhm": fitted.fwhm, "n_frames": fitted.n_frames,
                                      "why": str(exc)}
            psf_warnings.extend(fitted.warnings)
        notes["psf_estimated"] = True
        # the measured PSF also catches streaks and blobs that a sharp first guess lets through
        cleaned = clean_stack(raw_clean, psf=psf, camera=camera, known=cleaned.hot)
        clean = cleaned.frames
    hot = np.argwhere(cleaned.hot)
    notes["artefacts"] = {"hot_pixels": int(len(hot)), "cosmic_ray_hits": cleaned.n_hits,
                          "pixels_filled": cleaned.n_pixels, "n_frames": int(len(chosen))}
    hot_pixels = tuple(map(tuple, hot.tolist()))
    if refine_vectors and "geometry_from_prior" not in notes:  # the prior path is a model fit already
        geometry = _refine_vectors(clean, geometry, psf=psf, n_fit=refine_frames, notes=notes,
                                   warnings=psf_warnings)
    elif "geometry_from_prior" in notes:
        psf_warnings.extend(w for w in geometry.quality.warnings)
    distortion = None
    if correct_distortion:
        distortion, geometry = _distortion_from_frames(clean, geometry, psf, notes)
    check = _geometry_check(clean, geometry, psf, distortion=distortion)
    if check is not None:
        notes["geometry_check"] = {"max_deviation_spacings": check.max_deviation, "significance": check.significance,
                                   "n_atoms": check.n_atoms, "ok": check.ok}
        if not check.ok:
            psf_warnings.append(check.warning)
    ratio = min(geometry.spacings) / psf.fwhm
    if method is None:
        method = "nonlinear" if ratio < NONLINEAR_BELOW else "linear"
    if method not in AMPLITUDE_METHODS:
        raise CalibrationError(f"unknown amplitude method {method!r}; use one of {', '.join(AMPLITUDE_METHODS)}")
    notes["spacing_over_fwhm"] = float(ratio)
    # each frame's offset: from its single atoms where the image's lattice frequency is weak or gone
    offset_method = "atoms" if ratio < ATOMS_OFFSET_BELOW else "model"

    first_bounds = _bright_region(clean, geometry=geometry, psf=psf) if restrict_region else None
    draft = Calibration(geometry=geometry, psf=psf, camera=camera, frame_shape=shape, threshold=None,
                        threshold_method=threshold_method, amplitude_method="linear", pixel_size_nm=pixel_size_nm,
                        options=ReconstructionOptions(index_bounds=first_bounds, hot_pixels=hot_pixels,
                                                      phase_method=offset_method), distortion=distortion)
    rec = Reconstructor(draft, method="linear", mask=mask, refit_phase=True)
    pooled, pooled_flags, warnings = _pooled(rec, chosen)
    tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
    if restrict_region and np.isfinite(tr.threshold) and first_bounds is None:
        bounds = _atom_region(rec.sites, pooled.reshape(len(chosen), -1), tr.threshold)
        if bounds is not None:
            draft = draft.with_options(index_bounds=bounds)
            rec = Reconstructor(draft, method="linear", mask=mask, refit_phase=rec.refit_phase)
            pooled, pooled_flags, warnings = _pooled(rec, chosen)
            tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
    _check_region(rec, notes, psf_warnings)
    if background == "auto":
        background = _choose_background(rec, chosen, notes)
    if background != "constant":
        draft = draft.with_options(background=background)
        rec = Reconstructor(draft, method="linear", mask=mask, refit_phase=rec.refit_phase)
        pooled, pooled_flags, warnings = _pooled(rec, chosen)
        tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
    if psf_zones:
        zones = _zones_from(clean, rec, psf_zones, notes, psf_warnings)
        if zones is not None and zones.applied:
            draft = draft.replace(psf_zones=zones)
            rec = Reconstructor(draft, method="linear", mask=mask, refit_phase=rec.refit_phase)
            pooled, pooled_flags, warnings = _pooled(rec, chosen)
            tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
    if np.isfinite(tr.threshold):
        # the histogram of the sites where atoms occur: sites that never hold an atom (corners of
        # the bounding box, the margin) have no neighbours' light and would make the empty peak
        # look narrower than it is for the sites that matter, pulling the threshold down
        active = _active_sites(rec.sites, pooled.reshape(len(chosen), -1), tr.threshold)
        if active is not None:
            keep = np.tile(active, len(chosen))
            tr = select_threshold(pooled[keep], method=threshold_method, camera=camera, flags=pooled_flags[keep])
            notes["threshold_sites"] = int(active.sum())
    brightness = None
    # two passes: the second picks the occupied sites against the map, so dim atoms near the
    # threshold are not left out (which would make the dim parts of the map too bright)
    for _ in range(2 if correct_brightness and method != "nonlinear" else 0):
        if not np.isfinite(tr.threshold):
            break
        found = _brightness_from(rec, pooled, pooled_flags, tr, n_frames=len(chosen), notes=notes)
        if found is None or not found.applied:
            brightness = brightness if brightness is not None else found
            break
        brightness = found
        draft = draft.replace(brightness=brightness)
        rec = Reconstructor(draft, method="linear", mask=mask, refit_phase=rec.refit_phase)
        pooled, pooled_flags, warnings = _pooled(rec, chosen)
        tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
        active = _active_sites(rec.sites, pooled.reshape(len(chosen), -1), tr.threshold) \
            if np.isfinite(tr.threshold) else None
        if active is not None:
            keep = np.tile(active, len(chosen))
            tr = select_threshold(pooled[keep], method=threshold_method, camera=camera, flags=pooled_flags[keep])
    if brightness is not None:
        notes["brightness"] = brightness.describe()
    atom = tr.occupied_mean
    if method == "nonlinear":
        if not np.isfinite(atom) or atom <= 0:
            # below 0.7 FWHM the linear histogram need not be bimodal: start from a generous
            # guess; the binary fit halves a too-bright guess until it finds atoms, then rescales
            positive = pooled[np.isfinite(pooled) & (pooled > 0)]
            atom = float(np.percentile(positive, 99)) if positive.size else float("nan")
        if not np.isfinite(atom) or atom <= 0:
            warnings = warnings + ["no atoms were found, so the amplitude method fell back to linear"]
            method = "linear"
        else:
            # the binary fit re-estimates the brightness of one atom in every frame (least-squares
            # scale of the pattern); its decision level is half of it, which is the threshold
            rec = Reconstructor(draft.replace(amplitude_method=method).with_options(photons_per_atom=float(atom)),
                                method=method, mask=mask, refit_phase=rec.refit_phase)
            pooled, pooled_flags, warnings, atoms = _pooled(rec, chosen, atoms=True)
            atom = float(np.median(atoms)) if atoms else atom
            # the self-consistent brightness can sit in a local minimum with too few atoms: scan
            # fixed brightnesses on a few frames and keep the one with the smallest residual
            atom = _scan_atom(rec, chosen[:3], atom)
            rec = Reconstructor(draft.replace(amplitude_method=method).with_options(photons_per_atom=atom),
                                method=method, mask=mask, refit_phase=rec.refit_phase)
            pooled, pooled_flags, warnings, atoms = _pooled(rec, chosen, atoms=True)
            atom = float(np.median(atoms)) if atoms else atom
            tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
            tr = tr.with_threshold(atom / 2)
            notes["threshold_note"] = ("binary refinement: threshold = half the fitted photons of one atom, "
                                       "the decision level of the fit")
    elif method in ("wiener", "richardson_lucy"):
        rec = Reconstructor(draft.replace(amplitude_method=method), method=method,
                            mask=mask, refit_phase=rec.refit_phase)
        pooled, pooled_flags, warnings = _pooled(rec, chosen)
        tr = select_threshold(pooled, method=threshold_method, camera=camera, flags=pooled_flags)
        atom = tr.occupied_mean
    if warnings or tr.warnings or psf_warnings:
        notes["warnings"] = sorted(set(warnings) | set(tr.warnings) | set(psf_warnings))
    options = draft.options.replace(photons_per_atom=float(atom) if np.isfinite(atom) and atom > 0 else None)
    return Calibration(geometry=geometry, psf=psf, camera=camera, frame_shape=shape, threshold=float(tr.threshold),
                       threshold_method=threshold_method, amplitude_method=method, pixel_size_nm=pixel_size_nm,
                       options=options, threshold_fit=tr, distortion=distortion, brightness=brightness,
                       psf_zones=draft.psf_zones, notes=notes)


def lattice_constraint_kwargs(prior: dict | None, *, angle_between: float = np.pi / 2) -> dict:
    """The lab's knowledge of the lattice as keyword arguments of ``estimate_lattice``.

    Parameters
    ----------
    prior : dict or None
        ``spacing_px`` (pixels, one number or one per vector), ``angle_deg`` (direction of a1
        from +x towards +y, degrees), ``angle_between_deg`` (from a2 to a1, degrees); any may
        be missing or None.
    angle_between : float
        Angle between the vectors (radians) used when ``angle_deg`` is given without
        ``angle_between_deg``.

    Returns
    -------
    dict
        ``fixed_spacing`` and/or ``fixed_angle`` (radians, canonical order: a2 = a1 - between).
    """
    prior = prior or {}
    unknown = set(prior) - {"spacing_px", "angle_deg", "angle_between_deg"}
    if unknown:
        raise CalibrationError(f"unknown lattice prior entries {sorted(unknown)}; use spacing_px, angle_deg, "
                               "angle_between_deg")
    kwargs: dict = {}
    if prior.get("spacing_px") is not None:
        kwargs["fixed_spacing"] = prior["spacing_px"]
    if prior.get("angle_deg") is not None:
        a1_dir = np.deg2rad(float(prior["angle_deg"]))
        between = (np.deg2rad(float(prior["angle_between_deg"])) if prior.get("angle_between_deg") is not None
                   else float(angle_between))
        kwargs["fixed_angle"] = (float(a1_dir), float(a1_dir - between))
    return kwargs


def estimate_geometry(frames, *, camera: CameraModel | None = None, **constraints) -> LatticeGeometry:
    """Lattice geometry of a stack: the one routine of ``calibrate`` and the window.

    The frames are converted to photons (non-finite pixels replaced by the median), the
    lattice is estimated from the summed stack and from four single frames spread over it,
    and the clearest Fourier peaks win (:func:`_estimate_geometry`); the vectors come back in
    the canonical basis (:func:`latticeread.core.lattice.canonical_basis`), so a site has the
    same ``(row, col)`` however the lattice was found.

    Parameters
    ----------
    frames : (n, H, W) or (H, W) ndarray
        Raw camera frames in counts.
    camera : CameraModel, optional
        Counts-to-photons conversion (default: 1 count = 1 photon).
    **constraints
        ``fixed_spacing`` / ``fixed_angle`` of :func:`latticeread.core.lattice.estimate_lattice`
        (from :func:`lattice_constraint_kwargs`).

    Returns
    -------
    LatticeGeometry

    Raises
    ------
    LatticeNotFound
        Neither the summed stack nor a single frame shows a lattice.
    """
    from latticeread.core.lattice import canonical_geometry, estimate_lattice

    stack = np.asarray(frames, dtype=float)
    if stack.ndim == 2:
        stack = stack[None]
    if stack.ndim != 3 or len(stack) == 0:
        raise FrameError(f"expected a frame (H, W) or a stack (n, H, W), got shape {stack.shape}")
    photons = (camera or CameraModel()).counts_to_photons(stack)
    finite = np.isfinite(photons)
    clean = photons if finite.all() else np.where(finite, photons, np.nanmedian(photons))
    return canonical_geometry(_estimate_geometry(clean, lambda image: estimate_lattice(image, **constraints)))


def _geometry_from_frames(clean, *, psf, prior, n_fit, notes) -> LatticeGeometry:
    """The lattice from the located atoms, the Fourier estimate, or a model fit from the prior.

    Without the lab's spacing and angle and with a known PSF, the positions of the atoms that
    stand apart decide (:func:`latticeread.core.atoms.lattice_from_atoms`: no optical cut-off,
    every single atom counts); the Fourier estimate is its start when the atoms alone show no
    lattice, and the answer when too few atoms stand apart. The route taken is noted in
    ``geometry_method``.
    """
    from latticeread.core.lattice import canonical_geometry, estimate_lattice

    kwargs = lattice_constraint_kwargs(prior)
    fourier, failure = None, None
    try:
        fourier = canonical_geometry(_estimate_geometry(clean, lambda image: estimate_lattice(image, **kwargs)))
    except LatticeNotFound as exc:
        failure = exc
    if psf is not None and not kwargs:
        from latticeread.core.atoms import lattice_from_atoms, locate_atoms, locate_holes, merge_located

        atoms = locate_atoms(clean, fwhm=psf.fwhm)
        method = "atoms"
        try:
            try:
                geometry = lattice_from_atoms(clean, fwhm=psf.fwhm, start=fourier, atoms=atoms)
            except LatticeNotFound as exc:
                # a filled core (Mott insulator) has few atoms that stand apart but isolated holes
                # that do: they sit on the lattice too
                holes = locate_holes(clean, fwhm=psf.fwhm)
                if not holes.single.any():
                    raise
                notes["geometry_atoms_only_failed"] = str(exc)
                atoms, method = merge_located(atoms, holes), "atoms and holes"
                geometry = lattice_from_atoms(clean, fwhm=psf.fwhm, start=fourier, atoms=atoms)
        except LatticeNotFound as exc:
            notes["geometry_atoms_failed"] = str(exc)
        else:
            geometry = _coarsest_atom_lattice(geometry, atoms, notes)
            notes["geometry_method"] = method
            notes["geometry_from_atoms"] = {"n_atoms": int(geometry.quality.n_sites_used),
                                            "spacing_sigma": float(geometry.quality.spacing_sigma),
                                            "residual_px": float(geometry.quality.residual),
                                            "start": "fourier" if fourier is not None and not np.isfinite(
                                                geometry.quality.peak_to_background) else "atoms"}
            return _refine_atom_geometry(clean, geometry, psf=psf, atoms=atoms, notes=notes)
    if fourier is not None:
        notes["geometry_method"] = "fourier"
        return fourier
    exc = failure
    atoms_text = (f"; the positions of single atoms showed none either ({notes['geometry_atoms_failed']})"
                  if "geometry_atoms_failed" in notes else "")
    if kwargs.get("fixed_spacing") is None or "fixed_angle" not in kwargs:
        raise LatticeNotFound(f"{exc}{atoms_text}. Below about one PSF FWHM the lattice's Fourier peaks vanish: "
                              "give the spacing and angle of the lattice and the PSF to fit it from that prior, or "
                              "the PSF alone (from the optics) so that the lattice can be read from the positions of "
                              "single atoms") from exc
    if psf is None:
        raise LatticeNotFound(f"{exc}. Fitting the lattice from the spacing and angle needs the PSF: give it "
                              "from the optics (e.g. --psf airy --wavelength-nm --na --pixel-size-nm)") from exc
    from latticeread.core.lattice_model import lattice_from_prior

    a1_dir, a2_dir = kwargs["fixed_angle"]
    k = max(1, min(int(n_fit), len(clean)))
    # the prior names a1 along the lab's angle; the result is put in the canonical basis like
    # every other route, so the same site gets the same (row, col) however it was calibrated
    geometry = canonical_geometry(lattice_from_prior(clean[:k], psf=psf, spacing=kwargs["fixed_spacing"],
                                                     angle=a2_dir, angle_between=a1_dir - a2_dir))
    notes["geometry_method"] = "prior"
    notes["geometry_from_prior"] = {"prior": dict(prior), "n_frames": k,
                                    "spacing_sigma": float(geometry.quality.spacing_sigma),
                                    "sigma_px": float(geometry.quality.residual)}
    return geometry


#: ``background="auto"`` takes the degree-2 surface when it lowers the residual of the
#: calibration frames by more than this many times the noise variance per frame (a surface
#: fitted to pure noise lowers it by about 5, its number of extra parameters).
BACKGROUND_SIGNIFICANCE = 100.0


def _choose_background(rec: Reconstructor, frames, notes: dict, n_frames: int = 3) -> str:
    """``"poly2"`` when a smooth background surface explains the calibration frames much better, else ``"constant"``."""
    basis = rec.basis
    try:
        poly = SiteBasis(basis.geometry, frame_shape=basis.frame_shape, sites=basis.sites, mask=basis.mask,
                         pixel_weights=rec.pixel_weights, background="poly2", **_basis_psfs(rec.calibration, basis.sites))
    except ReconstructionError as exc:
        notes["background"] = f"constant (the surface fit failed: {exc})"
        return "constant"
    gains = []
    for image in frames[:n_frames]:
        geometry, amp, _ = rec.extract_full(image)
        photons = rec._photons(np.asarray(image))
        y = basis._weighted(photons)
        total = float(np.sum(y * photons[basis.crop]))
        flat = basis.explained(photons, offset=geometry.offset)
        noise = max((total - flat) / max(basis._n_bg_pixels, 1.0), 1e-12)
        gains.append((poly.explained(photons, offset=geometry.offset) - flat) / noise)
    gain = float(np.median(gains)) if gains else 0.0
    choice = "poly2" if gain > BACKGROUND_SIGNIFICANCE else "constant"
    notes["background"] = (f"{choice}: a degree-2 background surface lowers the residual by {gain:.0f} times the "
                           f"noise variance per frame (threshold {BACKGROUND_SIGNIFICANCE:.0f})")
    return choice


def _zones_from(clean, rec: Reconstructor, grid, notes: dict, warnings: list):
    """Zone PSFs measured on the calibration frames (None, with a note, when that fails)."""
    from latticeread.core.psf_zones import estimate_zone_psfs

    if np.ndim(grid) == 0:
        grid = (int(grid), int(grid))
    cal = rec.calibration
    try:
        zones = estimate_zone_psfs(clean, geometry=cal.geometry, psf=cal.psf, sites=rec.fit_sites,
                                   site_x=rec.sites.x, site_y=rec.sites.y, grid=grid)
    except ReconstructionError as exc:
        notes["psf_zones"] = f"no zone PSFs: {exc}"
        warnings.append(f"the PSF could not be measured in zones ({exc}); one PSF is used everywhere")
        return None
    notes["psf_zones"] = zones.describe()
    warnings.extend(zones.warnings)
    return zones


def _brightness_from(rec: Reconstructor, pooled, flags, tr, *, n_frames: int, notes: dict):
    """Brightness map from the occupied, unflagged sites of the calibration frames (None: too few).

    ``pooled`` are the reconstructor's amplitudes: divided by its calibration's map, if any, so
    the sites are picked against the map and the map's own factor is put back before the fit.
    """
    from latticeread.core.brightness import fit_brightness

    x = np.tile(rec.sites.x, n_frames)
    y = np.tile(rec.sites.y, n_frames)
    occupied = (pooled > tr.threshold) & (np.asarray(flags) == 0)
    current = rec.calibration.brightness
    raw = pooled if current is None else pooled * current.factor(x, y)
    try:
        field_ = fit_brightness(x[occupied], y[occupied], raw[occupied], frame_shape=rec.frame_shape,
                                sites_x=rec.sites.x, sites_y=rec.sites.y)
    except ReconstructionError as exc:
        notes["brightness"] = f"no brightness map: {exc}"
        return None
    notes["brightness"] = field_.describe()
    return field_


def _offsets_from_atoms(frames, geometry: LatticeGeometry, *, psf: PSFModel, atoms) -> list:
    """Each frame's lattice offset (pixels) from its located atoms; the geometry's own offset
    for a frame whose atoms do not give one."""
    from latticeread.core.atoms import offset_from_atoms

    offsets = []
    for f in range(len(frames)):
        try:
            offsets.append(offset_from_atoms(frames[f], geometry, fwhm=psf.fwhm, atoms=atoms.in_frame(f)).offset)
        except LatticeNotFound:
            offsets.append(geometry.offset)
    return offsets


def _distortion_from_frames(clean, geometry: LatticeGeometry, psf: PSFModel, notes: dict, *, max_frames: int = 1):
    """Lens distortion from the first frames: (field or None, the geometry to use with it)."""
    from latticeread.core.atoms import locate_atoms
    from latticeread.core.distortion import fit_distortion

    frames = clean[:max_frames]
    atoms = locate_atoms(frames, fwhm=psf.fwhm)
    offsets = _offsets_from_atoms(frames, geometry, psf=psf, atoms=atoms)
    try:
        fit = fit_distortion(frames, geometry, psf=psf, offsets=offsets, atoms=atoms)
    except (LatticeNotFound, np.linalg.LinAlgError) as exc:
        notes["distortion"] = f"no lens-distortion fit: {exc}"
        return None, geometry
    notes["distortion"] = fit.field.describe()
    return fit.field, (fit.geometry if fit.field.applied else geometry)


def offset_warning(sigma, n_atoms: int, spacing: float, *, source: str = "atom(s) that stand apart") -> str:
    """Why a frame's offset from its atoms may misplace every site ("" when it holds).

    Parameters
    ----------
    sigma : (float, float)
        1-sigma error of the offset's x and y, pixels.
    n_atoms : int
        Atoms (and holes) that fixed it.
    spacing : float
        Smallest lattice spacing, pixels.
    source : str
        What the offset rests on, for the message.
    """
    err = float(np.hypot(*sigma))
    if n_atoms >= OFFSET_MIN_ATOMS and err <= OFFSET_SIGMA_WARN * spacing:
        return ""
    return (f"this frame's lattice offset is poorly determined: it rests on {n_atoms} {source} and is "
            f"uncertain to {err:.2f} px ({err / spacing:.3f} spacing, 1 sigma); every site of the frame may sit that far "
            "from its atom")


def _far_site_sigma(geometry: LatticeGeometry, atoms, shape) -> float:
    """1-sigma error, in spacings, of the farthest single atom's site from the vectors' relative error."""
    sel = atoms.single
    if not sel.any() or not np.isfinite(geometry.quality.spacing_sigma):
        return float("inf")
    centre = np.array([(shape[1] - 1) / 2.0, (shape[0] - 1) / 2.0])
    far = float(np.max(np.hypot(atoms.x[sel] - centre[0], atoms.y[sel] - centre[1]))) / min(geometry.spacings)
    return float(geometry.quality.spacing_sigma) * far


def _coarsest_atom_lattice(geometry: LatticeGeometry, atoms, notes: dict) -> LatticeGeometry:
    """The atoms' lattice, made coarser when every atom sits on one sublattice of it.

    A few atoms can show a lattice finer than the real one (sqrt(2) finer and turned by 45
    degrees, say) that they fit just as well; :func:`latticeread.core.sublattice.coarsest_lattice`
    finds it by the sites the atoms never occupy. The change is noted (``geometry_too_fine``)
    and warned about: an atom pattern that really fills one sublattice only looks the same.
    """
    from latticeread.core.sublattice import coarsest_lattice

    sel = atoms.single
    test = coarsest_lattice(geometry, atoms.x[sel], atoms.y[sel], frame=atoms.frame[sel])
    if not test.too_fine:
        return geometry
    text = (f"the atoms' positions first showed a lattice of spacing {min(geometry.spacings):.3f} px, but "
            f"{100 * test.share:.1f} % of {test.n_atoms} atoms sit on one site in {test.index} of it: the lattice "
            f"taken is that sublattice (spacing {min(test.geometry.spacings):.3f} px). If the atoms really "
            "fill only one sublattice (a checkerboard loading), give the lattice spacing and angle instead")
    log.warning(text)
    notes["geometry_too_fine"] = {"index": test.index, "share": test.share, "n_atoms": test.n_atoms,
                                  "fine_spacing_px": float(min(geometry.spacings)), "why": text}
    quality = dataclasses.replace(test.geometry.quality, warnings=test.geometry.quality.warnings + (text,))
    return dataclasses.replace(test.geometry, quality=quality)


def _refine_atom_geometry(clean, geometry: LatticeGeometry, *, psf: PSFModel, atoms, notes: dict) -> LatticeGeometry:
    """Refine the atoms' lattice by the image-model fit where the atoms alone leave the far sites uncertain.

    Crowded frames (spacing near or below the FWHM) leave few atoms that stand apart, so the
    vectors from their positions can misplace the far sites by a few hundredths of a spacing.
    When the atoms' fit puts the farthest atom's site more than :data:`ATOM_SITE_SIGMA`
    spacings off (1 sigma), the vectors are refitted to the full image model of the first
    frame (:func:`latticeread.core.lattice_model.refine_lattice_model`, every pixel, every
    site), on the part of the frame that holds atoms and with the PSF's stamp cut to
    :data:`REFINE_WINDOW_FWHM` FWHM (the light beyond it is nearly uniform over a filled
    region and is taken up by the fitted background): a few seconds for a 512x512 frame.
    The result is kept when the fit ran cleanly; ``vectors_model_fit`` in ``notes`` says
    what happened.
    """
    from latticeread.core.lattice import canonical_geometry
    from latticeread.core.lattice_model import PRECISION_WARNING, refine_lattice_model

    far = _far_site_sigma(geometry, atoms, clean.shape[1:])
    if far <= ATOM_SITE_SIGMA:
        return geometry
    spacing = min(geometry.spacings)
    window = max(2, min(int(psf.radius), int(np.ceil(REFINE_WINDOW_FWHM * psf.fwhm))))
    small = dataclasses.replace(psf, radius=window)
    first = atoms.frame == 0
    h, w = clean.shape[1:]
    pad = int(np.ceil(2 * max(geometry.spacings))) + window
    x0, x1 = max(int(atoms.x[first].min()) - pad, 0), min(int(np.ceil(atoms.x[first].max())) + pad + 1, w)
    y0, y1 = max(int(atoms.y[first].min()) - pad, 0), min(int(np.ceil(atoms.y[first].max())) + pad + 1, h)
    shift = np.array([x0, y0], float)
    start = geometry.with_offset(tuple(np.asarray(geometry.offset) - shift))
    record = {"why": f"the atoms left the farthest site uncertain to {far:.3f} spacing (1 sigma)",
              "region_px": [x0, x1, y0, y1], "window_px": window}
    try:
        fitted = refine_lattice_model(np.ascontiguousarray(clean[0, y0:y1, x0:x1]), start, psf=small,
                                      tol=REFINE_TOL * spacing, max_iter=6)
    except (LatticeNotFound, ReconstructionError, FrameError) as exc:
        notes["vectors_model_fit"] = {**record, "kept": False, "failed": str(exc)}
        return geometry
    problems = [w for w in fitted.quality.warnings if not w.startswith(PRECISION_WARNING)]
    # how far the fit moved the farthest atom's site (the two fits agree within a few sigma)
    far_sites = far / max(float(geometry.quality.spacing_sigma), 1e-12)
    moved = float(np.max(np.abs(fitted.basis - geometry.basis))) * far_sites * np.sqrt(2) / spacing
    if problems or moved > 0.25:
        notes["vectors_model_fit"] = {**record, "kept": False,
                                      "failed": "; ".join(problems) or f"it moved far sites by {moved:.2f} spacing"}
        return geometry
    result = canonical_geometry(fitted.with_offset(tuple(np.asarray(fitted.offset) + shift)))
    notes["vectors_model_fit"] = {**record, "kept": True, "before": [list(geometry.a1), list(geometry.a2)],
                                  "n_frames": 1, "sigma_px": float(fitted.quality.residual),
                                  "spacing_sigma": float(fitted.quality.spacing_sigma)}
    return result


def _geometry_check(clean, geometry: LatticeGeometry, psf: PSFModel, *, max_frames: int = 8, distortion=None):
    """Does the lattice explain where the single atoms of the first frames are? (None: too few atoms)."""
    from latticeread.core.atoms import check_geometry, locate_atoms

    frames = clean[:max_frames]
    atoms = locate_atoms(frames, fwhm=psf.fwhm)
    if distortion is not None and distortion.applied and len(atoms):
        x, y = distortion.unplace(atoms.x, atoms.y)
        atoms = dataclasses.replace(atoms, x=x, y=y)
    offsets = _offsets_from_atoms(frames, geometry, psf=psf, atoms=atoms)
    check = check_geometry(atoms, geometry, offsets=offsets)
    return None if not np.isfinite(check.max_deviation) else check


def _refine_vectors(clean, geometry, *, psf, n_fit, notes, warnings: list) -> LatticeGeometry:
    """Vectors from a joint image-model fit of the first frames; the start when it fails."""
    from latticeread.core.lattice import refine_phase
    from latticeread.core.lattice_model import PRECISION_WARNING, refine_lattice_model

    k = max(1, min(int(n_fit), len(clean)))
    try:
        offsets = [refine_phase(frame, geometry).offset for frame in clean[:k]]
        fitted = refine_lattice_model(clean[:k], geometry.with_offset(offsets[0]), psf=psf, offsets=offsets)
    except (LatticeNotFound, ReconstructionError, FrameError) as exc:
        warnings.append(f"the image-model fit of the lattice vectors failed ({exc}); kept the first estimate")
        return geometry
    problems = [w for w in fitted.quality.warnings if not w.startswith(PRECISION_WARNING)]
    if problems:
        warnings.extend(problems)
        warnings.append("kept the first lattice estimate: the image-model fit was not clean")
        return geometry
    warnings.extend(w for w in fitted.quality.warnings if w.startswith(PRECISION_WARNING))
    notes["vectors_model_fit"] = {"before": [list(geometry.a1), list(geometry.a2)], "n_frames": k,
                                  "sigma_px": float(fitted.quality.residual),
                                  "spacing_sigma": float(fitted.quality.spacing_sigma)}
    from latticeread.core.lattice import canonical_geometry

    return canonical_geometry(fitted)


def _estimate_geometry(stack, estimate_lattice) -> LatticeGeometry:
    """Lattice from the summed stack and from a few single frames; the clearest Fourier peaks win.

    The vectors are stable from shot to shot but the phase may jitter, which blurs the summed
    stack's peaks; a single sparse frame can show stronger diagonal peaks than the primitive
    ones. Trying both and keeping the largest peak-to-background ratio avoids either trap.
    """
    tries = [stack] + [stack[i] for i in np.unique(np.linspace(0, len(stack) - 1, 4).round().astype(int))]
    found, failures = [], []
    for image in tries:
        try:
            found.append(estimate_lattice(image))
        except LatticeNotFound as exc:
            failures.append(str(exc))
    if not found:
        raise LatticeNotFound(f"no lattice found in the calibration frames: {failures[0]}")
    return max(found, key=lambda g: (g.quality.is_reliable, g.quality.peak_to_background))


def _check_region(rec: Reconstructor, notes: dict, warnings: list) -> None:
    """Refuse a region that leaves most of the light outside; note how well the model explains the frames."""
    checks = getattr(rec, "checks", [])
    if not checks:
        return
    med = {key: float(np.nanmedian([getattr(c, key) for c in checks])) if any(
        np.isfinite(getattr(c, key)) for c in checks) else float("nan")
        for key in ("outside_fraction", "residual_ratio", "explained_fraction")}
    notes["model_check"] = med
    frac = med["outside_fraction"]
    bounds = rec.index_bounds
    where = f"sites {bounds[0]}..{bounds[1]} x {bounds[2]}..{bounds[3]}" if bounds else "the frame"
    if frac > OUTSIDE_REFUSE:
        raise CalibrationError(f"{100 * frac:.0f} % of the light above background lies outside the analysed region "
                               f"({where}) in the calibration frames: the region misses most of the atoms (bright "
                               "artefacts, a second cloud?); check the frames or give the region")
    if frac > OUTSIDE_WARN:
        warnings.append(f"{100 * frac:.0f} % of the light above background lies outside the analysed region "
                        f"({where}) in the calibration frames")
    if np.isfinite(med["residual_ratio"]) and med["residual_ratio"] > RESIDUAL_WARN:
        warnings.append(f"the image model leaves residuals {med['residual_ratio']:.1f} times the camera's expected "
                        "noise in the calibration frames (wrong PSF, background or camera description?)")
    if np.isfinite(med["explained_fraction"]) and med["explained_fraction"] < EXPLAINED_WARN:
        warnings.append(f"the site model accounts for only {100 * med['explained_fraction']:.0f} % of the bright "
                        "light in the calibration frames")


def _pooled(rec: Reconstructor, frames, *, atoms: bool = False):
    amps, flags, warnings, fitted = [], [], [], []
    rec.checks = []
    for i, frame in enumerate(frames):
        _, amp, warn = rec.extract_full(frame, where=f"calibration frame {i}")
        amps.append(amp.amplitudes)
        flags.append(amp.flags)
        # the calibration summarises cosmic-ray hits and the image-model checks instead of one line per frame
        warnings.extend(w for w in warn if not w.startswith((ARTEFACT_WARNING, MODEL_WARNING)))
        if rec.last_check is not None:
            rec.checks.append(rec.last_check)
        if atoms and amp.method == "nonlinear" and getattr(rec.basis, "last_atom_photons", None):
            fitted.append(float(rec.basis.last_atom_photons))
    out = (np.concatenate(amps), np.concatenate(flags), sorted(set(warnings)))
    return out + (fitted,) if atoms else out


def _scan_atom(rec: Reconstructor, frames, atom: float) -> float:
    """Photons of one atom minimising the binary-fit residual summed over ``frames``."""
    candidates = atom * np.linspace(0.5, 1.25, 16)
    energy = np.zeros(candidates.size)
    for frame in frames:
        image = rec._check(frame, "calibration frame")
        photons = rec.camera.counts_to_photons(image)
        geometry, _, _ = rec._frame_geometry(photons)
        for i, a in enumerate(candidates):
            energy[i] += rec.basis.binary_energy(photons, atom_photons=a, offset=geometry.offset)
    k = int(np.argmin(energy))
    if 0 < k < candidates.size - 1:  # parabola through the minimum and its neighbours
        e0, e1, e2 = energy[k - 1:k + 2]
        denom = e0 - 2 * e1 + e2
        step = candidates[1] - candidates[0]
        if denom > 0:
            return float(candidates[k] + 0.5 * step * (e0 - e2) / denom)
    return float(candidates[k])


def _bright_region(stack, *, geometry: LatticeGeometry, psf: PSFModel):
    """Index bounds of the sites under the bright part of the mean frame (a cheap first cut).

    The mean frame (photons) is smoothed over a few sites; pixels more than 5 robust standard
    deviations of the smoothed frame above its median count as lit, and patches of at least
    ten lattice cells are kept. Without this cut a large frame would put every site of the
    whole frame into the first least-squares fit.
    """
    from scipy import ndimage

    mean = stack.mean(axis=0)
    # smooth over a few sites so that camera noise (heavy-tailed for an EMCCD) averages out
    sigma = 1.5 * max(psf.fwhm, max(geometry.spacings))
    smooth = ndimage.gaussian_filter(mean, sigma)
    med = np.median(smooth)
    mad = 1.4826 * np.median(np.abs(smooth - med))
    if not np.isfinite(mad) or mad <= 0:
        return None
    lit = smooth > med + 5 * mad
    labels, n = ndimage.label(lit)
    if n == 0:
        return None
    sizes = np.bincount(labels.ravel())[1:]
    big = np.flatnonzero(sizes >= 10 * geometry.cell_area) + 1  # patches of at least ten sites
    if big.size == 0:
        return None
    yy, xx = np.nonzero(np.isin(labels, big))
    r, c = geometry.fractional_indices(xx.astype(float), yy.astype(float))
    m = REGION_MARGIN + 1
    return (int(np.floor(r.min())) - m, int(np.ceil(r.max())) + m, int(np.floor(c.min())) - m,
            int(np.ceil(c.max())) + m)


def _active_sites(sites: SiteGrid, amplitudes, threshold: float):
    """Sites that held an atom in any frame, and their 8 neighbours (None if fewer than 50)."""
    from scipy import ndimage

    seen = sites.to_matrix(np.any(amplitudes > threshold, axis=0), fill=False, dtype=bool)
    grown = ndimage.binary_dilation(seen, structure=np.ones((3, 3), bool))
    active = sites.from_matrix(grown)
    if active.sum() < 50 or active.all():
        return None
    return active


def _atom_region(sites: SiteGrid, amplitudes, threshold: float):
    """Index bounds of the sites that held an atom in any frame, widened by REGION_MARGIN."""
    seen = np.any(amplitudes > threshold, axis=0)
    if seen.sum() < 2:
        return None
    r, c = sites.rows[seen], sites.cols[seen]
    m = REGION_MARGIN
    bounds = (int(r.min()) - m, int(r.max()) + m, int(c.min()) - m, int(c.max()) + m)
    full = (int(sites.rows.min()), int(sites.rows.max()), int(sites.cols.min()), int(sites.cols.max()))
    if bounds[0] <= full[0] and bounds[1] >= full[1] and bounds[2] <= full[2] and bounds[3] >= full[3]:
        return None
    return bounds
