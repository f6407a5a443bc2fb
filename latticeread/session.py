"""The shared session model: frames, calibration, per-frame results, fidelity, settings.

No widget code lives here; the desktop program observes a :class:`Session` through its
psygnal signals and changes it only through its methods. Everything numerical goes through
the core (:mod:`latticeread.core.pipeline`, :mod:`~latticeread.core.lattice`,
:mod:`~latticeread.core.classify`, :mod:`~latticeread.core.psf_estimate`,
:mod:`~latticeread.core.fidelity`), so the program and the command line give the same numbers.

Dependencies between the stored results
---------------------------------------
``frames -> calibration (geometry, PSF, camera) -> amplitudes -> occupations -> fidelity``.

* Loading frames drops every stored result; the calibration is kept only when it was made for
  the same frame size (otherwise it is dropped with a status message).
* Changing the geometry, the PSF, the camera or the amplitude method drops the amplitudes
  (and everything after them).
* Changing the threshold or the threshold method re-classifies the stored amplitudes with
  :func:`latticeread.core.classify.classify` only; no amplitude is recomputed.

Long computations are split into a *job* (a generator function that only reads a snapshot of
the session and may run on any thread) and a *store* method that applies its output on the
thread that owns the session. A job remembers the generation of the calibration it was made
for; the store methods drop output that belongs to an older generation (a stale request).

Signals (each emitted only when the value really changed)
--------------------------------------------------------
frames_changed(object)            the frame stack (or None)
index_changed(int)                current frame index
calibration_changed(object)       Calibration (or None)
calibration_origin_changed(object) CalibrationOrigin: where the calibration in use came from
amplitudes_changed(object)        tuple of frame indices whose amplitudes were stored; () = cleared
classification_changed()          occupations changed (new threshold or new amplitudes)
threshold_result_changed(object)  ThresholdResult (or None)
fidelity_changed(object)          FidelityReport (or None)
settings_changed(dict)            the full settings dict after a change
undo_changed(bool, bool)          (can undo, can redo)
modified_changed(bool)            unsaved changes exist
message(str)                      what the session just did, for a status bar
"""

from __future__ import annotations

import dataclasses
import json
import logging
import threading
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np
from psygnal import Signal

from latticeread import __version__
from latticeread.errors import (CalibrationError, ExportError, FrameError, FrameFileError, LatticeReadError,
                                ReconstructionError)
from latticeread.pooled_stats import PooledStats, posterior_key, threshold_value

__all__ = ["Session", "DEFAULT_SETTINGS", "ReconstructBatch", "CalibrationOrigin"]

log = logging.getLogger(__name__)

#: ``PooledStats.components`` of counts made with each frame's own threshold fit
PER_FRAME_KEY = ("per_frame",)

#: Largest number of pooled amplitudes for which the background threshold fit also keeps a
#: per-site sorted copy (float64, 8 bytes each) so a threshold drag re-counts by binary search.
SORTED_INDEX_MAX_AMPLITUDES = 50_000_000

#: User settings with their defaults (optics in nanometres, counts for the camera).
DEFAULT_SETTINGS: dict[str, Any] = {
    "images_per_shot": 1,          # consecutive images of the same atoms (>= 2 for fidelity)
    "wavelength_nm": 767.0,        # fluorescence wavelength
    "numerical_aperture": 0.75,    # objective NA
    "pixel_size_nm": None,         # camera pixel in the atom plane; None = unknown
    "geometry_frames": 50,         # frames summed for the lattice estimate
    "psf_source": "estimate",      # "estimate" from isolated atoms or "airy" from the optics
    "camera": None,                # CameraModel.to_dict() of the camera; None = 1 count per photon
    "bootstrap_resamples": 200,    # resamples over shots for the fidelity intervals
}


#: Offset method and 1-sigma of a frame not (yet) extracted, or whose record did not keep them.
_NO_OFFSET_INFO = ("", (float("nan"), float("nan")))


@dataclasses.dataclass(frozen=True)
class ReconstructBatch:
    """Amplitudes of a few frames produced by a reconstruct job (any thread).

    Attributes
    ----------
    generation : int
        Calibration generation the job was made for; stale batches are dropped.
    indices : tuple of int
        Frame indices (0-based) in this batch.
    geometries : tuple of LatticeGeometry
        Per-frame geometry (offset re-fitted to the frame).
    amplitudes : (n, N) ndarray
        Site amplitudes in photons, one row per frame.
    flags : (n, N) ndarray of uint8
        Site flags (latticeread.core.flags) before classification.
    backgrounds : (n,) ndarray
        Fitted background per frame, photons per pixel.
    warnings : tuple of tuple of str
        Per-frame warnings of the extraction (poor phase fit, saturated pixels...).
    checks : tuple of FrameCheck or None
        Per-frame check of how well the site model explains the frame
        (:mod:`latticeread.core.frame_check`); empty when not computed.
    offsets : tuple of (str, (float, float))
        Per frame, how its offset was found and its 1-sigma (x, y) in pixels
        (:attr:`latticeread.core.pipeline.Reconstructor.last_offset`); empty when not recorded.
    """

    generation: int
    indices: tuple
    geometries: tuple
    amplitudes: np.ndarray
    flags: np.ndarray
    backgrounds: np.ndarray
    warnings: tuple
    checks: tuple = ()
    offsets: tuple = ()


@dataclasses.dataclass(frozen=True)
class CalibrationOrigin:
    """Where the calibration in use came from, for the window's status line and tool tips.

    Attributes
    ----------
    kind : {"none", "file", "frames", "kept", "session", "set"}
        ``file``: loaded from a calibration JSON; ``frames``: calibrated from the loaded
        frames; ``kept``: made for another stack and still in use after new frames were
        opened; ``session``: restored from a saved session; ``set``: given by a script.
    path : str or None
        The calibration file (``file``) or the session file (``session``).
    stack : str or None
        Name of the frame file the calibration was made with (``frames``) or for (``kept``).
    edited : bool
        Changed in this session since (threshold, geometry nudge, PSF, camera).
    """

    kind: str = "none"
    path: str | None = None
    stack: str | None = None
    edited: bool = False

    def describe(self) -> str:
        """One line for a status bar, e.g. ``"demo.calibration.json (edited)"``."""
        text = {"none": "none",
                "file": Path(self.path).name if self.path else "a calibration file",
                "frames": f"calibrated from {self.stack or 'the frames'}",
                "kept": f"made for {self.stack or 'another stack'} (kept)",
                "session": f"from session {Path(self.path).name if self.path else ''}".rstrip(),
                "set": "set by a script"}.get(self.kind, self.kind)
        return f"{text} (edited)" if self.edited and self.kind != "none" else text


def _pipeline():
    from latticeread.core import pipeline

    return pipeline


def _classify_module():
    from latticeread.core import classify

    return classify


class Session:
    """Frames, calibration, results and settings of one analysis, with change signals.

    Parameters
    ----------
    settings : dict, optional
        Initial user settings; missing keys take :data:`DEFAULT_SETTINGS`.
    """

    frames_changed = Signal(object)
    index_changed = Signal(int)
    calibration_changed = Signal(object)
    calibration_origin_changed = Signal(object)
    amplitudes_changed = Signal(object)
    classification_changed = Signal()
    threshold_result_changed = Signal(object)
    fidelity_changed = Signal(object)
    settings_changed = Signal(dict)
    undo_changed = Signal(bool, bool)
    modified_changed = Signal(bool)
    message = Signal(str)

    def __init__(self, *, settings: dict | None = None):
        self._frames = None
        self._frames_source: str | None = None
        self._frames_dataset: str | None = None
        self._frame_lock = threading.Lock()
        self._index = 0
        self._calibration = None
        self._origin = CalibrationOrigin()
        self._generation = 0           # bumped whenever stored amplitudes become invalid
        self._reconstructor = None
        self._reconstructor_generation = -1
        self._build_lock = threading.Lock()
        self._sites = None             # SiteGrid of the fixed site index set (from the Reconstructor)
        self._amplitudes: np.ndarray | None = None   # (n_frames, N) photons, NaN where not done
        self._flags: np.ndarray | None = None        # (n_frames, N) uint8
        self._backgrounds: np.ndarray | None = None  # (n_frames,) photons per pixel
        self._warnings: list = []                    # per-frame extraction warnings
        self._checks: list = []                      # per-frame model checks (FrameCheck or None)
        self._offsets: list = []                     # per-frame (offset method, 1-sigma) of the extraction
        self._geometries: list = []
        self._done: np.ndarray = np.zeros(0, dtype=bool)
        self._results: dict[int, Any] = {}           # classified FrameResult cache
        self._threshold_result = None
        #: per-frame policy: each frame's own threshold fit (None when its histogram has too
        #: few finite amplitudes), cached until its amplitudes or the threshold method change
        self._frame_fits: dict[int, Any] = {}
        self._stats_cache: PooledStats | None = None
        self._fidelity = None
        self._settings = {**DEFAULT_SETTINGS, **(settings or {})}
        self._undo: list = []
        self._redo: list = []
        #: where each calibration that was in use came from (by object id), so undo and redo
        #: show the origin of the calibration they go back to
        self._origin_of: dict[int, CalibrationOrigin] = {}
        self._undo_group: str | None = None
        self._modified = False

    # ------------------------------------------------------------------ frames
    @property
    def frames(self):
        """The frame stack (``len``, ``shape`` (n, H, W), ``__getitem__``) or None."""
        return self._frames

    @property
    def source(self) -> str | None:
        """Path of the file the frames came from (None for frames held in memory)."""
        return self._frames_source

    @property
    def n_frames(self) -> int:
        return 0 if self._frames is None else len(self._frames)

    @property
    def frame_shape(self) -> tuple[int, int] | None:
        if self._frames is None:
            return None
        shape = tuple(int(s) for s in self._frames.shape)
        return shape[-2:]

    def frame(self, index: int | None = None) -> np.ndarray:
        """Frame ``index`` (default: the current one) as a 2-D array; safe from any thread."""
        if self._frames is None:
            raise FrameError("no frames are loaded; open a file first")
        i = self._index if index is None else int(index)
        if not 0 <= i < len(self._frames):
            raise FrameError(f"frame {i} does not exist; the stack has {len(self._frames)} frame(s)")
        with self._frame_lock:
            return np.asarray(self._frames[i])

    def _frame_reader(self) -> Callable[[int], np.ndarray]:
        """``read(i)`` bound to the current stack (a later load does not change what it reads)."""
        frames, lock = self._frames, self._frame_lock
        if frames is None:
            raise FrameError("no frames are loaded; open a file first")

        def read(i: int) -> np.ndarray:
            with lock:
                return np.asarray(frames[int(i)])

        return read

    def open_frames(self, path, *, dataset: str | None = None) -> None:
        """Load frames from a TIFF/HDF5/npy file (through :func:`latticeread.io.load_frames`).

        Raises
        ------
        FrameFileError, FrameError
            The file cannot be read; the session is left unchanged.
        """
        from latticeread.analysis.service import open_stack  # NaN pixels flag their sites, as everywhere

        stack = open_stack(path, dataset=dataset)
        self.set_frames(stack, source=str(Path(path).resolve()), dataset=dataset)

    def load_calibration(self, path, *, for_new_frames: bool = False) -> None:
        """Use the calibration saved in ``path`` (JSON from ``latticeread calibrate`` or an export).

        Parameters
        ----------
        for_new_frames : bool
            The file belongs to frames just opened: the camera and pixel size it holds
            replace those entered for the previous stack (Analysis settings), and the undo
            history of the previous stack's calibration is dropped.

        Raises
        ------
        CalibrationError
            The file is not a calibration, misses keys, or was made for another frame size.
        """
        from latticeread.io import load_calibration

        cal = load_calibration(path)
        if cal is not None and self._frames is not None:
            cal.check_frame_shape(self.frame_shape, where=f"each frame of {self._source_name()}")
        self._adopt_calibration_settings(cal)
        if for_new_frames:
            self._undo.clear()
            self._redo.clear()
        self.set_calibration(cal, record=not for_new_frames,
                             origin=CalibrationOrigin("file", path=str(Path(path).resolve())))
        if for_new_frames:
            self.undo_changed.emit(self.can_undo, self.can_redo)
        self.message.emit(f"calibration loaded from {Path(path).name}")

    def _adopt_calibration_settings(self, cal) -> None:
        """The camera and pixel size of ``cal`` replace those entered in the settings.

        The camera entered in the settings wins over the calibration's (see
        :meth:`camera_model`); a camera entered for another stack would otherwise keep
        converting counts to photons with the wrong gain.
        """
        changes: dict[str, Any] = {}
        if self._settings.get("camera") is not None:
            changes["camera"] = None
        if cal is not None and cal.pixel_size_nm and cal.pixel_size_nm != self._settings.get("pixel_size_nm"):
            changes["pixel_size_nm"] = float(cal.pixel_size_nm)
        if changes:
            self._settings = {**self._settings, **changes}
            self.settings_changed.emit(dict(self._settings))

    @property
    def calibration_origin(self) -> CalibrationOrigin:
        """Where the calibration in use came from (kind, file, stack, edited)."""
        return self._origin

    def _set_origin(self, origin: CalibrationOrigin) -> None:
        if origin != self._origin:
            self._origin = origin
            self.calibration_origin_changed.emit(origin)

    @property
    def calibration_from_other_stack(self) -> bool:
        """True while the calibration in use was made for frames opened before the current ones."""
        return self._calibration is not None and self._origin.kind == "kept"

    def keep_calibration(self) -> None:
        """Confirm the calibration of the previous stack for the frames now loaded."""
        if self.calibration_from_other_stack:
            self.message.emit(f"calibration {self._origin.describe()} kept for {self._source_name()}")

    def drop_calibration(self) -> None:
        """Forget the calibration (to calibrate anew); the camera in use stays in the settings."""
        if self._calibration is None:
            return
        camera = self.camera_model()
        self._settings = {**self._settings, "camera": camera.to_dict()}
        self.settings_changed.emit(dict(self._settings))
        self._undo.clear()
        self._redo.clear()
        self.set_calibration(None, record=False, origin=CalibrationOrigin())
        self.undo_changed.emit(False, False)
        self.message.emit("calibration dropped; the camera stays as entered in Analysis settings")

    @staticmethod
    def sidecar_calibration(frames_path) -> Path | None:
        """A calibration file that belongs to ``frames_path``: ``<stem>.calibration.json`` beside it,
        else ``calibration.json`` in the same folder; None when there is none."""
        frames_path = Path(frames_path)
        for candidate in (frames_path.with_name(frames_path.stem + ".calibration.json"),
                          frames_path.with_name("calibration.json")):
            if candidate.is_file():
                return candidate
        return None

    def set_frames(self, frames, *, source: str | None = None, dataset: str | None = None) -> None:
        """Use ``frames`` (a FrameStack or an (n, H, W) / (H, W) array) and drop stored results."""
        if isinstance(frames, np.ndarray):
            if frames.ndim == 2:
                frames = frames[None]
            if frames.ndim != 3:
                raise FrameError(f"frames must be a 2-D frame or a 3-D stack, got an array of shape {frames.shape}")
        if len(frames) == 0:
            raise FrameError("the file holds no frames")
        old_frames = self._frames
        if old_frames is not None and old_frames is not frames and hasattr(old_frames, "close"):
            try:
                old_frames.close()
            except Exception:  # noqa: BLE001 - a failing close must not block loading new frames
                log.debug("closing the previous frame file failed", exc_info=True)
        old_name = self._source_name() if old_frames is not None else None
        same_file = source is not None and source == self._frames_source
        self._frames = frames
        self._frames_source = source
        self._frames_dataset = dataset
        shape = self.frame_shape
        if self._calibration is not None and tuple(self._calibration.frame_shape) not in ((0, 0), shape):
            old = self._calibration.frame_shape
            self._calibration = None
            self._undo.clear()
            self._redo.clear()
            self.calibration_changed.emit(None)
            self._set_origin(CalibrationOrigin())
            self.undo_changed.emit(False, False)
            self.message.emit(f"calibration dropped: it was made for {old[0]}x{old[1]} frames, "
                              f"these are {shape[0]}x{shape[1]}")
        elif self._calibration is not None and old_frames is not None and not same_file \
                and self._origin.kind != "kept":
            # made for (or with) the previous stack: still in use, but say so until the user decides
            stack = self._origin.stack if self._origin.kind == "frames" else old_name
            self._set_origin(CalibrationOrigin("kept", path=self._origin.path, stack=stack,
                                               edited=self._origin.edited))
        self._invalidate_amplitudes(emit=False)
        self._index = 0
        self.frames_changed.emit(frames)
        self.index_changed.emit(0)
        self.amplitudes_changed.emit(())
        self.classification_changed.emit()
        self._set_modified(True)
        name = Path(source).name if source else "memory"
        note = self._nonfinite_note(0)
        self.message.emit(f"loaded {len(frames)} frame(s) of {shape[0]}x{shape[1]} pixels from {name}"
                          + (f"; {note}" if note else ""))

    # ------------------------------------------------------------------ index
    @property
    def index(self) -> int:
        return self._index

    def set_index(self, index: int) -> None:
        """Make frame ``index`` current (clamped to the stack)."""
        if self._frames is None:
            return
        index = int(np.clip(int(index), 0, len(self._frames) - 1))
        if index != self._index:
            self._index = index
            self.index_changed.emit(index)
            if self.per_frame:  # the threshold shown is the new current frame's own fit
                self.threshold_result_changed.emit(self.threshold_result)
            note = self._nonfinite_note(index)
            if note:
                self.message.emit(note)

    def _nonfinite_note(self, index: int) -> str:
        """What the user must know about NaN/inf pixels of frame ``index`` (empty when it has none)."""
        try:
            frame = self.frame(index)
        except LatticeReadError:
            return ""
        if frame.dtype.kind != "f":
            return ""
        n_bad = int(frame.size - np.count_nonzero(np.isfinite(frame)))
        if not n_bad:
            return ""
        if n_bad == frame.size:
            return f"frame {index} has no finite pixel (all {n_bad} are non-finite pixels): it cannot be analysed"
        return (f"frame {index} has {n_bad} non-finite pixel(s): they are left out of the fit and the sites on them "
                "are flagged (flag 8)")

    # ------------------------------------------------------------------ settings
    @property
    def settings(self) -> dict:
        return dict(self._settings)

    def update_settings(self, **changes) -> None:
        """Change user settings; unknown keys raise ValueError."""
        unknown = set(changes) - set(DEFAULT_SETTINGS)
        if unknown:
            raise ValueError(f"unknown setting(s) {', '.join(sorted(unknown))}; known: {', '.join(DEFAULT_SETTINGS)}")
        if "images_per_shot" in changes and int(changes["images_per_shot"]) < 1:
            raise ValueError(f"images per shot must be at least 1, got {changes['images_per_shot']}")
        if changes.get("camera") is not None:
            from latticeread.core.camera import CameraModel

            CameraModel.from_dict(changes["camera"])  # raises ValueError with the camera's own message
        new = {**self._settings, **changes}
        if new != self._settings:
            old = self._settings
            self._settings = new
            if new["images_per_shot"] != old["images_per_shot"]:
                self._set_fidelity(None)
            self.settings_changed.emit(dict(new))
            self._set_modified(True)
            if new["camera"] != old["camera"] and new["camera"] is not None and self._calibration is not None:
                camera = self.camera_model()
                if _differs(camera, self._calibration.camera):
                    # photons change with the camera, so a fixed threshold in photons is meaningless
                    self.set_calibration(self._calibration.replace(camera=camera, threshold=None))
                    self.message.emit("camera changed: amplitudes will be recomputed and the threshold re-chosen")

    # ------------------------------------------------------------------ calibration
    @property
    def calibration(self):
        return self._calibration

    @property
    def generation(self) -> int:
        """Counter bumped whenever stored amplitudes become invalid."""
        return self._generation

    def set_calibration(self, calibration, *, record: bool = True, group: str | None = None,
                        origin: CalibrationOrigin | None = None) -> None:
        """Replace the calibration, invalidating only what depends on the changed fields.

        Parameters
        ----------
        calibration : Calibration or None
        record : bool
            Put the previous calibration on the undo stack.
        group : str, optional
            Consecutive edits with the same group name (e.g. ``"threshold"`` while dragging)
            make one undo step until :meth:`close_undo_group` is called.
        origin : CalibrationOrigin, optional
            Where ``calibration`` comes from; by default an edit of the calibration in use
            (marked edited), or ``"set"`` when there was none.
        """
        old = self._calibration
        if calibration is not None and self._frames is not None:
            calibration.check_frame_shape(self.frame_shape, where=f"each frame of {self._source_name()}")
        if origin is None:
            if calibration is None:
                origin = CalibrationOrigin()
            elif old is None:
                origin = CalibrationOrigin("set")
            else:
                origin = dataclasses.replace(self._origin, edited=True)
        if calibration is old or (calibration is not None and old is not None and calibration == old
                                  and _same_arrays(calibration, old)):
            if origin.kind != self._origin.kind or origin.path != self._origin.path:
                self._set_origin(origin)  # the same numbers, now from another file
            return
        self._set_origin(origin)
        if record:
            if not (group is not None and group == self._undo_group and self._undo):
                self._undo.append(old)
            self._undo_group = group
            self._redo.clear()
        self._apply_calibration(old, calibration)
        self._remember_origin(calibration)
        self.undo_changed.emit(self.can_undo, self.can_redo)

    def store_calibration_from_frames(self, calibration) -> None:
        """Use a calibration made by :meth:`calibrate_job` from the frames now loaded."""
        self.set_calibration(calibration, origin=CalibrationOrigin("frames", stack=self._source_name()))

    def _remember_origin(self, calibration) -> None:
        if calibration is None:
            return
        self._origin_of[id(calibration)] = self._origin
        if len(self._origin_of) > 200:  # keep only the calibrations that undo or redo can reach
            alive = {id(c) for c in (*self._undo, *self._redo, self._calibration) if c is not None}
            self._origin_of = {k: v for k, v in self._origin_of.items() if k in alive}

    def close_undo_group(self) -> None:
        """End a run of merged edits (e.g. when the mouse button is released)."""
        self._undo_group = None

    def _apply_calibration(self, old, new) -> None:
        self._calibration = new
        # every typed setting that changes amplitudes (options: weighting, index bounds, photons
        # per atom, reference image, offset refit; the frame policy) drops them
        amplitude_fields = ("geometry", "psf", "camera", "frame_shape", "amplitude_method", "options",
                            "frame_policy")
        if old is None or new is None or any(_differs(getattr(old, f), getattr(new, f)) for f in amplitude_fields):
            self._invalidate_amplitudes(emit=True)
        else:
            if _per_frame(new) != _per_frame(old):
                # into or out of the per-frame policy (e.g. a dragged line fixes one threshold
                # for every frame; undo goes back to each frame's own fit)
                self._threshold_result = None
                self._results.clear()
                self._frame_fits.clear()
                self._refresh_threshold_result()
            elif (new.threshold_method != old.threshold_method or new.threshold_scope != old.threshold_scope) \
                    and self._threshold_result is not None:
                self._threshold_result = None
                self._refresh_threshold_result()
            elif new.threshold != old.threshold and self._threshold_result is not None and new.threshold is not None:
                self._set_threshold_result(self._threshold_result.with_threshold(float(new.threshold)))
            elif new.threshold is None and old.threshold is not None:
                self._threshold_result = None
                self._refresh_threshold_result()
            self._reclassify()
            if _per_frame(new):  # the current frame's fit may have changed (e.g. another method)
                self.threshold_result_changed.emit(self.threshold_result)
        self.calibration_changed.emit(new)
        if _per_frame(new) and not _per_frame(old):
            self.message.emit("thresholds are fitted per frame: each frame is classified against the fit of its "
                              "own amplitude histogram (drag the line to fix one threshold for every frame)")
        self._set_modified(True)

    def _source_name(self) -> str:
        return Path(self._frames_source).name if self._frames_source else "the loaded stack"

    def set_geometry(self, geometry, *, record: bool = True, group: str | None = None) -> None:
        """Use a new lattice geometry (drops amplitudes). Needs a calibration (or a PSF) first."""
        cal = self._require_calibration("set the lattice geometry")
        self.set_calibration(cal.replace(geometry=geometry), record=record, group=group)

    def set_psf(self, psf, *, record: bool = True) -> None:
        cal = self._require_calibration("set the PSF")
        self.set_calibration(cal.replace(psf=psf), record=record)

    def set_threshold(self, threshold: float | None, *, record: bool = True, group: str | None = None) -> None:
        """Fix the occupancy threshold in photons (None = automatic from the histogram)."""
        from latticeread.core.classify import check_threshold
        from latticeread.core.frame_check import amplitude_unit

        cal = self._require_calibration("set a threshold")
        if threshold is not None:
            threshold = check_threshold(threshold, unit=amplitude_unit(cal.camera))
        self.set_calibration(cal.replace(threshold=threshold), record=record, group=group)

    def set_threshold_method(self, method: str, *, record: bool = True) -> None:
        """Choose the automatic threshold method ("mixture", "otsu", "minimum"); clears a fixed threshold."""
        if method not in ("mixture", "otsu", "minimum"):
            raise ValueError(f"unknown threshold method {method!r}; use 'mixture', 'otsu' or 'minimum'")
        cal = self._require_calibration("choose a threshold method")
        self.set_calibration(cal.replace(threshold_method=method, threshold=None), record=record)

    def set_region(self, region, *, record: bool = True) -> None:
        """Use another analysed region (:class:`~latticeread.core.region.SiteRegion`; drops amplitudes)."""
        cal = self._require_calibration("change the analysed region")
        new = cal.with_options(region=region)
        if tuple(cal.frame_shape) != (0, 0) and not region.is_everything:
            if not _pipeline().region_sites(new)[1].any():
                raise CalibrationError(f"the analysed region ({region.describe()}) holds no lattice site of the "
                                       "frame; draw it over the atoms or remove a shape (right-click it)")
        self.set_calibration(new, record=record)

    def exclude_sites(self, sites, *, excluded: bool = True) -> None:
        """Leave the sites ((row, col) pairs) out of the analysed region, or let them back in."""
        cal = self._require_calibration("exclude sites")
        self.set_region(cal.options.region.with_sites_excluded(sites, excluded=excluded))

    def excluded_sites(self):
        """SiteGrid of the sites the calibration's region leaves out (calibration lattice), or None."""
        cal = self._calibration
        if cal is None or cal.options.region.is_everything or tuple(cal.frame_shape) == (0, 0):
            return None
        from latticeread.core.geometry import SiteGrid

        s, keep = _pipeline().region_sites(cal)
        out = ~keep
        return SiteGrid(s.rows[out], s.cols[out], s.x[out], s.y[out], s.row_min, s.col_min, s.n_rows, s.n_cols)

    def _require_calibration(self, what: str):
        if self._calibration is None:
            raise CalibrationError(f"cannot {what}: there is no calibration yet; estimate the geometry first")
        return self._calibration

    # ------------------------------------------------------------------ undo / redo
    @property
    def can_undo(self) -> bool:
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        return bool(self._redo)

    def undo(self) -> bool:
        """Go back to the previous calibration; False when there is nothing to undo."""
        if not self._undo:
            return False
        self._undo_group = None
        previous = self._undo.pop()
        self._redo.append(self._calibration)
        self._apply_calibration(self._calibration, previous)
        self._set_origin(self._origin_of.get(id(previous), self._origin) if previous is not None
                         else CalibrationOrigin())
        self.undo_changed.emit(self.can_undo, self.can_redo)
        self.message.emit("undone")
        return True

    def redo(self) -> bool:
        if not self._redo:
            return False
        self._undo_group = None
        nxt = self._redo.pop()
        self._undo.append(self._calibration)
        self._apply_calibration(self._calibration, nxt)
        self._set_origin(self._origin_of.get(id(nxt), self._origin) if nxt is not None else CalibrationOrigin())
        self.undo_changed.emit(self.can_undo, self.can_redo)
        self.message.emit("redone")
        return True

    # ------------------------------------------------------------------ amplitudes
    def _invalidate_amplitudes(self, *, emit: bool) -> None:
        self._generation += 1
        n = self.n_frames
        self._reconstructor = None
        self._sites = None
        self._amplitudes = None
        self._flags = None
        self._backgrounds = None
        self._warnings = [()] * n
        self._checks = [None] * n
        self._offsets = [_NO_OFFSET_INFO] * n
        self._geometries = [None] * n
        self._done = np.zeros(n, dtype=bool)
        self._results.clear()
        self._frame_fits.clear()
        self._threshold_result = None
        self._fidelity = None
        if emit:
            self.amplitudes_changed.emit(())
            self.threshold_result_changed.emit(None)
            self.fidelity_changed.emit(None)
            self.classification_changed.emit()

    def reconstructor(self):
        """The :class:`latticeread.core.pipeline.Reconstructor` for the current calibration.

        Building one factorises the site basis (seconds for large frames); reconstruct jobs
        build it on their worker thread, so the GUI thread normally finds it ready.
        """
        cal = self._require_calibration("reconstruct frames")
        return self._reconstructor_for(cal, self._generation)

    def _reconstructor_for(self, calibration, generation: int):
        """Cached Reconstructor of ``calibration`` (thread safe; one build at a time)."""
        with self._build_lock:
            if self._reconstructor is None or self._reconstructor_generation != generation:
                rec = _pipeline().Reconstructor(calibration)
                if generation != self._generation:
                    return rec  # stale: the session moved on while building, do not cache
                self._reconstructor = rec
                self._reconstructor_generation = generation
            return self._reconstructor

    @property
    def done(self) -> np.ndarray:
        """(n_frames,) bool: which frames have amplitudes stored."""
        return self._done.copy()

    @property
    def sites(self):
        """SiteGrid of the fixed site index set (positions of the calibration geometry), or None."""
        return self._sites

    def amplitudes(self, index: int | None = None) -> np.ndarray | None:
        """Stored amplitudes (photons) of frame ``index`` or None when not reconstructed."""
        i = self._index if index is None else int(index)
        if self._amplitudes is None or not (0 <= i < self.n_frames) or not self._done[i]:
            return None
        return self._amplitudes[i]

    def all_amplitudes(self) -> np.ndarray:
        """Amplitudes of every reconstructed frame, flattened (photons); empty when none."""
        if self._amplitudes is None or not self._done.any():
            return np.zeros(0)
        return self._amplitudes[self._done].ravel()

    def reconstruct_job(self, indices=None, *, batch_size: int = 8,
                        processes: int = 0) -> Callable[..., Iterator[ReconstructBatch]]:
        """A generator function extracting amplitudes of ``indices`` (default: all not yet done).

        The returned function takes ``should_stop`` (a callable returning True to cancel) and
        yields :class:`ReconstructBatch` objects; pass each to :meth:`store_batch` on the
        session's thread. It reads frames through :meth:`frame` (thread safe).

        Parameters
        ----------
        batch_size : int
            Frames per batch (one batch = one call of :meth:`store_batch`).
        processes : int
            With ``processes >= 1`` and more than two batches of frames, the amplitudes are
            computed in that many worker processes (started with "spawn"), so the Python
            work of the reconstruction never competes with the GUI thread for the
            interpreter lock; batches then arrive in completion order.
        """
        cal = self._require_calibration("reconstruct frames")
        generation = self._generation
        if indices is None:
            indices = [int(i) for i in np.flatnonzero(~self._done)]
        indices = [int(i) for i in indices]
        frame = self._frame_reader()

        name = self._source_name()

        chunks = [indices[k:k + batch_size] for k in range(0, len(indices), batch_size)]
        if processes >= 1 and len(chunks) > 2:
            def job(should_stop: Callable[[], bool] = lambda: False) -> Iterator[ReconstructBatch]:
                yield from self._process_batches(cal, generation, chunks, frame, name, processes, should_stop)

            job.n_frames = len(indices)  # type: ignore[attr-defined]
            return job

        def job(should_stop: Callable[[], bool] = lambda: False) -> Iterator[ReconstructBatch]:
            rec = self._reconstructor_for(cal, generation)
            for start in range(0, len(indices), batch_size):
                if should_stop():
                    return
                chunk = indices[start:start + batch_size]
                geoms, amps, flags, backs, warns, checks, offsets = [], [], [], [], [], [], []
                for i in chunk:
                    g, amp, w = rec.extract_full(frame(i), where=f"frame {i} of {name}")
                    checks.append(rec.last_check)
                    offsets.append(rec.last_offset)
                    geoms.append(g)
                    amps.append(np.asarray(amp.amplitudes, dtype=float))
                    flags.append(np.asarray(amp.flags, dtype=np.uint8))
                    backs.append(float(np.mean(amp.background)))
                    warns.append(tuple(str(x) for x in w))
                    if should_stop():
                        break
                done = len(amps)
                yield ReconstructBatch(generation, tuple(chunk[:done]), tuple(geoms), np.stack(amps),
                                       np.stack(flags), np.asarray(backs, dtype=float), tuple(warns),
                                       tuple(checks[:done]), tuple(offsets[:done]))

        job.n_frames = len(indices)  # type: ignore[attr-defined]
        return job

    def _process_batches(self, cal, generation, chunks, frame, name, processes, should_stop):
        """Run chunks of frames through the executor layer's worker processes; yield batches as they complete."""
        from latticeread.analysis.executor import ImageTask, PoolExecutor
        from latticeread.io.calibration_file import calibration_to_json

        # workers run at a lower scheduling priority than the window (niceness 10)
        pool = PoolExecutor(calibration_to_json(cal), workers=int(processes), niceness=10)
        todo = list(chunks)
        try:
            while todo or pool.pending:
                while todo and pool.pending < 2 * int(processes):
                    if should_stop():
                        return
                    chunk = todo.pop(0)
                    pool.submit(0, ImageTask(tuple(chunk), np.stack([frame(i) for i in chunk]), name))
                # while the workers run, this thread builds the session's own Reconstructor
                # (site set and positions for the results); cached after the first pass
                self._reconstructor_for(cal, generation)
                finished = pool.next_done(timeout=0.5)
                if should_stop():
                    return
                if finished is not None:
                    rows = finished[1]
                    yield ReconstructBatch(
                        generation, tuple(r[0] for r in rows), tuple(r[1] for r in rows),
                        np.stack([r[2] for r in rows]), np.stack([r[3] for r in rows]),
                        np.asarray([r[4] for r in rows], dtype=float), tuple(r[5] for r in rows),
                        tuple(r[6] for r in rows), tuple(r[7] for r in rows))
        finally:
            pool.close(cancel=True)

    def store_batch(self, batch: ReconstructBatch) -> bool:
        """Store amplitudes from a reconstruct job; returns False for a stale batch (dropped)."""
        if batch.generation != self._generation or self._calibration is None:
            return False
        if self._amplitudes is None:
            self._sites = self.reconstructor().sites
            n_sites = batch.amplitudes.shape[1]
            self._amplitudes = np.full((self.n_frames, n_sites), np.nan)
            self._flags = np.zeros((self.n_frames, n_sites), dtype=np.uint8)
            self._backgrounds = np.full(self.n_frames, np.nan)
            self._warnings = [()] * self.n_frames
            self._checks = [None] * self.n_frames
            self._offsets = [_NO_OFFSET_INFO] * self.n_frames
        if batch.amplitudes.shape[1] != self._amplitudes.shape[1]:
            raise LatticeReadError(
                f"frame {batch.indices[0]} gave {batch.amplitudes.shape[1]} sites but earlier frames gave "
                f"{self._amplitudes.shape[1]}; the site set must be fixed by the calibration")
        idx = list(batch.indices)
        st = self._stats_cache
        if st is not None and st.included[idx].any():
            self._stats_cache = None  # frames counted before are replaced: count again from scratch
        self._amplitudes[idx] = batch.amplitudes
        self._flags[idx] = batch.flags
        self._backgrounds[idx] = batch.backgrounds
        checks = batch.checks or (None,) * len(idx)
        offsets = batch.offsets or (_NO_OFFSET_INFO,) * len(idx)
        for i, g, w, c, o in zip(idx, batch.geometries, batch.warnings, checks, offsets):
            self._geometries[i] = g
            self._warnings[i] = tuple(w)
            self._checks[i] = c
            self._offsets[i] = o
            self._results.pop(i, None)
            self._frame_fits.pop(i, None)
        self._done[idx] = True
        if self._fidelity is not None:
            self._set_fidelity(None)
        self.amplitudes_changed.emit(tuple(idx))
        if self._threshold_result is None:
            self._refresh_threshold_result()
        self.classification_changed.emit()
        return True

    def reconstruct(self, indices=None) -> None:
        """Extract amplitudes on this thread (for scripts and tests; the GUI uses a worker)."""
        job = self.reconstruct_job(indices)
        for batch in job():
            self.store_batch(batch)

    def finish_reconstruction(self) -> None:
        """Re-fit the automatic threshold on all stored amplitudes (call when a job ends)."""
        self._threshold_result = None
        self._refresh_threshold_result()
        self._reclassify()

    # ------------------------------------------------------------------ classification
    @property
    def threshold_result(self):
        """ThresholdResult of the pooled amplitude histogram (with the user's threshold), or None.

        Under the per-frame policy: the current frame's own fit (None when that frame is not
        reconstructed or its histogram cannot be fitted).
        """
        if self.per_frame:
            return self._frame_fit(self._index)
        return self._threshold_result

    @property
    def threshold(self) -> float | None:
        """Threshold in photons in force: the fixed one, else the automatic one, else None.

        Under the per-frame policy: the current frame's own threshold.
        """
        if self._calibration is not None and self._calibration.threshold is not None:
            return float(self._calibration.threshold)
        tr = self.threshold_result
        if tr is not None:
            return float(tr.threshold)
        return None

    @property
    def per_frame(self) -> bool:
        """True when each frame is classified against the fit of its own histogram
        (the calibration's threshold policy is ``per_frame`` and no threshold is fixed)."""
        return _per_frame(self._calibration)

    def frame_thresholds(self) -> np.ndarray:
        """(n_frames,) threshold in photons each frame is classified with (NaN: not reconstructed
        or no fit)."""
        out = np.full(self.n_frames, np.nan)
        for i in np.flatnonzero(self._done):
            c = self._classifier(int(i))
            if c is not None:
                out[i] = threshold_value(c)
        return out

    def _frame_fit(self, index: int):
        """The threshold fitted on frame ``index``'s own histogram, as ``reconstruct`` fits it
        under the per-frame policy; None when the frame is not reconstructed or holds fewer
        than 3 finite amplitudes."""
        i = int(index)
        if i in self._frame_fits:
            return self._frame_fits[i]
        amps = self.amplitudes(i)
        if amps is None or self._calibration is None:
            return None
        try:
            fit = _pipeline().pooled_threshold(amps, calibration=self._calibration, flags=self._flags[i])
        except ReconstructionError as exc:
            log.info("frame %d has no threshold of its own: %s", i, exc)
            fit = None
        self._frame_fits[i] = fit
        return fit

    def _refresh_threshold_result(self) -> None:
        if self.per_frame:
            # no pooled fit: every frame has its own (shown for the current frame)
            self._threshold_result = None
            self.threshold_result_changed.emit(self.threshold_result)
            return
        amps = self.all_amplitudes()
        if not np.isfinite(amps).any() or self._calibration is None:
            self._set_threshold_result(None)
            return
        cal = self._calibration
        # the one pooled threshold of every front end (order-independent, same flags)
        tr = _pipeline().pooled_threshold(amps, calibration=cal, flags=self._flags[self._done].ravel())
        if cal.threshold is not None:
            tr = tr.with_threshold(float(cal.threshold))
        self._set_threshold_result(tr)

    def _set_threshold_result(self, result) -> None:
        if result is not self._threshold_result:
            self._threshold_result = result
            self.threshold_result_changed.emit(result)

    def _reclassify(self) -> None:
        self._results.clear()
        self._frame_fits.clear()
        if self._stats_cache is not None and self._stats_cache.components == PER_FRAME_KEY:
            self._stats_cache = None  # counted with fits that may change (e.g. another method)
        self._set_fidelity(None)
        self.classification_changed.emit()

    def _classifier(self, index: int | None = None):
        """What to pass to classify() for frame ``index`` (default: the current one): the
        ThresholdResult (posteriors) or the bare threshold; under the per-frame policy that
        frame's own fit."""
        if self.per_frame:
            return self._frame_fit(self._index if index is None else int(index))
        if self._threshold_result is not None:
            return self._threshold_result
        return self.threshold

    def classify_frame(self, index: int | None = None):
        """(occupied uint8, p_occupied float) of a reconstructed frame, or None."""
        amps = self.amplitudes(index)
        thr = self._classifier(index)
        if amps is None or thr is None:
            return None
        return _classify_module().classify(amps, thr)

    def result(self, index: int | None = None):
        """Classified :class:`~latticeread.core.pipeline.FrameResult` of a frame, or None.

        Built from the stored amplitudes and the threshold in force; cached until the
        threshold or the amplitudes change.
        """
        i = self._index if index is None else int(index)
        if i in self._results:
            return self._results[i]
        amps = self.amplitudes(i)
        thr = self._classifier(i)
        if amps is None or thr is None:
            return None
        pipeline = _pipeline()
        n = amps.size
        bare = pipeline.FrameResult(
            frame_index=i, geometry=self._geometries[i], sites=self._frame_sites(i), amplitudes=amps,
            occupied=np.zeros(n, np.uint8), p_occupied=np.zeros(n), flags=self._flags[i],
            background=float(self._backgrounds[i]), method=self.reconstructor().method,
            warnings=tuple(self._warnings[i]), excluded=self.reconstructor().excluded_at(self._geometries[i].offset),
            check=self.frame_check(i), offset_method=self._offsets[i][0], offset_sigma=self._offsets[i][1])
        res = pipeline.reclassify(bare, thr)
        self._results[i] = res
        return res

    def frame_check(self, index: int | None = None):
        """How well the site model explains a reconstructed frame
        (:class:`~latticeread.core.frame_check.FrameCheck`), or None (not reconstructed, or a
        frame restored from a saved session, which keeps the check's warnings only)."""
        i = self._index if index is None else int(index)
        if not 0 <= i < len(self._checks):
            return None
        return self._checks[i]

    def _frame_sites(self, i: int):
        """Site grid of frame ``i`` with positions at that frame's geometry."""
        from latticeread.core.geometry import SiteGrid

        base = self._sites
        x, y = self.reconstructor().positions(self._geometries[i].offset)
        return SiteGrid(base.rows, base.cols, x, y, base.row_min, base.col_min, base.n_rows, base.n_cols)

    def results(self) -> list:
        """Classified FrameResults of every reconstructed frame, in frame order."""
        return [self.result(int(i)) for i in np.flatnonzero(self._done)]

    def occupation_stack(self) -> np.ndarray | None:
        """(n_done, n_rows, n_cols) uint8 occupation matrices of the reconstructed frames (255 outside)."""
        if self._amplitudes is None or not self._done.any():
            return None
        done = np.flatnonzero(self._done)
        amps = self._amplitudes[done]
        if self.per_frame:
            fits = [self._classifier(int(i)) for i in done]
            if any(f is None for f in fits):
                return None
            occ = np.stack([np.asarray(_classify_module().classify(a, f)[0], dtype=np.uint8)
                            for a, f in zip(amps, fits)])
        else:
            if self._classifier() is None:
                return None
            occ, _ = _classify_module().classify(amps.ravel(), self._classifier())
            occ = np.asarray(occ, dtype=np.uint8).reshape(amps.shape)
        s = self._sites
        out = np.full((amps.shape[0], s.n_rows, s.n_cols), 255, dtype=np.uint8)
        out[:, s.rows - s.row_min, s.cols - s.col_min] = occ
        return out

    # --- pooled statistics, kept up to date incrementally -------------------------------
    def _stats(self) -> PooledStats | None:
        """Per-site occupied sums and pooled counts over the reconstructed frames.

        Kept up to date in parts, so neither a stream of results from a long stack nor a
        threshold drag re-runs the full classification on the GUI thread:

        * frames stored since the last call are classified and added (cost proportional to
          the new frames only);
        * a new threshold with the same fitted components (a drag, undo/redo of a drag)
          only re-counts ``amplitude > threshold`` over the stored amplitudes (one vectorised
          comparison, about 6 ms for 10 million sites); the uncertain count depends on the
          posterior, which does not depend on the threshold, so it is kept;
        * new components (a new fit, another method, new amplitudes) start over.
        """
        if self.per_frame:
            return self._per_frame_stats()
        thr = self._classifier()
        if self._amplitudes is None or thr is None:
            return None
        st = self._stats_cache
        if st is None or st.generation != self._generation or st.components != posterior_key(thr):
            st = PooledStats.empty(self._generation, thr, np.zeros(self.n_frames, bool), self._amplitudes.shape[1])
            self._stats_cache = st
        elif st.threshold != threshold_value(thr):
            st.recount(self._amplitudes, thr)
        new = np.flatnonzero(self._done & ~st.included)
        if new.size:
            st.add(self._amplitudes[new], thr)
            st.included[new] = True
        return st

    def _per_frame_stats(self) -> PooledStats | None:
        """Counts under the per-frame policy: each frame classified with its own fit (no single
        threshold: ``classifier`` is None and ``threshold`` NaN). Frames without a fit are not
        counted."""
        if self._amplitudes is None:
            return None
        st = self._stats_cache
        if st is None or st.generation != self._generation or st.components != PER_FRAME_KEY:
            st = PooledStats(generation=self._generation, classifier=None, threshold=float("nan"),
                             components=PER_FRAME_KEY, included=np.zeros(self.n_frames, bool),
                             occ_sum=np.zeros(self._amplitudes.shape[1], np.int64),
                             n_frames_site=np.zeros(self._amplitudes.shape[1], np.int64))
            self._stats_cache = st
        for i in np.flatnonzero(self._done & ~st.included):
            fit = self._classifier(int(i))
            if fit is not None:
                st.add(self._amplitudes[i:i + 1], fit)
                st.included[i] = True
        return st

    def store_stats(self, stats: PooledStats) -> None:
        """Adopt statistics computed elsewhere (e.g. by :meth:`fit_threshold_job` in a worker)."""
        self._stats_cache = stats

    def mean_occupation(self) -> np.ndarray | None:
        """Mean occupation over the reconstructed frames, (n_rows, n_cols), NaN outside the region."""
        st = self._stats()
        if st is None or not st.included.any():
            return None
        return self._sites.to_matrix(st.mean_occupation(), fill=np.nan, dtype=float)

    def pooled_counts(self) -> dict | None:
        """Occupied / empty / uncertain counts over every reconstructed frame (as in the histogram)."""
        st = self._stats()
        if st is None or not st.included.any():
            return None
        return st.counts()

    def histogram_amplitudes(self, max_values: int = 1_000_000) -> np.ndarray:
        """Amplitudes for drawing the histogram: all of them, or whole frames evenly spread
        over the stack when there are more than ``max_values`` (display only; counts and
        threshold fits always use every amplitude)."""
        if self._amplitudes is None or not self._done.any():
            return np.zeros(0)
        idx = np.flatnonzero(self._done)
        per = self._amplitudes.shape[1]
        step = max(1, int(np.ceil(idx.size * per / max_values)))
        return self._amplitudes[idx[::step]].ravel()

    def fit_threshold_job(self):
        """A function fitting the automatic threshold on a snapshot of all amplitudes (any thread).

        Returns ``(generation, ThresholdResult or None)`` for :meth:`store_threshold_fit`.
        """
        done = self._done.copy()
        # No copy here (it would pause the GUI thread for a long stack): rows of frames marked
        # done are never rewritten within a generation (store_batch only fills frames not done
        # when the job was made, and a new generation replaces the whole array), so the worker
        # can read them from the live array.
        amplitudes = self._amplitudes
        flags = self._flags
        cal = self._calibration
        generation = self._generation

        def job(should_stop: Callable[[], bool] = lambda: False):
            if amplitudes is None or cal is None or _per_frame(cal):
                return generation, None, None  # per frame: each frame's fit is made when it is shown
            block = amplitudes if done.all() else amplitudes[done]
            amps = block.ravel()
            if not np.isfinite(amps).any():
                return generation, None, None
            tr = _pipeline().pooled_threshold(amps, calibration=cal, flags=(flags if done.all() else flags[done]).ravel())
            if cal.threshold is not None:
                tr = tr.with_threshold(float(cal.threshold))
            stats = PooledStats.empty(generation, tr, done, block.shape[1])
            stats.add(block, tr)
            if block.size <= SORTED_INDEX_MAX_AMPLITUDES:
                stats.add_sorted_index(block)
            return generation, tr, stats

        return job

    def store_threshold_fit(self, fit) -> bool:
        """Use a threshold fit from :meth:`fit_threshold_job`; False when it is stale."""
        generation, tr, stats = fit
        if generation != self._generation or self._calibration is None:
            return False
        if self.per_frame:
            self._reclassify()
            self.threshold_result_changed.emit(self.threshold_result)
            return True
        if tr is not None and self._calibration.threshold is not None and tr.threshold != self._calibration.threshold:
            tr = tr.with_threshold(float(self._calibration.threshold))  # same components: _stats re-counts
        self._set_threshold_result(tr)
        self._reclassify()
        if stats is not None and tr is not None:
            stats.included = stats.included.copy()
            self._stats_cache = stats
        return True

    def phase_drift(self):
        """Per-frame lattice offsets of the reconstructed frames and their linear trend.

        Returns
        -------
        indices : (n,) ndarray of int
        offsets : (n, 2) ndarray
            Offset ``(x, y)`` in pixels of each frame's re-fitted geometry.
        trend : (n, 2) ndarray or None
            Least-squares straight line through the offsets (None for fewer than 3 frames).
        """
        idx = np.array([i for i, g in enumerate(self._geometries) if g is not None and self._done[i]], dtype=int)
        if idx.size == 0:
            return idx, np.zeros((0, 2)), None
        offsets = np.array([self._geometries[i].offset for i in idx], dtype=float)
        trend = None
        if idx.size >= 3:
            coef = np.polynomial.polynomial.polyfit(idx.astype(float), offsets, 1)
            trend = np.polynomial.polynomial.polyval(idx.astype(float), coef).T
        return idx, offsets, trend

    def offset_records(self, indices) -> tuple[tuple[str, ...], np.ndarray]:
        """How each of the frames ``indices`` had its offset found, and its 1-sigma (n, 2) in pixels
        (NaN where not estimated; "" where not recorded)."""
        info = [self._offsets[int(i)] if int(i) < len(self._offsets) else _NO_OFFSET_INFO for i in indices]
        return tuple(m for m, _ in info), np.array([s for _, s in info], dtype=float).reshape(-1, 2)

    def model_job(self, index: int | None = None):
        """A function rendering the model image of a frame: sum of amplitude x PSF (photons)."""
        res = self.result(index)
        if res is None:
            raise ReconstructionError("this frame has no amplitudes yet: reconstruct it first")
        psf = self._calibration.psf
        shape = self.frame_shape

        def job(should_stop: Callable[[], bool] = lambda: False):
            from latticeread.core.psf import render_sites

            amps = np.nan_to_num(np.asarray(res.amplitudes, dtype=float))
            return render_sites(shape, res.sites.x, res.sites.y, amps, psf)

        return job

    def site_evidence(self, row: int, col: int, *, index: int | None = None, half_width: int | None = None):
        """Everything the window shows about one site: image and model patches of frame
        ``index`` (default: the current one) and its amplitude, posterior and flags in every
        reconstructed frame. None when the site is not in the calibration's site set or the
        frame is not reconstructed.

        Returns
        -------
        dict
            ``row``, ``col``; ``frames`` (n,) indices of the reconstructed frames;
            ``amplitude`` (n,) photons; ``p_occupied`` (n,); ``flags`` (n,) uint8;
            ``threshold`` photons; ``index``, ``x``, ``y`` (pixels, in frame ``index``);
            ``origin`` (x0, y0) pixel of the patches' top-left corner; ``image`` photons,
            ``model`` photons (sum of amplitude x PSF of the sites near it) and ``residual``
            = image - model, each (2 h + 1, 2 h + 1) with ``h = half_width`` (default: one
            and a half lattice spacings), NaN outside the frame.
        """
        i = self._index if index is None else int(index)
        res = self.result(i)
        if res is None or self._sites is None:
            return None
        match = np.flatnonzero((self._sites.rows == int(row)) & (self._sites.cols == int(col)))
        if match.size == 0:
            return None
        k = int(match[0])
        cal = self._calibration
        frames = np.flatnonzero(self._done)
        amps = self._amplitudes[frames, k]
        if self.per_frame:
            p = np.full(amps.shape, np.nan)
            for j, f in enumerate(frames):
                fit = self._classifier(int(f))
                if fit is not None:
                    p[j] = _classify_module().classify(amps[j:j + 1], fit)[1][0]
        else:
            _occ, p = _classify_module().classify(amps, self._classifier())
        x, y = float(res.sites.x[k]), float(res.sites.y[k])
        h = int(half_width) if half_width is not None else int(np.ceil(1.5 * max(cal.geometry.spacings)))
        x0, y0 = int(round(x)) - h, int(round(y)) - h
        size = 2 * h + 1
        photons = cal.camera.counts_to_photons(self.frame(i).astype(float))
        image = np.full((size, size), np.nan)
        height, width = photons.shape
        ys, xs = slice(max(y0, 0), min(y0 + size, height)), slice(max(x0, 0), min(x0 + size, width))
        image[ys.start - y0:ys.stop - y0, xs.start - x0:xs.stop - x0] = photons[ys, xs]
        from latticeread.core.psf import render_sites

        reach = h + cal.psf.radius + 1
        near = (np.abs(res.sites.x - x) <= reach) & (np.abs(res.sites.y - y) <= reach)
        near_amps = np.nan_to_num(np.asarray(res.amplitudes, dtype=float)[near])
        model = render_sites((size, size), res.sites.x[near] - x0, res.sites.y[near] - y0, near_amps, cal.psf)
        model = model + float(res.background)
        model[np.isnan(image)] = np.nan
        return {"row": int(row), "col": int(col), "frames": frames, "amplitude": amps,
                "p_occupied": np.asarray(p, dtype=float), "flags": self._flags[frames, k].copy(),
                "threshold": self.threshold, "index": i, "x": x, "y": y, "origin": (x0, y0),
                "image": image, "model": model, "residual": image - model}

    def counts(self, index: int | None = None) -> dict | None:
        """Occupied / empty / uncertain site counts of a frame (uncertain: posterior in [0.1, 0.9])."""
        cls = self.classify_frame(index)
        if cls is None:
            return None
        occ, p = cls
        n_occ = int(np.count_nonzero(occ))
        return {"occupied": n_occ, "empty": int(occ.size - n_occ),
                "uncertain": int(np.count_nonzero((p >= 0.1) & (p <= 0.9)))}

    # ------------------------------------------------------------------ geometry / PSF / calibration jobs
    def estimate_geometry_job(self, *, constraints: dict | None = None):
        """A function returning a new LatticeGeometry estimated from the summed frames (any thread).

        Parameters
        ----------
        constraints : dict, optional
            From the lab's own calibration: ``spacing_px`` (pixels, both vectors),
            ``angle_deg`` (direction of a1 from +x towards +y, degrees) and
            ``angle_between_deg`` (degrees). Passed to
            :func:`latticeread.core.lattice.estimate_lattice` as ``fixed_spacing`` and
            ``fixed_angle``.
        """
        if self._frames is None:
            raise FrameError("no frames are loaded; open a file first")
        n = min(self.n_frames, int(self._settings["geometry_frames"]))
        frame = self._frame_reader()
        kwargs = self._constraint_kwargs(constraints or {})
        camera = self.camera_model()

        def job(should_stop: Callable[[], bool] = lambda: False):
            # the routine of calibrate: summed stack and single frames, the clearest peaks win
            stack = np.stack([frame(i).astype(float) for i in range(n)])
            return _pipeline().estimate_geometry(stack, camera=camera, **kwargs)

        return job

    def _constraint_kwargs(self, constraints: dict) -> dict:
        if constraints.get("angle_between_deg") is not None and constraints.get("angle_deg") is None:
            self.message.emit("an angle between the vectors needs the direction of a1 too; it was ignored")
        between = self._calibration.geometry.angle_between if self._calibration is not None else np.pi / 2
        known = {key: constraints.get(key) for key in ("spacing_px", "angle_deg", "angle_between_deg")}
        return _pipeline().lattice_constraint_kwargs(known, angle_between=between)

    def spectrum_job(self):
        """A function returning the Fourier magnitude of the summed frames and the lattice peaks.

        Display only: ``|FFT|`` of the mean-subtracted sum of the calibration frames, shifted
        so zero frequency sits at pixel ``(W // 2, H // 2)``, and the positions ``(x, y)`` in
        that image of +-b1, +-b2 of the current geometry (the peaks the estimate locked on).
        """
        if self._frames is None:
            raise FrameError("no frames are loaded; open a file first")
        n = min(self.n_frames, int(self._settings["geometry_frames"]))
        frame = self._frame_reader()
        geometry = None if self._calibration is None else self._calibration.geometry

        def job(should_stop: Callable[[], bool] = lambda: False):
            total = np.zeros(self.frame_shape)
            for i in range(n):
                total += np.nan_to_num(frame(i).astype(float))
            total -= total.mean()
            spectrum = np.abs(np.fft.fftshift(np.fft.fft2(total)))
            h, w = spectrum.shape
            peaks = np.zeros((0, 2))
            if geometry is not None:
                b = geometry.reciprocal  # rows b1, b2 in cycles per pixel, (x, y)
                k = np.concatenate([b, -b])
                peaks = np.column_stack([w // 2 + k[:, 0] * w, h // 2 + k[:, 1] * h])
            return spectrum, peaks

        return job

    def calibrate_job(self, *, constraints: dict | None = None):
        """A function returning a full Calibration (geometry, PSF, threshold) from the frames.

        Parameters
        ----------
        constraints : dict, optional
            As for :meth:`estimate_geometry_job`. With both the spacing and the direction of
            a1 and the ideal Airy PSF chosen, a lattice whose Fourier peaks are invisible
            (spacing below about one FWHM) is fitted to the image model from them instead
            (``lattice_prior`` of :func:`latticeread.core.pipeline.calibrate`).
        """
        if self._frames is None:
            raise FrameError("no frames are loaded; open a file first")
        n = min(self.n_frames, int(self._settings["geometry_frames"]))
        frame = self._frame_reader()
        old = self._calibration
        settings = dict(self._settings)
        camera = self.camera_model()

        def job(should_stop: Callable[[], bool] = lambda: False):
            stack = _frames_for_calibration(frame, n, self._source_name())
            # what the frames cannot tell (pixel size, optics) is kept from the loaded calibration
            pixel_size = settings["pixel_size_nm"] or (old.pixel_size_nm if old is not None else None)
            kwargs: dict[str, Any] = {"pixel_size_nm": pixel_size, "camera": camera}
            if old is not None:
                kwargs["threshold_method"] = old.threshold_method
            prior = {key: (constraints or {}).get(key) for key in ("spacing_px", "angle_deg", "angle_between_deg")}
            if any(value is not None for value in prior.values()):
                kwargs["lattice_prior"] = prior
            if settings["psf_source"] == "airy" and settings["pixel_size_nm"]:
                from latticeread.core.psf import airy_psf

                kwargs["psf"] = airy_psf(wavelength_nm=settings["wavelength_nm"],
                                         numerical_aperture=settings["numerical_aperture"],
                                         pixel_size_nm=settings["pixel_size_nm"])
            try:
                from latticeread.analysis.service import merge_calibration

                return merge_calibration(_pipeline().calibrate(stack, **kwargs), base=old)
            except ReconstructionError as exc:
                if "psf" in kwargs or "isolated" not in str(exc):
                    raise
                raise ReconstructionError(
                    f"{exc}. Or use the ideal Airy PSF: in Analysis settings enter the pixel size, wavelength "
                    "and NA and choose 'ideal Airy pattern'") from exc

        return job

    def camera_model(self):
        """CameraModel from the settings, else the calibration's, else 1 count per photon."""
        from latticeread.core.camera import CameraModel

        if self._settings.get("camera"):
            return CameraModel.from_dict(self._settings["camera"])
        if self._calibration is not None:
            return self._calibration.camera
        return CameraModel()

    def apply_geometry(self, geometry) -> None:
        """Store an estimated geometry: into the calibration, or start one with a PSF if none exists."""
        if self._calibration is not None:
            self.set_geometry(geometry)
            return
        raise CalibrationError("no calibration yet: use 'calibrate' to estimate geometry, PSF and threshold together")

    def estimate_psf_job(self):
        """A function returning an empirical PSFModel from isolated atoms (any thread)."""
        cal = self._require_calibration("estimate the PSF")
        n = min(self.n_frames, int(self._settings["geometry_frames"]))
        frame = self._frame_reader()

        def job(should_stop: Callable[[], bool] = lambda: False):
            from latticeread.core.psf_estimate import estimate_psf

            stack = np.stack([frame(i) for i in range(n)])
            photons = cal.camera.counts_to_photons(stack)
            return estimate_psf(photons, cal.geometry)

        return job

    # ------------------------------------------------------------------ fidelity
    @property
    def fidelity(self):
        return self._fidelity

    def _set_fidelity(self, report) -> None:
        if report is not self._fidelity:
            self._fidelity = report
            self.fidelity_changed.emit(report)

    def fidelity_job(self):
        """A function estimating loss and hopping from consecutive images (any thread).

        Needs ``images_per_shot >= 2`` and every frame reconstructed. Returns
        ``(generation, FidelityReport)`` for :meth:`store_fidelity`.
        """
        ips = int(self._settings["images_per_shot"])
        if ips < 2:
            raise ReconstructionError(
                "fidelity needs at least two consecutive images of the same atoms: set 'images per shot' to 2 or more")
        if self.n_frames == 0 or not self._done.all():
            raise ReconstructionError(
                f"fidelity needs every frame reconstructed; {int(self._done.sum())} of {self.n_frames} are done")
        if self.n_frames % ips:
            raise ReconstructionError(f"{self.n_frames} frames do not split into shots of {ips} images each")
        stack = self.occupation_stack()
        occ = stack.reshape(self.n_frames // ips, ips, *stack.shape[1:])
        # misread rates: the one computation every front end uses (pooled fit at the threshold in force)
        amplitudes = self._amplitudes.copy()
        # the threshold each frame was classified with (one per frame under the per-frame policy)
        threshold = self.frame_thresholds() if self.per_frame else self.threshold
        camera = self._calibration.camera
        geometry = self._calibration.geometry
        n_boot = int(self._settings["bootstrap_resamples"])
        key = (self._generation, self._classification_key())

        def job(should_stop: Callable[[], bool] = lambda: False):
            from latticeread.core.fidelity import fidelity_from_frames

            return key, fidelity_from_frames(occ, amplitudes=amplitudes, thresholds=threshold, camera=camera,
                                             geometry=geometry, n_bootstrap=n_boot)

        return job

    def store_fidelity(self, output) -> bool:
        """Use the output of :meth:`fidelity_job`; False (dropped) when results changed meanwhile."""
        key, report = output
        if key != (self._generation, self._classification_key()):
            return False
        self._set_fidelity(report)
        self.message.emit("fidelity estimated")
        return True

    def compute_fidelity(self) -> None:
        """Estimate loss and hopping on this thread (scripts and tests; the GUI uses a worker)."""
        self.store_fidelity(self.fidelity_job()())

    def _classification_key(self):
        tr = self._threshold_result
        if self.per_frame:
            return ("per_frame", self.frame_thresholds().tobytes(), int(self._done.sum()))
        return (self.threshold, id(tr), int(self._done.sum()))

    # ------------------------------------------------------------------ modified flag
    @property
    def modified(self) -> bool:
        return self._modified

    def _set_modified(self, value: bool) -> None:
        if value != self._modified:
            self._modified = value
            self.modified_changed.emit(value)

    # ------------------------------------------------------------------ save / open
    def save(self, path) -> Path:
        """Save the session: ``path`` (JSON) plus the results in ``<stem>.h5`` next to it.

        The layout is :mod:`latticeread.io.session_file`: the JSON holds the frame file name,
        current frame, calibration (and where it came from), settings, undo history and the
        fidelity report; the HDF5 file holds the stored amplitudes, flags and per-frame
        offsets (and the frames themselves when they came from memory rather than a file).
        Both files are written atomically; refuses to overwrite the frame file.
        """
        from latticeread.io.session_file import write_session

        path = write_session(path, self._record(), protect=self._protected())
        self._set_modified(False)
        self.message.emit(f"session saved to {path.name}")
        return path

    def autosave(self, path) -> Path | None:
        """Save quietly for crash recovery (only when something changed since the last save)."""
        job = self.autosave_job(path)
        return None if job is None else job()

    def autosave_job(self, path):
        """A function writing a copy of the session for crash recovery (any thread), or None
        when nothing changed since the last save. The copy is taken now, on this thread."""
        if not self._modified or self._frames is None:
            return None
        from latticeread.io.session_file import write_session

        record, protect = self._record(), self._protected()

        def job(should_stop: Callable[[], bool] = lambda: False):
            return write_session(path, record, protect=protect)

        return job

    def _record(self):
        """A :class:`~latticeread.io.session_file.SessionRecord` of the session, copied so the
        session may change while it is written."""
        from latticeread.io.session_file import SessionRecord, SessionResults

        results = None
        if self._amplitudes is not None:
            offsets = np.full((self.n_frames, 2), np.nan)
            for i, g in enumerate(self._geometries):
                if g is not None:
                    offsets[i] = g.offset
            results = SessionResults(
                rows=self._sites.rows, cols=self._sites.cols, done=self._done.copy(),
                amplitude=self._amplitudes.copy(), flags=self._flags.copy(), offset=offsets,
                background=self._backgrounds.copy(), frame_warnings=tuple(tuple(w) for w in self._warnings),
                offset_sigma=np.array([o[1] for o in self._offsets], float).reshape(-1, 2),
                offset_method=tuple(o[0] for o in self._offsets))
        fidelity = self._fidelity.to_dict() if self._fidelity is not None else None
        return SessionRecord(
            frames_source=self._frames_source, frames_dataset=self._frames_dataset, n_frames=self.n_frames,
            frame_shape=self.frame_shape, current_index=self._index,
            calibration=None if self._calibration is None else self._calibration.to_dict(),
            calibration_origin=dataclasses.asdict(self._origin),
            undo=tuple(None if c is None else c.to_dict() for c in self._undo[-20:]),
            settings=dict(self._settings), fidelity=fidelity,
            frames=(self._frame_reader(), self.n_frames) if self._frames is not None and self._frames_source is None
            else None,
            results=results)

    @classmethod
    def open(cls, path) -> "Session":
        """Reopen a session saved by :meth:`save` (frames are reloaded from their file)."""
        from latticeread.io.session_file import read_session

        record = read_session(path)
        session = cls(settings={k: v for k, v in record.settings.items() if k in DEFAULT_SETTINGS})
        session.restore(record, path=Path(path))
        return session

    def restore(self, record, *, path: Path | None = None) -> None:
        """Fill this (fresh) session from a :class:`~latticeread.io.session_file.SessionRecord`."""
        from latticeread.core.calibration import Calibration

        source = record.frames_source
        if source:
            self.open_frames(source, dataset=record.frames_dataset)
        elif record.frames is not None:
            self.set_frames(record.frames)
        if self._frames is not None and record.n_frames not in (None, self.n_frames):
            raise FrameFileError(f"{Path(source).name if source else 'the frames'} now holds {self.n_frames} "
                                 f"frames but the session was saved with {record.n_frames}")
        if record.calibration is not None:
            origin = CalibrationOrigin("session", path=None if path is None else str(path))
            if record.calibration_origin:
                origin = CalibrationOrigin(**{k: v for k, v in record.calibration_origin.items()
                                              if k in ("kind", "path", "stack", "edited")})
            self.set_calibration(Calibration.from_dict(record.calibration), record=False, origin=origin)
        self._undo = [None if c is None else Calibration.from_dict(c) for c in record.undo]
        self.undo_changed.emit(self.can_undo, self.can_redo)
        if record.results is not None and self._calibration is not None:
            self._restore_results(record.results)
        if record.fidelity is not None and self._done.size and self._done.all():
            self._restore_fidelity(record.fidelity)
        self.set_index(int(record.current_index))
        self._set_modified(False)
        if path is not None:
            self.message.emit(f"session {path.name} opened")

    def _restore_fidelity(self, data: dict) -> None:
        from latticeread.core.fidelity import FidelityReport
        from latticeread.errors import FidelityError

        try:
            report = FidelityReport.from_dict(data)
        except (FidelityError, KeyError, TypeError, ValueError) as exc:
            self.message.emit(f"the stored fidelity estimate was dropped ({exc}); estimate it again")
            return
        self._set_fidelity(report)

    def _restore_results(self, res) -> None:
        rec = self.reconstructor()
        sites = rec.sites
        if not (np.array_equal(res.rows, sites.rows) and np.array_equal(res.cols, sites.cols)):
            self.message.emit("stored results do not match the calibration's sites; they were dropped")
            return
        if res.amplitude.shape[0] != self.n_frames:
            self.message.emit("stored results do not match the number of frames; they were dropped")
            return
        geom = self._calibration.geometry
        done = np.asarray(res.done, dtype=bool)
        self._sites = sites
        self._amplitudes = res.amplitude
        self._flags = res.flags
        self._done = done
        self._backgrounds = res.background
        self._warnings = [tuple(w) for w in res.frame_warnings] or [()] * self.n_frames
        self._checks = [None] * self.n_frames  # a saved session keeps the warnings, not the numbers
        methods = tuple(res.offset_method) if len(res.offset_method) == self.n_frames else ("",) * self.n_frames
        sigmas = res.offset_sigma if res.offset_sigma is not None and len(res.offset_sigma) == self.n_frames \
            else np.full((self.n_frames, 2), np.nan)
        self._offsets = [(str(m), (float(s[0]), float(s[1]))) for m, s in zip(methods, sigmas)]
        self._geometries = [geom.with_offset(res.offset[i]) if done[i] else None for i in range(self.n_frames)]
        self.amplitudes_changed.emit(tuple(int(i) for i in np.flatnonzero(done)))
        self._refresh_threshold_result()
        self.classification_changed.emit()

    # ------------------------------------------------------------------ export
    def export_sites_csv(self, path) -> None:
        """Per-site table of every reconstructed frame (latticeread.io.write_sites_csv)."""
        from latticeread.io import write_sites_csv

        write_sites_csv(path, self._export_results(), calibration=self._calibration,
                        metadata=self._export_metadata(), protect=self._protected())
        self.message.emit(f"per-site table written to {Path(path).name}")

    def export_occupation_hdf5(self, path) -> None:
        """Occupation matrices and amplitudes (latticeread.io.write_occupation_hdf5)."""
        from latticeread.io import write_occupation_hdf5

        write_occupation_hdf5(path, self._export_results(), calibration=self._calibration,
                              metadata=self._export_metadata(), protect=self._protected())
        self.message.emit(f"occupation matrices written to {Path(path).name}")

    def export_calibration(self, path) -> None:
        from latticeread.io import save_calibration

        save_calibration(path, self._require_calibration("export a calibration"), protect=self._protected())
        self.message.emit(f"calibration written to {Path(path).name}")

    def _export_results(self):
        """Classified results of every reconstructed frame, produced one at a time."""
        if not self._done.any():
            raise ExportError("nothing to export yet: reconstruct the frames first")
        return (self.result(int(i)) for i in np.flatnonzero(self._done))

    def _export_metadata(self) -> dict:
        meta = {"inputs": [self._frames_source] if self._frames_source else [],
                "program_version": __version__}
        if self._threshold_result is not None:
            meta["threshold"] = self._threshold_result.to_dict()
        if self._fidelity is not None and hasattr(self._fidelity, "to_dict"):
            meta["fidelity"] = self._fidelity.to_dict()
        return meta

    def _protected(self) -> list:
        """Input files that an output must never overwrite (the frames, a loaded calibration file)."""
        protect = [self._frames_source] if self._frames_source else []
        if self._origin.kind == "file" and self._origin.path:
            protect.append(self._origin.path)
        return protect



def _frames_for_calibration(frame, n: int, name: str) -> np.ndarray:
    """The first ``n`` frames for calibrating; a frame without any finite pixel is refused by name.

    NaN pixels are kept everywhere (they flag their sites), but a frame that is NaN or
    infinite everywhere holds nothing to calibrate from. Warnings of the frame reader while
    reading (constant frame, saturation) are logged; calibrating reports what follows from them.
    """
    import warnings

    images = []
    for i in range(n):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            image = frame(i)
        if image.dtype.kind == "f" and not np.isfinite(image).any():
            raise FrameError(f"frame {i} of {name} has no finite pixel (NaN or infinite everywhere); it cannot be "
                             "calibrated from: was the camera triggered?")
        for w in caught:
            log.warning("%s", w.message)
        images.append(image)
    return np.stack(images)


def _per_frame(calibration) -> bool:
    """True when ``calibration`` has each frame classified against its own histogram's fit."""
    return calibration is not None and calibration.threshold is None \
        and calibration.threshold_policy.kind == "per_frame"


def _differs(a, b) -> bool:
    if a is b:
        return False
    if a != b:
        return True
    ka, kb = getattr(a, "kernel", None), getattr(b, "kernel", None)
    if ka is not None or kb is not None:
        return ka is None or kb is None or not np.array_equal(ka, kb)
    return False


def _same_arrays(a, b) -> bool:
    return not _differs(a.psf, b.psf)


def _json_default(obj):
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if dataclasses.is_dataclass(obj):
        return dataclasses.asdict(obj)
    raise TypeError(f"cannot store {type(obj).__name__} in a session file")
