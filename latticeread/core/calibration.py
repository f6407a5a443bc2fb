"""Everything needed to reconstruct frames of one experimental setting.

A :class:`Calibration` bundles the lattice geometry (vectors stable from shot to shot; the
offset is re-found per frame), the point-spread function, the camera description, the
occupancy threshold and the frame shape it was made for, together with the typed settings
that change results:

* :class:`ReconstructionOptions` -- pixel weighting, the site index bounds, the photons of
  one atom (binary refinement), the reference image of the camera weighting, how the
  lattice offset is re-found in each frame;
* :class:`ThresholdPolicy` (read with :attr:`Calibration.threshold_policy`) -- a fixed
  threshold, or one chosen from the pooled histogram of each stack, or one per frame, and
  the histogram method; the stored histogram fit (:attr:`Calibration.threshold_fit`) gives
  the posteriors;
* :class:`FramePolicy` -- what NaN and saturated pixels do (flag their sites, or fail the
  frame) in every front end;
* :class:`~latticeread.core.distortion.DistortionField` (optional) -- lens distortion: where
  the sites sit off the perfect lattice;
* :class:`~latticeread.core.brightness.BrightnessMap` (optional) -- the relative brightness
  of one atom across the field, used when classifying.

All of them take part in equality and are saved, so two calibrations that would give
different results never compare equal. ``notes`` is provenance only (source files, fit
diagnostics) and is left out of equality. It converts to and from plain dicts (format
version 2; version 1, which kept the settings in ``notes``, still loads); JSON files are
written by :mod:`latticeread.io`.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from latticeread import __version__
from latticeread.core.brightness import BrightnessMap
from latticeread.core.camera import CameraModel
from latticeread.core.classify import ThresholdResult
from latticeread.core.distortion import DistortionField
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import PSFModel
from latticeread.core.psf_zones import ZonePSFs
from latticeread.core.region import SiteRegion
from latticeread.errors import CalibrationError, ReconstructionError

__all__ = ["Calibration", "ReconstructionOptions", "ReferenceImage", "ThresholdPolicy", "FramePolicy",
           "DistortionField", "BrightnessMap", "FORMAT_VERSION", "THRESHOLD_KINDS", "THRESHOLD_METHODS", "PIXEL_POLICIES", "DEFAULT_THRESHOLD_SCOPE"]

_REQUIRED = ("geometry", "psf", "camera", "frame_shape")

#: Calibration dict/file format written by :meth:`Calibration.to_dict` (1 is still read).
FORMAT_VERSION = 2
#: Where the threshold comes from: the calibration's value, the pooled histogram of each
#: stack, or each frame's own histogram.
THRESHOLD_KINDS = ("fixed", "pooled", "per_frame")
#: Histogram methods that choose a threshold (:func:`latticeread.core.classify.select_threshold`).
THRESHOLD_METHODS = ("mixture", "otsu", "minimum")
#: What a NaN / saturated pixel does: flag the sites that rely on it, or fail the frame.
PIXEL_POLICIES = ("flag", "fail")
#: The threshold policy of a calibration without a fixed threshold, in every front end.
DEFAULT_THRESHOLD_SCOPE = "pooled"
_BACKGROUNDS = ("constant", "plane", "poly2", "poly3")
_WEIGHTINGS = ("none", "camera")
_PHASE_METHODS = ("atoms", "model", "fourier")
#: Settings that format version 1 kept in ``notes``.
_V1_NOTE_KEYS = ("weighting", "index_bounds", "photons_per_atom", "reference_photons", "threshold_result")


@dataclass(frozen=True, eq=False)
class ReferenceImage:
    """Mean photon image of the calibration frames, stored as block means (camera weighting).

    Attributes
    ----------
    block : int
        Side of the square blocks, pixels.
    shape : (int, int)
        ``(height, width)`` of the full frame, pixels.
    values : (ceil(H/block), ceil(W/block)) ndarray of float
        Mean photons per pixel in each block.
    n_frames : int
        Frames averaged.
    """

    block: int
    shape: tuple[int, int]
    values: np.ndarray = field(repr=False)
    n_frames: int = 0

    def __post_init__(self):
        values = np.asarray(self.values, dtype=float)
        shape = tuple(int(s) for s in self.shape)
        block = int(self.block)
        if len(shape) != 2 or values.ndim != 2 or block < 1 or \
                values.shape != (-(-shape[0] // block), -(-shape[1] // block)):
            raise CalibrationError("the reference image for camera weighting does not match its frame shape; "
                                   "recalibrate with --weighting camera")
        values = values.copy()
        values.setflags(write=False)
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "block", block)
        object.__setattr__(self, "n_frames", int(self.n_frames))

    def __eq__(self, other) -> bool:
        if not isinstance(other, ReferenceImage):
            return NotImplemented
        return (self.block == other.block and self.shape == other.shape and self.n_frames == other.n_frames
                and np.array_equal(self.values, other.values))

    __hash__ = None  # type: ignore[assignment]

    def image(self) -> np.ndarray:
        """The full-size (H, W) mean photon image (each block's mean repeated over its pixels)."""
        h, w = self.shape
        return np.repeat(np.repeat(self.values, self.block, axis=0), self.block, axis=1)[:h, :w]

    def to_dict(self) -> dict:
        return {"block": self.block, "shape": list(self.shape), "values": self.values.tolist(),
                "n_frames": self.n_frames}

    @classmethod
    def from_dict(cls, data) -> "ReferenceImage":
        try:
            return cls(block=int(data["block"]), shape=tuple(int(v) for v in data["shape"]),
                       values=np.asarray(data["values"], dtype=float), n_frames=int(data.get("n_frames", 0)))
        except (KeyError, TypeError, ValueError) as exc:
            raise CalibrationError(f"the calibration's reference image for camera weighting is malformed ({exc}); "
                                   "recalibrate with --weighting camera") from exc


def _optional_positive(value, name: str) -> float | None:
    if value is None:
        return None
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise CalibrationError(f"{name} must be a positive number of photons or null, got {value!r}")
    return v


@dataclass(frozen=True)
class ReconstructionOptions:
    """Settings of the per-frame reconstruction that change its results.

    Attributes
    ----------
    weighting : {"none", "camera"}
        Pixel weights of the least-squares amplitude fit: every pixel the same, or the
        inverse camera-noise variance at :attr:`reference`
        (:class:`latticeread.core.pipeline.Reconstructor`).
    index_bounds : (row_min, row_max, col_min, col_max) or None
        Site indices reconstructed (inclusive); None = every site whose centre lies in the frame.
    photons_per_atom : float or None
        Detected photons of one atom (the binary refinement's brightness); None = unknown.
    reference : ReferenceImage or None
        Mean photon image for ``weighting="camera"``.
    phase_method : {"atoms", "model", "fourier"}
        How the lattice offset is re-found in each frame (see
        :class:`latticeread.core.pipeline.Reconstructor`).
    refit_phase : bool
        Re-find the lattice offset in every frame (True) or use the calibration's offset.
    hot_pixels : tuple of (row, col)
        Pixels left out of every fit (hot pixels found in the calibration stack,
        :func:`latticeread.core.artefacts.find_hot_pixels`); their sites are flagged ARTEFACT.
    region : SiteRegion
        The analysed region (shapes in pixels, masked areas, excluded sites;
        :mod:`latticeread.core.region`); sites outside it are fitted but left out of the
        results. The default analyses every site.
    background : {"constant", "plane", "poly2", "poly3"}
        Background fitted with the sites in every frame: a constant, or a smooth polynomial
        surface of degree 1-3 (gradients and broad humps of stray light that change from frame
        to frame; :class:`latticeread.core.amplitudes.SiteBasis`).
    """

    weighting: str = "none"
    index_bounds: tuple[int, int, int, int] | None = None
    photons_per_atom: float | None = None
    reference: ReferenceImage | None = None
    phase_method: str = "model"
    refit_phase: bool = True
    hot_pixels: tuple = ()
    region: SiteRegion = field(default_factory=SiteRegion)
    background: str = "constant"

    def __post_init__(self):
        if self.background not in _BACKGROUNDS:
            raise CalibrationError(f"unknown background model {self.background!r}; use one of "
                                   f"{', '.join(repr(b) for b in _BACKGROUNDS)}")
        if self.weighting not in _WEIGHTINGS:
            raise CalibrationError(f"unknown pixel weighting {self.weighting!r}; use 'none' (every pixel counts the "
                                   "same) or 'camera' (inverse camera-noise variance)")
        if self.phase_method not in _PHASE_METHODS:
            raise CalibrationError(f"unknown phase method {self.phase_method!r}; use 'atoms', 'model' or 'fourier'")
        bounds = self.index_bounds
        if bounds is not None:
            try:
                bounds = tuple(int(v) for v in bounds)
            except (TypeError, ValueError) as exc:
                raise CalibrationError(f"index bounds must be four whole numbers, got {self.index_bounds!r}") from exc
            if len(bounds) != 4 or bounds[0] > bounds[1] or bounds[2] > bounds[3]:
                raise CalibrationError(f"index bounds must be (row_min, row_max, col_min, col_max) with min <= max, "
                                       f"got {self.index_bounds!r}")
        object.__setattr__(self, "index_bounds", bounds)
        object.__setattr__(self, "photons_per_atom", _optional_positive(self.photons_per_atom, "photons per atom"))
        object.__setattr__(self, "refit_phase", bool(self.refit_phase))
        try:
            hot = tuple((int(r), int(c)) for r, c in (self.hot_pixels or ()))
        except (TypeError, ValueError) as exc:
            raise CalibrationError(f"hot pixels must be [row, col] pairs, got {self.hot_pixels!r}") from exc
        object.__setattr__(self, "hot_pixels", hot)
        if self.reference is not None and not isinstance(self.reference, ReferenceImage):
            object.__setattr__(self, "reference", ReferenceImage.from_dict(self.reference))
        if not isinstance(self.region, SiteRegion):
            object.__setattr__(self, "region", SiteRegion.from_dict(self.region))

    def replace(self, **changes) -> "ReconstructionOptions":
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        return {"weighting": self.weighting,
                "index_bounds": None if self.index_bounds is None else list(self.index_bounds),
                "photons_per_atom": self.photons_per_atom,
                "reference": None if self.reference is None else self.reference.to_dict(),
                "phase_method": self.phase_method, "refit_phase": self.refit_phase,
                "hot_pixels": [list(p) for p in self.hot_pixels],
                # written only when set, so files without a region stay readable by older versions
                **({} if self.region.is_everything else {"region": self.region.to_dict()}),
                **({} if self.background == "constant" else {"background": self.background})}

    @classmethod
    def from_dict(cls, data: dict) -> "ReconstructionOptions":
        if not isinstance(data, dict):
            raise CalibrationError(f"reconstruction options must be an object, got {type(data).__name__}")
        unknown = set(data) - {f.name for f in dataclasses.fields(cls)}
        if unknown:
            raise CalibrationError(f"unknown reconstruction option(s) {', '.join(sorted(unknown))}")
        ref = data.get("reference")
        return cls(**{**data, "reference": None if ref is None else ReferenceImage.from_dict(ref)})


@dataclass(frozen=True)
class ThresholdPolicy:
    """Where the occupancy threshold comes from.

    Attributes
    ----------
    kind : {"fixed", "pooled", "per_frame"}
        ``"fixed"``: :attr:`value` for every frame. ``"pooled"`` (the default without a fixed
        value): one threshold from the histogram of every frame of a stack (one input file)
        together, so a frame's result does not depend on which front end read the stack.
        ``"per_frame"``: each frame's own histogram.
    method : {"mixture", "otsu", "minimum"}
        Histogram method for ``"pooled"`` and ``"per_frame"``.
    value : float or None
        The fixed threshold in photons (``kind="fixed"`` only).
    """

    kind: str = DEFAULT_THRESHOLD_SCOPE
    method: str = "mixture"
    value: float | None = None

    def __post_init__(self):
        if self.kind not in THRESHOLD_KINDS:
            raise CalibrationError(f"unknown threshold policy {self.kind!r}; use one of {', '.join(THRESHOLD_KINDS)}")
        if self.method not in THRESHOLD_METHODS:
            raise CalibrationError(f"unknown threshold method {self.method!r}; use one of "
                                   f"{', '.join(THRESHOLD_METHODS)}")
        if self.kind == "fixed":
            if self.value is None or not math.isfinite(float(self.value)):
                raise CalibrationError(f"a fixed threshold needs a finite number of photons, got {self.value!r}")
            object.__setattr__(self, "value", float(self.value))
        elif self.value is not None:
            raise CalibrationError(f"a {self.kind} threshold is chosen from the histogram; it takes no value "
                                   f"(got {self.value!r})")

    def describe(self) -> str:
        """One line for the terminal, the status bar and exports."""
        if self.kind == "fixed":
            return f"fixed at {self.value:.1f} photons"
        where = "the pooled histogram of each stack" if self.kind == "pooled" else "each frame's own histogram"
        return f"{self.method} fit on {where}"


@dataclass(frozen=True)
class FramePolicy:
    """What NaN/inf and saturated pixels do, the same in every front end.

    Attributes
    ----------
    nonfinite : {"flag", "fail"}
        ``"flag"`` (default): the pixel is left out of the fit and every site that relies on
        it carries the NONFINITE flag. ``"fail"``: the frame fails with a FrameError.
    saturated : {"flag", "fail"}
        The same for pixels at the camera's saturation value (flag SATURATED).
    """

    nonfinite: str = "flag"
    saturated: str = "flag"

    def __post_init__(self):
        for name in ("nonfinite", "saturated"):
            if getattr(self, name) not in PIXEL_POLICIES:
                raise CalibrationError(f"unknown {name} pixel policy {getattr(self, name)!r}; use 'flag' (flag the "
                                       "sites that rely on them) or 'fail' (fail the frame)")

    def to_dict(self) -> dict:
        return {"nonfinite": self.nonfinite, "saturated": self.saturated}

    @classmethod
    def from_dict(cls, data: dict) -> "FramePolicy":
        if not isinstance(data, dict):
            raise CalibrationError(f"the frame policy must be an object, got {type(data).__name__}")
        unknown = set(data) - {"nonfinite", "saturated"}
        if unknown:
            raise CalibrationError(f"unknown frame policy entr(ies) {', '.join(sorted(unknown))}")
        return cls(**data)


def _fit_key(fit: ThresholdResult | None):
    """Comparable form of a threshold fit (NaN equal to NaN)."""
    return None if fit is None else tuple(sorted((k, repr(v)) for k, v in fit.to_dict().items()))


def _fit_from(value) -> ThresholdResult | None:
    if value is None or isinstance(value, ThresholdResult):
        return value
    try:
        return ThresholdResult.from_dict(value)
    except (ReconstructionError, TypeError, ValueError, AttributeError) as exc:
        raise CalibrationError(f"the calibration's stored threshold fit is malformed: {exc}") from exc


def _migrate_notes(notes: dict) -> tuple[dict, dict]:
    """Split format-1 settings out of ``notes``: (options keyword arguments, remaining notes)."""
    notes = dict(notes)
    moved: dict = {}
    if "weighting" in notes:
        moved["weighting"] = notes.pop("weighting")
    if "index_bounds" in notes:
        moved["index_bounds"] = notes.pop("index_bounds")
    if "photons_per_atom" in notes:
        atom = notes.pop("photons_per_atom")
        moved["photons_per_atom"] = atom if atom is not None and math.isfinite(float(atom)) and atom > 0 else None
    if "reference_photons" in notes:
        moved["reference"] = ReferenceImage.from_dict(notes.pop("reference_photons"))
    if "threshold_result" in notes:
        stored = notes.pop("threshold_result")
        try:  # a damaged fit of an old file only loses the posteriors' components, not the threshold
            moved["threshold_fit"] = _fit_from(stored)
        except CalibrationError:
            moved["threshold_fit"] = None
    return moved, notes


@dataclass(frozen=True, eq=False)
class Calibration:
    """Geometry, PSF, camera, threshold and reconstruction settings for one imaging setting.

    Attributes
    ----------
    geometry : LatticeGeometry
        Lattice vectors (pixels) and a reference offset.
    psf : PSFModel
        Image of one atom.
    camera : CameraModel
        Counts-to-photons conversion and noise model.
    frame_shape : (int, int)
        ``(height, width)`` in pixels of the frames this calibration was made from.
    threshold : float or None
        Fixed occupancy threshold on the site amplitude in photons; None = choose it from the
        histogram as :attr:`threshold_scope` says.
    threshold_method : str
        How the threshold is chosen when it is not fixed ("mixture", "otsu", "minimum").
    amplitude_method : str
        "linear" (default least-squares projection), "nonlinear", "wiener" or "richardson_lucy".
    pixel_size_nm : float or None
        Camera pixel projected into the atom plane, nanometres (for lengths in nm).
    options : ReconstructionOptions
        Weighting, index bounds, photons per atom, reference image, offset refit.
    threshold_scope : {"pooled", "per_frame"}
        Histogram the threshold is chosen on when :attr:`threshold` is None
        (:data:`DEFAULT_THRESHOLD_SCOPE`, see :class:`ThresholdPolicy`).
    threshold_fit : ThresholdResult or None
        The histogram fit behind the threshold (its components give the posteriors).
    frame_policy : FramePolicy
        What NaN and saturated pixels do.
    distortion : DistortionField or None
        Lens distortion of the site positions (None = a perfect lattice; a field that is not
        ``applied`` leaves the sites on the perfect lattice too).
    brightness : BrightnessMap or None
        Relative brightness of an atom across the field (None or not ``applied`` = uniform).
    psf_zones : ZonePSFs or None
        PSFs measured in zones of the field and blended between them (None or not ``applied``
        = ``psf`` everywhere); :func:`latticeread.core.psf_zones.estimate_zone_psfs`.
    notes : dict
        Provenance only (source files, fit diagnostics, warnings); not compared. Settings
        given here in the format-1 way (``weighting``, ``index_bounds``,
        ``photons_per_atom``, ``reference_photons``, ``threshold_result``) are moved into
        the typed fields above when they are still unset.
    """

    geometry: LatticeGeometry
    psf: PSFModel
    camera: CameraModel = field(default_factory=CameraModel)
    frame_shape: tuple[int, int] = (0, 0)
    threshold: float | None = None
    threshold_method: str = "mixture"
    amplitude_method: str = "linear"
    pixel_size_nm: float | None = None
    options: ReconstructionOptions = field(default_factory=ReconstructionOptions)
    threshold_scope: str = DEFAULT_THRESHOLD_SCOPE
    threshold_fit: ThresholdResult | None = None
    frame_policy: FramePolicy = field(default_factory=FramePolicy)
    distortion: DistortionField | None = None
    brightness: BrightnessMap | None = None
    psf_zones: ZonePSFs | None = None
    notes: dict = field(default_factory=dict)

    def __post_init__(self):
        notes = self.notes if isinstance(self.notes, dict) else {}
        if any(k in notes for k in _V1_NOTE_KEYS):
            moved, notes = _migrate_notes(notes)
            fit = moved.pop("threshold_fit", None)
            defaults = ReconstructionOptions()
            unset = {k: v for k, v in moved.items() if getattr(self.options, k) == getattr(defaults, k)}
            if unset:
                object.__setattr__(self, "options", self.options.replace(**unset))
            if self.threshold_fit is None and fit is not None:
                object.__setattr__(self, "threshold_fit", fit)
        object.__setattr__(self, "notes", dict(notes))
        object.__setattr__(self, "threshold_fit", _fit_from(self.threshold_fit))
        if self.threshold_scope not in ("pooled", "per_frame"):
            raise CalibrationError(f"unknown threshold scope {self.threshold_scope!r}; use 'pooled' or 'per_frame'")
        if self.threshold is not None:
            object.__setattr__(self, "threshold", float(self.threshold))
        if isinstance(self.distortion, dict):
            object.__setattr__(self, "distortion", DistortionField.from_dict(self.distortion))
        elif self.distortion is not None and not isinstance(self.distortion, DistortionField):
            raise CalibrationError(f"distortion must be a DistortionField or None, got {type(self.distortion).__name__}")
        if isinstance(self.brightness, dict):
            object.__setattr__(self, "brightness", BrightnessMap.from_dict(self.brightness))
        elif self.brightness is not None and not isinstance(self.brightness, BrightnessMap):
            raise CalibrationError(f"brightness must be a BrightnessMap or None, got {type(self.brightness).__name__}")
        if isinstance(self.psf_zones, dict):
            try:
                object.__setattr__(self, "psf_zones", ZonePSFs.from_dict(self.psf_zones))
            except (KeyError, TypeError, ValueError) as exc:
                raise CalibrationError(f"the calibration's zone PSFs (psf_zones) are malformed: {exc}") from exc
        elif self.psf_zones is not None and not isinstance(self.psf_zones, ZonePSFs):
            raise CalibrationError(f"psf_zones must be ZonePSFs or None, got {type(self.psf_zones).__name__}")

    def _key(self) -> tuple:
        return (self.geometry, self.psf, self.camera, tuple(int(s) for s in self.frame_shape), self.threshold,
                self.threshold_method, self.amplitude_method, self.pixel_size_nm, self.options, self.threshold_scope,
                _fit_key(self.threshold_fit), self.frame_policy, self.distortion, self.brightness,
                None if self.psf_zones is None else repr(self.psf_zones.to_dict()))

    def __eq__(self, other) -> bool:
        if not isinstance(other, Calibration):
            return NotImplemented
        return self._key() == other._key()

    __hash__ = None  # type: ignore[assignment]

    def replace(self, **changes) -> "Calibration":
        return dataclasses.replace(self, **changes)

    @property
    def threshold_policy(self) -> ThresholdPolicy:
        """Where the threshold comes from (fixed / pooled / per frame, and the method)."""
        if self.threshold is not None:
            return ThresholdPolicy("fixed", self.threshold_method, self.threshold)
        return ThresholdPolicy(self.threshold_scope, self.threshold_method)

    def with_threshold_policy(self, policy: ThresholdPolicy) -> "Calibration":
        """The same calibration with another threshold policy (a fixed one keeps its scope)."""
        if not isinstance(policy, ThresholdPolicy):
            raise TypeError(f"expected a ThresholdPolicy, got {type(policy).__name__}")
        if policy.kind == "fixed":
            return self.replace(threshold=policy.value, threshold_method=policy.method)
        return self.replace(threshold=None, threshold_method=policy.method, threshold_scope=policy.kind)

    def with_options(self, **changes) -> "Calibration":
        """The same calibration with some :class:`ReconstructionOptions` changed."""
        return self.replace(options=self.options.replace(**changes))

    def check_frame_shape(self, shape, *, where: str = "the frame") -> None:
        """Raise CalibrationError when ``shape`` differs from the calibrated frame shape."""
        shape = tuple(int(s) for s in shape[-2:])
        if tuple(self.frame_shape) != (0, 0) and shape != tuple(self.frame_shape):
            raise CalibrationError(
                f"{where} is {shape[0]}x{shape[1]} pixels but the calibration was made for "
                f"{self.frame_shape[0]}x{self.frame_shape[1]}; recalibrate or crop the frames")

    def to_dict(self) -> dict:
        return {
            "format": "latticeread-calibration",
            "format_version": FORMAT_VERSION,
            "program_version": __version__,
            "geometry": self.geometry.to_dict(),
            "psf": self.psf.to_dict(),
            "camera": self.camera.to_dict(),
            "frame_shape": [int(s) for s in self.frame_shape],
            "threshold": None if self.threshold is None else float(self.threshold),
            "threshold_method": self.threshold_method,
            "threshold_scope": self.threshold_scope,
            "threshold_fit": None if self.threshold_fit is None else self.threshold_fit.to_dict(),
            "amplitude_method": self.amplitude_method,
            "pixel_size_nm": self.pixel_size_nm,
            "reconstruction": self.options.to_dict(),
            "frame_policy": self.frame_policy.to_dict(),
            "distortion": None if self.distortion is None else self.distortion.to_dict(),
            "brightness": None if self.brightness is None else self.brightness.to_dict(),
            "psf_zones": None if self.psf_zones is None else self.psf_zones.to_dict(),
            "notes": self.notes,
        }

    @classmethod
    def from_dict(cls, data: dict) -> "Calibration":
        """Read format version 2, or version 1 (settings in ``notes``, moved to the typed fields)."""
        if not isinstance(data, dict):
            raise CalibrationError(f"a calibration must be a JSON object, got {type(data).__name__}")
        missing = [k for k in _REQUIRED if k not in data]
        if missing:
            raise CalibrationError(f"calibration is missing the key(s) {', '.join(missing)}")
        version = data.get("format_version", 1)
        try:
            geometry = LatticeGeometry.from_dict(data["geometry"])
            psf = PSFModel.from_dict(data["psf"])
            camera = CameraModel.from_dict(data["camera"])
            shape = tuple(int(s) for s in data["frame_shape"])
            if len(shape) != 2:
                raise ValueError(f"frame_shape must have two entries, got {shape}")
            threshold = data.get("threshold")
            threshold = None if threshold is None else float(threshold)
            pixel = data.get("pixel_size_nm")
            notes = dict(data.get("notes") or {})
            if version >= 2:
                options = ReconstructionOptions.from_dict(data.get("reconstruction") or {})
                frame_policy = FramePolicy.from_dict(data.get("frame_policy") or {})
                fit = data.get("threshold_fit")
                scope = str(data.get("threshold_scope", DEFAULT_THRESHOLD_SCOPE))
            else:  # version 1: the settings travelled in notes; __post_init__ moves them
                options, frame_policy, fit, scope = ReconstructionOptions(), FramePolicy(), None, \
                    DEFAULT_THRESHOLD_SCOPE
            return cls(
                geometry=geometry, psf=psf, camera=camera, frame_shape=shape, threshold=threshold,
                threshold_method=str(data.get("threshold_method", "mixture")),
                amplitude_method=str(data.get("amplitude_method", "linear")),
                pixel_size_nm=None if pixel is None else float(pixel),
                options=options, threshold_scope=scope, threshold_fit=fit, frame_policy=frame_policy,
                distortion=data.get("distortion"), brightness=data.get("brightness"),
                psf_zones=data.get("psf_zones"), notes=notes,
            )
        except CalibrationError:
            raise
        except (KeyError, TypeError, ValueError) as exc:
            raise CalibrationError(f"calibration has a malformed entry: {type(exc).__name__}: {exc}") from exc
