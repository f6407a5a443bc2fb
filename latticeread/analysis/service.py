"""Frames + calibration in, per-frame results out: the policies every front end shares.

* Frames are opened with :func:`open_stack`: NaN/inf pixels are kept for the reconstruction,
  which flags the sites that rely on them (or fails the frame when the calibration's
  :class:`~latticeread.core.calibration.FramePolicy` says so), in every front end alike.
* The threshold follows the calibration's
  :attr:`~latticeread.core.calibration.Calibration.threshold_policy`. A calibration from
  ``calibrate`` (or the window) carries a fixed threshold, fitted on the pooled histogram of
  its frames. Without one, the default policy is **pooled**: one threshold from the
  histogram of every frame of a stack (one input file) together
  (:func:`latticeread.core.pipeline.pooled_threshold`; the amplitudes are sorted first, so
  the order in which frames were reconstructed cannot change it in the last bits). A pooled
  threshold needs the whole stack: :func:`analyse_stack` reconstructs every frame first, a
  batch or a watch classifies the shots of a file when the last of them is back
  (:func:`classify_records`). ``per_frame`` fits each frame's own histogram.
* :class:`FrameAnalyser` reconstructs shots given by (file, hash, frame) keys or frames in
  memory; it is what every worker of :mod:`latticeread.analysis.executor` runs.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
from collections import OrderedDict
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from latticeread.core.calibration import Calibration
from latticeread.errors import FrameFileError, LatticeReadError, ReconstructionError
from latticeread.io.run_file import ShotKey, ShotRecord

__all__ = ["ShotFailure", "FrameAnalyser", "open_stack", "close_stack", "hash_file", "frame_digest", "frame_digests",
           "shot_record", "classify_records", "analyse_stack", "merge_calibration"]

log = logging.getLogger(__name__)

#: PSF parameters that describe the optics (not measurable from the frames), nanometres / NA.
OPTICS_KEYS = ("wavelength_nm", "numerical_aperture", "pixel_size_nm")


def open_stack(path, calibration: Calibration | None = None, *, dataset: str | None = None):
    """Open a frame file the way every front end does.

    NaN/inf pixels are kept (the calibration's frame policy decides what they do, in the
    reconstruction); with a calibration, its camera's saturation value is used and the frame
    size is checked.

    Parameters
    ----------
    path : str or PathLike
        TIFF, HDF5, ``.npy`` or ``.npz`` file of frames in counts.
    calibration : Calibration, optional
    dataset : str, optional
        Dataset inside an HDF5/.npz file.

    Returns
    -------
    FrameStack

    Raises
    ------
    FrameFileError, FrameError, CalibrationError
        As :func:`latticeread.io.frames.load_frames`.
    """
    from latticeread.io.frames import load_frames  # imported late: heavy readers

    if calibration is None:
        return load_frames(path, dataset=dataset, nonfinite="keep")
    shape = tuple(int(s) for s in calibration.frame_shape)
    return load_frames(path, dataset=dataset, nonfinite="keep", saturation=calibration.camera.saturation,
                       frame_shape=None if shape == (0, 0) else shape)


def close_stack(stack) -> None:
    close = getattr(stack, "close", None)
    if callable(close):
        with contextlib.suppress(Exception):
            close()


@dataclass(frozen=True)
class ShotFailure:
    """A shot (or a whole file, ``key.frame_index == -1``) that could not be reconstructed.

    Attributes
    ----------
    key : ShotKey
    error : str
        Exception class name (``FrameFileError``, ``LatticeNotFound``...).
    reason : str
        The message, written for a physicist.
    """

    key: ShotKey
    error: str
    reason: str


def shot_record(key: ShotKey, result) -> ShotRecord:
    """Turn a pipeline ``FrameResult`` into the record stored in the run file.

    Parameters
    ----------
    key : ShotKey
        The shot's file, hash and frame index.
    result : FrameResult
        Output of :class:`latticeread.core.pipeline.Reconstructor` for that frame.

    Returns
    -------
    ShotRecord
        Per-site values placed in (rows, cols) matrices: occupation (fill 255), amplitude
        in photons, posterior, site centres in pixels (fill NaN), flags (fill 0). Sites left
        out of the analysed region (``result.excluded``) keep occupation 255 and NaN
        amplitude and posterior, with their centres and the EXCLUDED flag.
    """
    sites = result.sites
    occupation = sites.to_matrix(np.asarray(result.occupied, dtype=np.uint8), fill=255, dtype=np.uint8)
    amplitude = sites.to_matrix(np.asarray(result.amplitudes, dtype=np.float64), fill=np.nan, dtype=np.float64)
    p_occ = sites.to_matrix(np.asarray(result.p_occupied, dtype=np.float64), fill=np.nan, dtype=np.float64)
    x = sites.to_matrix(np.asarray(sites.x, dtype=np.float64), fill=np.nan, dtype=np.float64)
    y = sites.to_matrix(np.asarray(sites.y, dtype=np.float64), fill=np.nan, dtype=np.float64)
    flags = getattr(result, "flags", None)
    flags = np.zeros(len(sites), np.uint8) if flags is None else np.asarray(flags, dtype=np.uint8)
    flags = sites.to_matrix(flags, fill=0, dtype=np.uint8)
    excluded = getattr(result, "excluded", None)
    if excluded is not None and len(excluded):
        from latticeread.core.flags import EXCLUDED

        ii, jj = excluded.rows - sites.row_min, excluded.cols - sites.col_min
        flags[ii, jj] = EXCLUDED
        x[ii, jj] = excluded.x
        y[ii, jj] = excluded.y
    geometry = result.geometry
    threshold = result.threshold
    if threshold is not None and hasattr(threshold, "threshold"):
        threshold = threshold.threshold
    fit = getattr(result, "threshold_result", None)
    fp = float(getattr(fit, "false_positive_rate", float("nan"))) if fit is not None else float("nan")
    fn = float(getattr(fit, "false_negative_rate", float("nan"))) if fit is not None else float("nan")
    warnings: list[str] = []
    for source in (result, fit, geometry.quality):
        for w in getattr(source, "warnings", ()) or ():
            if str(w) not in warnings:
                warnings.append(str(w))
    return ShotRecord(
        key=key, occupation=occupation, amplitude=amplitude, p_occupied=p_occ, x=x, y=y, flags=flags,
        offset=tuple(geometry.offset), a1=tuple(geometry.a1), a2=tuple(geometry.a2),
        threshold=float("nan") if threshold is None else float(threshold),
        peak_to_background=float(geometry.quality.peak_to_background),
        lattice_residual=float(geometry.quality.residual), warnings=tuple(warnings),
        false_positive_rate=fp, false_negative_rate=fn, origin=(int(sites.row_min), int(sites.col_min)),
        offset_sigma=tuple(float(v) for v in getattr(result, "offset_sigma", (float("nan"),) * 2)),
        offset_method=str(getattr(result, "offset_method", "") or ""),
        **_check_numbers(getattr(result, "check", None)))


def _check_numbers(check) -> dict:
    """The image-model check of a frame as run-file columns (NaN when it was not measured)."""
    if check is None:
        return {}
    return {"light_outside": float(check.outside_fraction), "model_residual": float(check.residual_ratio),
            "light_explained": float(check.explained_fraction)}


def classify_records(records: list, calibration: Calibration) -> list:
    """Apply a pooled threshold policy to the records of one or more files.

    With a fixed or per-frame threshold the records are returned as they are (each was
    classified where it was reconstructed). With the pooled policy, the finite amplitudes of
    all records of one input file are pooled, one threshold is fitted on them
    (:func:`latticeread.core.pipeline.pooled_threshold`), and every record of that file is
    classified against it. Failures pass through unchanged.

    Parameters
    ----------
    records : list of ShotRecord or ShotFailure
    calibration : Calibration

    Returns
    -------
    list
        Same length and order.
    """
    if calibration.threshold_policy.kind != "pooled":
        return list(records)
    from latticeread.core.classify import classify
    from latticeread.core.pipeline import pooled_threshold

    by_source: dict[str, list[int]] = {}
    for i, rec in enumerate(records):
        if isinstance(rec, ShotRecord):
            by_source.setdefault(rec.key.source, []).append(i)
    out = list(records)
    for rows in by_source.values():
        region = [records[i].occupation != 255 for i in rows]
        amps = np.concatenate([records[i].amplitude[m] for i, m in zip(rows, region)])
        flags = np.concatenate([records[i].flags[m] for i, m in zip(rows, region)])
        try:
            fit = pooled_threshold(amps, flags=flags, calibration=calibration)
        except ReconstructionError as exc:
            for i in rows:
                out[i] = ShotFailure(records[i].key, type(exc).__name__,
                                     f"no pooled threshold for {Path(records[i].key.source).name}: {exc}")
            continue
        for i, m in zip(rows, region):
            rec = records[i]
            occupied, p = classify(rec.amplitude[m], fit)
            occupation = rec.occupation.copy()
            occupation[m] = occupied
            p_occupied = np.full(rec.p_occupied.shape, np.nan)
            p_occupied[m] = p
            flags = _uncertain_flags(rec.flags, m, p)
            warnings = tuple(dict.fromkeys((*rec.warnings, *fit.warnings)))
            out[i] = replace(rec, occupation=occupation, p_occupied=p_occupied, flags=flags,
                             threshold=float(fit.threshold), false_positive_rate=float(fit.false_positive_rate),
                             false_negative_rate=float(fit.false_negative_rate), warnings=warnings)
    return out


def _uncertain_flags(flags, region, p):
    from latticeread.core import flags as site_flags
    from latticeread.core.pipeline import uncertain

    out = flags.copy()
    inside = out[region] & np.uint8(~site_flags.UNCERTAIN & 0xFF)
    out[region] = inside | (uncertain(p) * site_flags.UNCERTAIN).astype(np.uint8)
    return out


def hash_file(path, *, block_size: int = 1 << 20) -> str:
    """Hex BLAKE2b-128 digest of a file's bytes (32 characters): the identity of its content."""
    digest = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:
        while chunk := fh.read(block_size):
            digest.update(chunk)
    return digest.hexdigest()


def frame_digest(image) -> str:
    """Hex BLAKE2b-128 digest of one frame's pixels (32 characters): the identity of an exposure.

    The pixel type, the frame size and the raw pixel bytes as read from the input file go
    into it, so two frames have the same digest only when they hold the same numbers. With
    camera noise two different exposures practically never do; a blank or synthetic frame
    repeated in a stack does, which is why a digest is only compared with the frame stored at
    the same position of the same file (:meth:`latticeread.io.run_file.RunWriter.same_frame_stored`).

    Parameters
    ----------
    image : (H, W) ndarray
        The frame in counts, as :func:`open_stack` returns it.
    """
    image = np.ascontiguousarray(image)
    shape = "x".join(str(int(s)) for s in image.shape)
    digest = hashlib.blake2b(f"{image.dtype.str} {shape}\n".encode(), digest_size=16)
    digest.update(image.tobytes())
    return digest.hexdigest()


def frame_digests(path, indices) -> dict[int, str]:
    """:func:`frame_digest` of the frames ``indices`` of a file (read one at a time).

    Frames that cannot be read are left out (the reconstruction reports them).
    """
    import warnings

    out: dict[int, str] = {}
    try:
        stack = open_stack(path)
    except Exception:  # noqa: BLE001 - an unreadable file is reported where it is reconstructed
        return out
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # constant or saturated frames warn where reconstructed
            for i in indices:
                try:
                    out[int(i)] = frame_digest(stack[int(i)])
                except Exception:  # noqa: BLE001 - see above
                    continue
    finally:
        close_stack(stack)
    return out


def _file_identity(path) -> tuple | None:
    """(size, modification time in ns, inode, device) of a file; None when it is gone."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_size, st.st_mtime_ns, st.st_ino, st.st_dev)


def _open_verified(key: ShotKey, calibration: Calibration) -> tuple:
    """Open ``key.source`` and check that it still holds the content ``key.file_hash`` names.

    Returns ``(stack, identity)``. The file is hashed after opening; an unchanged identity
    before and after shows that the open handle and the hashed bytes are the same file.
    """
    name = Path(key.source).name
    before = _file_identity(key.source)
    stack = open_stack(key.source, calibration)
    try:
        digest = hash_file(key.source)
        after = _file_identity(key.source)
    except OSError as exc:
        close_stack(stack)
        raise FrameFileError(f"{name} cannot be read again: {exc.strerror or exc}") from exc
    if before != after or digest != key.file_hash:
        close_stack(stack)
        raise FrameFileError(f"{name} changed after it was listed for this run (replaced or still being written); "
                             "its frames were not taken. Run again to take the new version")
    return stack, after


class FrameAnalyser:
    """Reconstruct shots given by (file, hash, frame) keys, or frames in memory; one per worker.

    The :class:`~latticeread.core.pipeline.Reconstructor` (and its factorisation) is built
    once here; a few recently used files are kept open so the frames of a stack are read
    without reopening the file. BLAS runs on one thread inside (so results do not depend
    on where the shot ran; parallelism comes from the worker processes).

    Parameters
    ----------
    calibration : Calibration or str
        The calibration, or its JSON text.
    keep_open : int
        Number of input files kept open.
    """

    def __init__(self, calibration, *, keep_open: int = 2):
        if isinstance(calibration, str):
            from latticeread.io.calibration_file import calibration_from_json

            calibration = calibration_from_json(calibration)
        from threadpoolctl import ThreadpoolController

        from latticeread.core.pipeline import Reconstructor

        self.calibration: Calibration = calibration
        # One BLAS thread: the thread count changes amplitudes in the last bits, and every
        # run (this process, a pool worker, a Dask worker) must give identical results.
        self._blas = ThreadpoolController()
        with self._blas.limit(limits=1, user_api="blas"):
            self.reconstructor = Reconstructor(calibration)
        self._stacks: OrderedDict = OrderedDict()
        self._keep_open = max(1, int(keep_open))

    def _stack(self, key: ShotKey):
        """The open stack of ``key``'s file, holding exactly the content ``key.file_hash`` names.

        Open stacks are cached by (path, content hash) and remembered with the file's size,
        modification time and inode: a file replaced or rewritten under the same name is a
        new input, opened (and checked against its hash) again, never read from a stale
        handle.
        """
        cache_key = (key.source, key.file_hash)
        entry = self._stacks.pop(cache_key, None)
        if entry is not None and entry[1] != _file_identity(key.source):
            close_stack(entry[0])
            entry = None
        if entry is None:
            entry = _open_verified(key, self.calibration)
        self._stacks[cache_key] = entry
        while len(self._stacks) > self._keep_open:
            close_stack(self._stacks.popitem(last=False)[1][0])
        return entry[0]

    def __call__(self, key: ShotKey) -> ShotRecord | ShotFailure:
        """Reconstruct one shot; every exception becomes a :class:`ShotFailure`."""
        name = Path(key.source).name
        try:
            stack = self._stack(key)
            # the declared frame size, before a pixel is decoded
            self.calibration.check_frame_shape(tuple(stack.frame_shape), where=f"the frames of {name}")
            seen = len(getattr(stack, "warnings", ()))
            image = stack[key.frame_index]
            digest = frame_digest(image)  # before the pipeline sees the pixels
            load_warnings = tuple(getattr(stack, "warnings", ())[seen:])  # constant frame, saturation...
            if np.ndim(image) != 2:
                raise ReconstructionError(f"frame {key.frame_index} of {name} has {np.ndim(image)} dimensions; "
                                          "a frame must be a 2-D image")
            self.calibration.check_frame_shape(np.shape(image), where=f"frame {key.frame_index} of {name}")
            with self._blas.limit(limits=1, user_api="blas"):
                result = self.reconstructor(image, frame_index=key.frame_index,
                                            where=f"frame {key.frame_index} of {name}")
            record = replace(shot_record(key, result), frame_digest=digest)
            if load_warnings:
                record = replace(record, warnings=tuple(dict.fromkeys((*load_warnings, *record.warnings))))
            return record
        except LatticeReadError as exc:
            self._forget(key)
            return ShotFailure(key, type(exc).__name__, str(exc))
        except Exception as exc:  # noqa: BLE001 - a bug on one shot must not stop thousands
            self._forget(key)
            log.warning("unexpected error on frame %d of %s", key.frame_index, key.source, exc_info=True)
            return ShotFailure(key, type(exc).__name__, f"internal error on frame {key.frame_index} of {name}: "
                                                        f"{type(exc).__name__}: {exc}")

    def _forget(self, key: ShotKey) -> None:
        entry = self._stacks.pop((key.source, key.file_hash), None)
        if entry is not None:
            close_stack(entry[0])

    def extract(self, index: int, image, *, where: str) -> tuple:
        """Amplitudes of one frame in memory (no classification): the session's unit of work.

        Returns
        -------
        tuple
            ``(index, geometry, amplitudes (photons), flags, background (photons/pixel),
            warnings, frame check, (offset method, offset 1-sigma (x, y) in pixels))``; the
            check is a :class:`~latticeread.core.frame_check.FrameCheck` or None.
        """
        with self._blas.limit(limits=1, user_api="blas"):
            g, amp, w = self.reconstructor.extract_full(image, where=where)
        return (int(index), g, np.asarray(amp.amplitudes, dtype=float), np.asarray(amp.flags, dtype=np.uint8),
                float(np.mean(amp.background)), tuple(str(x) for x in w), self.reconstructor.last_check,
                self.reconstructor.last_offset)

    def close(self) -> None:
        while self._stacks:
            close_stack(self._stacks.popitem()[1][0])


def analyse_stack(frames: Iterable, calibration: Calibration, *, mask=None,
                  progress: Callable[[int, int], None] | None = None) -> Iterator:
    """Reconstruct and classify the frames of one stack under the calibration's policies.

    Parameters
    ----------
    frames : (n, H, W) ndarray, FrameStack or iterable of (H, W) arrays
        Raw camera frames in counts (open files with :func:`open_stack`).
    calibration : Calibration
        Its options, threshold policy and frame policy decide everything; front ends change
        settings by changing the calibration (so the settings are saved with the results).
    mask : (H, W) ndarray of bool, optional
        Pixels to use.
    progress : callable(done, total), optional
        Called after each frame's reconstruction (``total`` is -1 when unknown).

    Yields
    ------
    FrameResult
        In frame order (:func:`latticeread.core.pipeline.reconstruct_stack`: with the pooled
        policy every frame is reconstructed before the first is yielded).
    """
    from latticeread.core.pipeline import reconstruct_stack

    yield from reconstruct_stack(frames, calibration, mask=mask, progress=progress)


def merge_calibration(new: Calibration, *, base: Calibration | None) -> Calibration:
    """A calibration made from frames, keeping what the user had given in ``base``.

    Calibrating from frames estimates the lattice, the PSF and the threshold; what it cannot
    measure must not be lost: ``pixel_size_nm`` is taken from ``base`` when the new one has
    none, and so are the optics of the PSF (:data:`OPTICS_KEYS`: wavelength, NA, pixel size)
    that the new PSF lacks, and so is the analysed region the user drew (shapes in pixels;
    single excluded sites are carried over by position, to the site of the new lattice
    nearest to where they were). What was kept is listed in ``notes["kept_from_previous"]``.

    Parameters
    ----------
    new : Calibration
        Made by :func:`latticeread.core.pipeline.calibrate`.
    base : Calibration or None
        The calibration in force before.

    Returns
    -------
    Calibration
    """
    import dataclasses

    if base is None:
        return new
    kept: list[str] = []
    merged = new
    if new.pixel_size_nm is None and base.pixel_size_nm is not None:
        merged = merged.replace(pixel_size_nm=base.pixel_size_nm)
        kept.append("pixel_size_nm")
    params = dict(new.psf.params or {})
    optics = {k: base.psf.params[k] for k in OPTICS_KEYS if k in (base.psf.params or {}) and params.get(k) is None}
    if optics:
        merged = merged.replace(psf=dataclasses.replace(new.psf, params={**params, **optics}))
        kept.extend(f"psf.{k}" for k in optics)
    region = base.options.region
    if new.options.region.is_everything and not region.is_everything:
        from latticeread.core.region import SiteRegion

        sites = ()
        if region.excluded_sites:
            rc = np.asarray(region.excluded_sites, dtype=float)
            x, y = base.geometry.site_positions(rc[:, 0], rc[:, 1])
            fr, fc = new.geometry.fractional_indices(x, y)
            sites = tuple(zip(np.rint(fr).astype(int).tolist(), np.rint(fc).astype(int).tolist()))
        merged = merged.with_options(region=SiteRegion(region.include, region.exclude, sites))
        kept.append("reconstruction.region")
    if kept:
        merged = merged.replace(notes={**merged.notes, "kept_from_previous": kept})
    return merged
