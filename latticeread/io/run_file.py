"""The results file: one HDF5 layout for every run (batch, watch, reconstruct, session save).

A run file collects the reconstruction of many shots. It is appended to a block of shots
at a time; a run that is killed, interrupted or stopped by a full disk leaves a readable
file holding every shot committed before, and running the same command again skips those
shots (each is keyed by the input file path, a content hash of the file and the frame
index inside it). Each row also carries a digest of the frame's pixels: when an input changes
after some of its frames were stored (a camera that appends frames to one file and paused,
a file that grew between two batch runs), the new version is a new input, and its frames
whose pixels equal the stored frame at the same position of the same file are the same
exposures, so they are not stored again (:attr:`RunWriter.stored_digests`).

Safety
------
* **Crash at any instant.** The file is written in HDF5's single-writer/multiple-reader
  (SWMR) mode (``libver="latest"``): the library orders its metadata writes so that the
  file on disk is consistent at every instant, which is what makes a concurrent reader
  possible and equally what a SIGKILL leaves behind. New rows become part of the result
  only when the two-element ``committed`` dataset (shots, failures) is updated, after the
  rows themselves are flushed; rows beyond the committed counts are ignored and
  overwritten. A file whose writer died is rebuilt from its committed rows (into a
  temporary file, then renamed) the next time a writer opens it.
* **Power loss.** Flushing hands the data to the operating system, which may keep them in
  memory for many seconds. Each commit therefore calls ``fsync`` twice: after the rows
  (so they are on the disk before the counter can say they exist) and after the counter (so
  a committed block survives a power cut). The cost is measured in
  ``bench/bench_faults.py --fsync`` (:data:`SYNC_TO_DISK` turns it off for that comparison).
* **Full disk.** Before every block the writer reserves disk blocks for an upper bound of
  what the block adds (:func:`latticeread.io.atomic.reserve_space`); when the disk cannot
  hold it, :class:`~latticeread.io.atomic.DiskFullError` is raised before anything is
  written.
* **One writer.** A writer holds :class:`~latticeread.io.run_lock.RunFileLock` (a lock file
  with its pid) from before the file is created until it is closed; a second writer stops
  with a message naming the first. Readers take no lock and are never blocked: open the
  file with ``h5py.File(path, "r", swmr=True)`` or :func:`read_run`.

Layout (format version 5; all per-frame datasets share the first axis)
---------------------------------------------------------------------
Root attributes (written when the file is created, never changed)
    ``format`` = ``"latticeread-run"``, ``format_version``, ``program_version``,
    ``calibration`` (the calibration as JSON text), ``created`` (UTC ISO time),
    ``metadata`` (JSON text: command, inputs...).
``committed`` (2,) int64
    Number of complete frame rows and failure rows. Rows beyond these are not part of the
    file (an interruption cut them short).
``frames/`` (one row per committed frame; a shot of several images has one row per image.
    Called ``shots/`` up to format version 3: same columns, read as they are, renamed when a
    writer resumes such a file)
    ``source`` (UTF-8 bytes, absolute input path), ``file_hash`` (bytes, hex BLAKE2b-128 of
    the file), ``frame_index`` (int64, frame inside that file), ``offset``, ``a1``, ``a2``
    ((n, 2) float64, lattice offset and vectors ``(x, y)`` in pixels used for that frame),
    ``threshold`` (float64, photons), ``false_positive_rate``, ``false_negative_rate``
    (float64, misread probabilities per site from the threshold fit; NaN for a fixed
    threshold without a fit), ``n_sites``, ``n_occupied`` (int64), ``filling``
    (float64, occupied / valid sites), ``peak_to_background``, ``lattice_residual``
    (float64, lattice fit diagnostics), ``warnings`` (UTF-8 bytes, one warning per line),
    ``written_at`` (float64, Unix time of writing), ``light_outside``, ``model_residual``,
    ``light_explained`` (float64, does the site model explain the frame; format version 3,
    :mod:`latticeread.core.frame_check`), ``frame_digest`` (bytes, hex BLAKE2b-128 of the
    frame's pixel type, size and raw pixel bytes as read from the input; format version 5,
    empty in rows of older files and where the frames did not come from a file),
    ``offset_sigma`` ((n, 2) float64, 1-sigma error of the offset's x and y in pixels; NaN
    where the method gives none) and ``offset_method`` (bytes: how the offset was found,
    ``atoms``, ``sites``, ``model``, ``fourier`` or ``calibration``,
    :attr:`latticeread.core.pipeline.FrameResult.offset_method`) (format version 6; NaN and
    empty in rows of older files).
``occupation`` (n, rows, cols) uint8
    1 occupied, 0 empty, 255 outside the reconstructed region.
``amplitude``, ``p_occupied``, ``x``, ``y`` (n, rows, cols) float64
    Site amplitude in photons, posterior probability of occupation, site centre in pixels;
    NaN outside the region.
``flags`` (n, rows, cols) uint8
    Per-site quality flags (:mod:`latticeread.core.flags`), 0 outside the region.
``failures/`` (one row per failed shot)
    ``source``, ``file_hash``, ``frame_index`` (-1 when the whole file could not be
    read), ``error`` (exception class name), ``reason`` (message), ``resolved`` (bool, a
    later retry succeeded), ``written_at``.

Text is stored as fixed-length UTF-8 bytes (SWMR cannot append variable-length strings
safely); a text longer than its field ends in ``" [cut]"``. Files of every earlier version
are read as they are (missing columns read as NaN, zero or empty text) and copied into the
current layout when a writer resumes them; their rows keep an empty ``frame_digest``
("pixels not recorded"), so a frame of theirs cannot be recognised in a changed input.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import logging
import os
import signal
import threading
import time
import types
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from latticeread import __version__
from latticeread.errors import ExportError, FrameFileError
from latticeread.io.formats import check_format_version

from .atomic import atomic_path, clean_stale_temps, describe_os_error, reserve_space
from .run_lock import RunFileLock

__all__ = [
    "RUN_FORMAT",
    "RUN_FORMAT_VERSION",
    "ShotKey",
    "ShotRecord",
    "RunWriter",
    "RunData",
    "RunFailures",
    "read_run",
    "open_run_for_reading",
    "describe_keys",
]

log = logging.getLogger(__name__)

RUN_FORMAT = "latticeread-run"
RUN_FORMAT_VERSION = 6

#: Call fsync after the rows and after the committed counter of every block (see Safety).
#: Only the benchmark turns this off, to measure what it costs.
SYNC_TO_DISK = True

#: Bytes of each text field (a Linux path is at most 4096 bytes).
_TEXT = {"source": 4096, "file_hash": 64, "warnings": 4096, "error": 128, "reason": 4096, "frame_digest": 64,
         "offset_method": 16}
_CUT = " [cut]"
#: per-shot scalar/vector columns of ``shots/``: name -> (dtype, trailing shape)
_SHOT_COLUMNS = {
    "source": (f"S{_TEXT['source']}", ()),
    "file_hash": (f"S{_TEXT['file_hash']}", ()),
    "frame_index": (np.int64, ()),
    "offset": (np.float64, (2,)),
    "a1": (np.float64, (2,)),
    "a2": (np.float64, (2,)),
    "threshold": (np.float64, ()),
    "false_positive_rate": (np.float64, ()),
    "false_negative_rate": (np.float64, ()),
    "n_sites": (np.int64, ()),
    "n_occupied": (np.int64, ()),
    "filling": (np.float64, ()),
    "peak_to_background": (np.float64, ()),
    "lattice_residual": (np.float64, ()),
    "warnings": (f"S{_TEXT['warnings']}", ()),
    "written_at": (np.float64, ()),
    "origin": (np.int64, (2,)),
    "light_outside": (np.float64, ()),
    "model_residual": (np.float64, ()),
    "light_explained": (np.float64, ()),
    "frame_digest": (f"S{_TEXT['frame_digest']}", ()),
    "offset_sigma": (np.float64, (2,)),
    "offset_method": (f"S{_TEXT['offset_method']}", ()),
}
#: Columns added in format version 3 (NaN in the rows of older files).
_CHECK_COLUMNS = ("light_outside", "model_residual", "light_explained")
#: Number columns that read as NaN in the rows of files that lack them.
_NAN_COLUMNS = _CHECK_COLUMNS + ("offset_sigma",)
#: Units and meaning written as dataset attributes (``units``, ``description``).
_DESCRIPTIONS = {
    "occupation": ("1 occupied, 0 empty, 255 outside the region", "site occupation"),
    "amplitude": ("photons", "site amplitude"),
    "p_occupied": ("probability", "posterior probability of occupation"),
    "x": ("pixels (column; centre of pixel (0,0) at 0)", "site centre x"),
    "y": ("pixels (row, downwards; centre of pixel (0,0) at 0)", "site centre y"),
    "flags": ("bit field, see latticeread.core.flags", "site quality bits (0 = reliable)"),
    "frames/offset": ("pixels (x, y)", "position of lattice site (0, 0) in the frame"),
    "frames/a1": ("pixels (x, y)", "first lattice vector"),
    "frames/a2": ("pixels (x, y)", "second lattice vector"),
    "frames/threshold": ("photons", "occupancy threshold"),
    "frames/origin": ("lattice sites (row, col)", "site of matrix element [0, 0]"),
    "frames/frame_index": ("index (0-based)", "frame inside the input file"),
    "frames/written_at": ("seconds since 1970 (Unix time)", "when the frame's row was committed"),
    "frames/light_outside": ("fraction", "light above background outside the analysed region"),
    "frames/model_residual": ("ratio (1 = camera noise)", "image-model residual over the expected noise"),
    "frames/light_explained": ("fraction", "bright light the site model accounts for"),
    "frames/frame_digest": ("hex BLAKE2b-128 (empty: not recorded)",
                            "digest of the frame's pixel type, size and raw pixel bytes"),
    "frames/offset_sigma": ("pixels (x, y)", "1-sigma error of the lattice offset (NaN: not estimated)"),
    "frames/offset_method": ("text", "how the frame's lattice offset was found (empty: not recorded)"),
}
#: per-site matrices: name -> (dtype, fill value outside the region)
_MATRICES = {
    "occupation": (np.uint8, 255),
    "amplitude": (np.float64, np.nan),
    "p_occupied": (np.float64, np.nan),
    "x": (np.float64, np.nan),
    "y": (np.float64, np.nan),
    "flags": (np.uint8, 0),
}
#: HDF5 chunk of the matrices (one shot, up to 64 x 64 sites); rows and cols are unlimited
#: because the matrix size is known only when the first shot arrives.
_MATRIX_CHUNK = (1, 64, 64)
_FAILURE_COLUMNS = {
    "source": f"S{_TEXT['source']}",
    "file_hash": f"S{_TEXT['file_hash']}",
    "frame_index": np.int64,
    "error": f"S{_TEXT['error']}",
    "reason": f"S{_TEXT['reason']}",
    "resolved": np.bool_,
    "written_at": np.float64,
}
#: Extra bytes reserved per block for HDF5 metadata (chunk index, object headers).
_METADATA_MARGIN = 1 << 20


@dataclass(frozen=True, order=True)
class ShotKey:
    """Identity of one shot: which file (path and content) and which frame in it.

    Attributes
    ----------
    source : str
        Absolute path of the input file.
    file_hash : str
        Hex BLAKE2b-128 digest of the file bytes (32 characters).
    frame_index : int
        0-based frame inside the file; -1 stands for "the whole file" (used for failures
        where the file could not be opened at all).
    """

    source: str
    file_hash: str
    frame_index: int


@dataclass(frozen=True)
class ShotRecord:
    """Everything stored for one completed shot (one frame).

    Attributes
    ----------
    key : ShotKey
        Input file, its hash and the frame index.
    occupation : (rows, cols) ndarray of uint8
        1 occupied, 0 empty, 255 outside the region.
    amplitude, p_occupied, x, y : (rows, cols) ndarray of float64
        Amplitude (photons), posterior of occupation, site centre (pixels); NaN outside.
    flags : (rows, cols) ndarray of uint8
        Site quality flags; 0 outside the region.
    offset, a1, a2 : (2,) tuple of float
        Lattice offset and vectors ``(x, y)`` in pixels used for this shot.
    threshold : float
        Occupancy threshold in photons.
    peak_to_background, lattice_residual : float
        Lattice fit diagnostics of the shot (NaN if not available).
    warnings : tuple of str
        Reasons the shot may mislead.
    false_positive_rate, false_negative_rate : float
        Misread probabilities per site from the threshold fit (NaN if not available).
    origin : (2,) tuple of int
        Lattice indices ``(row, col)`` of matrix element ``[0, 0]``: element ``[i, j]`` is
        site ``(origin[0] + i, origin[1] + j)``.
    light_outside, model_residual, light_explained : float
        Does the site model explain the shot (:mod:`latticeread.core.frame_check`): share of
        the light above background outside the analysed region, residual over the camera's
        expected noise (1 = as expected), share of the bright light the model accounts for;
        NaN when not measured.
    frame_digest : str
        Hex BLAKE2b-128 of the frame's pixels (:func:`latticeread.analysis.service.frame_digest`);
        empty when unknown.
    offset_sigma : (2,) tuple of float
        1-sigma error of ``offset`` (x, y), pixels; NaN when the method gives none.
    offset_method : str
        How ``offset`` was found (:attr:`latticeread.core.pipeline.FrameResult.offset_method`);
        empty when unknown.
    """

    key: ShotKey
    occupation: np.ndarray
    amplitude: np.ndarray
    p_occupied: np.ndarray
    x: np.ndarray
    y: np.ndarray
    flags: np.ndarray
    offset: tuple[float, float]
    a1: tuple[float, float]
    a2: tuple[float, float]
    threshold: float
    peak_to_background: float = float("nan")
    lattice_residual: float = float("nan")
    warnings: tuple[str, ...] = ()
    false_positive_rate: float = float("nan")
    false_negative_rate: float = float("nan")
    origin: tuple[int, int] = (0, 0)
    light_outside: float = float("nan")
    model_residual: float = float("nan")
    light_explained: float = float("nan")
    frame_digest: str = ""
    offset_sigma: tuple[float, float] = (float("nan"), float("nan"))
    offset_method: str = ""

    @property
    def matrix_shape(self) -> tuple[int, int]:
        return tuple(int(s) for s in np.shape(self.occupation))

    @property
    def n_sites(self) -> int:
        """Number of sites inside the region (occupation != 255)."""
        return int(np.count_nonzero(np.asarray(self.occupation) != 255))

    @property
    def n_occupied(self) -> int:
        return int(np.count_nonzero(np.asarray(self.occupation) == 1))

    @property
    def filling(self) -> float:
        """Fraction of region sites that are occupied (NaN for an empty region)."""
        n = self.n_sites
        return self.n_occupied / n if n else float("nan")


def _now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _canonical_json(text_or_dict) -> str:
    data = json.loads(text_or_dict) if isinstance(text_or_dict, str) else text_or_dict
    return json.dumps(data, sort_keys=True, separators=(",", ":"))


def _calibration_identity(text: str) -> str:
    """Calibration JSON in canonical form, without the program version.

    ``notes`` is kept: the pipeline reads settings from it (e.g. ``index_bounds``), so a
    calibration with other notes may give other results.
    """
    data = json.loads(text)
    if isinstance(data, dict):
        data = {k: v for k, v in data.items() if k != "program_version"}
    return _canonical_json(data)


def describe_keys(keys, *, max_files: int = 5) -> str:
    """Shots named for a person: ``"a.tif frames 0-7, b.tif frame 2 (and 3 more files)"``."""
    by_file: dict[str, list[int]] = {}
    for key in keys:
        by_file.setdefault(Path(key.source).name, []).append(int(key.frame_index))
    if not by_file:
        return "none"
    parts = []
    for name, frames in list(by_file.items())[:max_files]:
        frames = sorted(set(frames))
        if frames == [-1]:
            parts.append(f"{name} (whole file)")
            continue
        runs, start = [], frames[0]
        for a, b in zip(frames, frames[1:] + [None]):
            if b != a + 1:
                runs.append(f"{start}" if start == a else f"{start}-{a}")
                start = b
        parts.append(f"{name} frame{'s' if len(frames) > 1 else ''} {', '.join(runs)}")
    more = len(by_file) - max_files
    return ", ".join(parts) + (f" (and {more} more file{'s' if more > 1 else ''})" if more > 0 else "")


def _encode_text(values, width: int) -> np.ndarray:
    """UTF-8 bytes of each text, cut to ``width`` bytes (ending in " [cut]") when longer.

    File names that are not valid UTF-8 keep their raw bytes (``surrogateescape``), so
    every path the operating system gives round-trips exactly.
    """
    out = []
    for text in values:
        raw = str(text).encode("utf-8", "surrogateescape")
        if len(raw) > width:
            raw = raw[:width - len(_CUT)].decode("utf-8", "ignore").encode("utf-8") + _CUT.encode()
        out.append(raw)
    return np.array(out, dtype=f"S{width}")


def _decode_text(ds, stop: int) -> np.ndarray:
    """Text column (fixed bytes in version 2, variable strings in version 1) as str array."""
    if stop == 0:
        return np.zeros(0, dtype=str)
    if ds.dtype.kind == "S":
        return np.char.decode(ds[:stop], "utf-8", "surrogateescape")
    return np.asarray(ds.asstr()[:stop], dtype=object).astype(str)


#: Group of the per-frame rows (one row per frame; a shot of several images has several rows).
ROWS_GROUP = "frames"


def _rows(f: h5py.File):
    """The per-frame rows of a run file: ``frames/`` (format 4 on), ``shots/`` in older files."""
    return f[ROWS_GROUP] if ROWS_GROUP in f else f["shots"]


def _counts(f: h5py.File) -> tuple[int, int]:
    """Committed (shots, failures) of a version 2 or version 1 file."""
    if "committed" in f:
        n, nf = (int(v) for v in f["committed"][:2])
    else:
        n, nf = int(f.attrs["n_shots"]), int(f.attrs["n_failures"])
    # Defensive: never claim rows a dataset does not have.
    n = min([n] + [_rows(f)[c].shape[0] for c in ("source", "frame_index")])
    nf = min([nf] + [f["failures"][c].shape[0] for c in ("source", "frame_index")])
    return n, nf


def open_run_for_reading(path) -> h5py.File:
    """Open a run file read-only without blocking or being blocked by its writer.

    Version 2 files are opened in SWMR read mode (a live writer may be appending; a file
    whose writer was killed is readable too); older files, and other HDF5 files, are
    opened normally.

    Raises
    ------
    FrameFileError
        Missing, not HDF5, or unreadable.
    """
    path = Path(os.fspath(path))
    if not path.exists():
        raise FrameFileError(f"the run file {path} does not exist")
    try:
        return h5py.File(path, "r", swmr=True, locking=False)
    except OSError:
        pass
    try:
        return h5py.File(path, "r", locking=False)
    except OSError as exc:
        raise FrameFileError(f"{path} cannot be opened as an HDF5 run file: {exc}") from exc


@contextlib.contextmanager
def _interrupt_deferred():
    """Hold back Ctrl-C (SIGINT) while a block is being committed; deliver it afterwards.

    Only the main thread can change signal handlers; elsewhere this does nothing (SIGINT
    is handled by the main thread there anyway).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    received = []
    previous = signal.getsignal(signal.SIGINT)
    try:
        signal.signal(signal.SIGINT, lambda signum, frame: received.append(frame))
    except (ValueError, TypeError):
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        if received:
            if callable(previous):
                previous(signal.SIGINT, received[-1])
            elif previous == signal.default_int_handler or previous is None:
                raise KeyboardInterrupt


def _create_layout(f: h5py.File, attrs: dict) -> None:
    """Root attributes and empty datasets of a version 2 run file (open for writing)."""
    for key, value in attrs.items():
        f.attrs[key] = value
    f.attrs["format"] = RUN_FORMAT
    f.attrs["format_version"] = RUN_FORMAT_VERSION
    f.create_dataset("committed", data=np.zeros(2, np.int64))
    shots = f.create_group(ROWS_GROUP)
    for name, (dtype, tail) in _SHOT_COLUMNS.items():
        text = np.dtype(dtype).kind == "S"
        shots.create_dataset(name, shape=(0, *tail), maxshape=(None, *tail), dtype=dtype,
                             chunks=(64 if text else 256, *tail), **({"compression": "gzip"} if text else {}))
    failures = f.create_group("failures")
    for name, dtype in _FAILURE_COLUMNS.items():
        text = np.dtype(dtype).kind == "S"
        failures.create_dataset(name, shape=(0,), maxshape=(None,), dtype=dtype, chunks=(64,),
                                **({"compression": "gzip"} if text else {}))
    for name, (dtype, fill) in _MATRICES.items():
        # gzip level 1 with byte shuffling: half the size of raw float64 at a few ms per
        # shot; level 4 compresses hardly better at twice the time.
        f.create_dataset(name, shape=(0, 0, 0), maxshape=(None, None, None), dtype=dtype, chunks=_MATRIX_CHUNK,
                         compression="gzip", compression_opts=1, shuffle=True, fillvalue=fill)
    for name, (units, description) in _DESCRIPTIONS.items():
        f[name].attrs["units"] = units
        f[name].attrs["description"] = description


def _block_bytes(n_shots: int, shape: tuple[int, int]) -> int:
    """Upper bound of the bytes a block of shots adds to the file (before compression)."""
    rows = -(-max(shape[0], 1) // _MATRIX_CHUNK[1]) * _MATRIX_CHUNK[1]
    cols = -(-max(shape[1], 1) // _MATRIX_CHUNK[2]) * _MATRIX_CHUNK[2]
    per_shot = rows * cols * sum(np.dtype(d).itemsize for d, _ in _MATRICES.values())
    per_shot += sum(np.dtype(d).itemsize * int(np.prod(t)) for d, t in _SHOT_COLUMNS.values())
    # gzip can expand incompressible data by a few bytes per block; 10 % covers it.
    return int(1.1 * n_shots * per_shot) + _METADATA_MARGIN


class RunWriter:
    """Create or resume a run file and append shots to it, a block at a time.

    Parameters
    ----------
    path : str or Path
        The run file (``.h5``). Created if missing; an existing run file is resumed.
    calibration_json : str
        The calibration as JSON text; stored as an attribute. Resuming a file made with a
        different calibration raises :class:`~latticeread.errors.ExportError`.
    metadata : dict, optional
        Free-form JSON-able information stored with the run (command line, inputs...).
    attrs : dict, optional
        Further root attributes written when the file is created (strings or numbers;
        other values are stored as JSON text).

    Raises
    ------
    ExportError
        The folder is missing or read-only, another process writes the file, the file is
        not a run file or belongs to another calibration.

    Notes
    -----
    Every :meth:`append` / :meth:`append_many` reserves disk space, writes the data rows,
    flushes, then updates the ``committed`` counts and flushes again, so an interruption
    at any point leaves the file with every complete block. Use as a context manager, or
    call :meth:`close` (which also releases the writer lock).
    """

    def __init__(self, path, *, calibration_json: str, metadata: dict | None = None, attrs: dict | None = None):
        self.path = Path(os.fspath(path))
        self._calibration_json = calibration_json
        self._metadata = dict(metadata or {})
        self._extra_attrs = dict(attrs or {})
        self._file: h5py.File | None = None
        self._done: set[ShotKey] = set()
        self._failed: dict[ShotKey, int] = {}
        self._stored: dict[tuple[str, int], set[str]] = {}  # (source, frame) -> frame digests in the file
        self._n = self._nf = 0
        self._lock = RunFileLock(self.path)
        self._open()

    # --- opening -------------------------------------------------------------------
    def _open(self) -> None:
        folder = self.path.parent if str(self.path.parent) else Path(".")
        if not folder.is_dir():
            raise ExportError(f"cannot write the run file {self.path}: the folder {folder} does not exist")
        if not os.access(folder, os.W_OK):
            raise ExportError(f"cannot write the run file {self.path}: the folder {folder} is not writable")
        try:
            self._lock.acquire()
        except ExportError as exc:
            cause = exc.__cause__
            if isinstance(cause, OSError):  # the lock file itself cannot be made
                raise ExportError(f"cannot write the run file {self.path}: the folder {folder} is not writable "
                                  f"({cause.strerror or cause})") from exc
            raise
        try:
            clean_stale_temps(folder)
            if self.path.exists():
                self._resume()
            else:
                self._create()
        except BaseException:
            self._close_file()
            self._lock.release()
            raise

    def _attrs(self) -> dict:
        extra = {k: v if isinstance(v, (str, int, float)) else json.dumps(v, default=str)
                 for k, v in self._extra_attrs.items()}
        return {**extra, "program_version": __version__, "calibration": self._calibration_json,
                "created": _now_iso(), "metadata": json.dumps(self._metadata, sort_keys=True, default=str)}

    def _create(self) -> None:
        # Build the empty file under a temporary name and rename it into place, so a
        # failure here never leaves a half-made file at the requested path.
        with atomic_path(self.path) as tmp:
            with h5py.File(tmp, "w", libver="latest") as f:
                _create_layout(f, self._attrs())
        self._file = self._open_h5()

    def _open_h5(self) -> h5py.File:
        try:
            # HDF5's own file lock is off: the writer lock (RunFileLock) keeps other writers
            # out, and a reader opening the file at this moment must not stop the run.
            f = h5py.File(self.path, "r+", libver="latest", locking=False)
        except BlockingIOError as exc:
            raise ExportError(f"the run file {self.path} is open for writing in another program; wait for it to "
                              "finish or choose another output file") from exc
        except PermissionError as exc:
            raise ExportError(f"cannot write the run file {self.path}: permission denied") from exc
        except OSError as exc:
            raise ExportError(f"the existing file {self.path} cannot be opened as a run file "
                              f"({exc}); it is left untouched: choose another output file") from exc
        try:
            f.swmr_mode = True
        except (OSError, ValueError) as exc:
            f.close()
            raise ExportError(f"the run file {self.path} cannot be shared with readers while it is written "
                              f"({exc})") from exc
        return f

    def _check_existing(self) -> tuple[int, bool]:
        """Validate an existing file read-only; return its format version and whether it was closed cleanly."""
        try:
            f = open_run_for_reading(self.path)
        except FrameFileError as exc:
            raise ExportError(f"the existing file {self.path} cannot be opened as a run file ({exc}); it is "
                              "left untouched: choose another output file") from exc
        with f:
            if f.attrs.get("format") != RUN_FORMAT:
                raise ExportError(f"{self.path} exists and is not a latticeread run file; it is left "
                                  "untouched: choose another output file")
            version = int(f.attrs.get("format_version", 0))
            if version > RUN_FORMAT_VERSION:
                raise ExportError(f"{self.path} was written by a newer latticeread (run format {version}); "
                                  "update latticeread or choose another output file")
            stored = str(f.attrs.get("calibration", "{}"))
            if _calibration_identity(stored) != _calibration_identity(self._calibration_json):
                raise ExportError(f"{self.path} holds a run made with a different calibration; resume it with "
                                  "the same calibration or choose another output file")
        try:
            h5py.File(self.path, "r", locking=False).close()
            clean = True
        except OSError:
            clean = False  # the consistency flags of a writer that died are still set
        return version, clean

    def _resume(self) -> None:
        version, clean = self._check_existing()
        if version < RUN_FORMAT_VERSION or not clean:
            self._rebuild(reason="written by an older latticeread" if clean else
                          "its last writer was killed before closing it")
        self._file = f = self._open_h5()
        n, nf = _counts(f)
        self._n, self._nf = n, nf
        s = _rows(f)
        pixels = _decode_text(s["frame_digest"], n) if "frame_digest" in s else np.full(n, "")
        for src, digest, idx, frame in zip(_decode_text(s["source"], n), _decode_text(s["file_hash"], n),
                                           s["frame_index"][:n], pixels):
            self._done.add(ShotKey(str(src), str(digest), int(idx)))
            self._stored.setdefault((str(src), int(idx)), set()).add(str(frame))
        g = f["failures"]
        resolved = g["resolved"][:nf]
        for row, (src, digest, idx) in enumerate(zip(_decode_text(g["source"], nf), _decode_text(g["file_hash"], nf),
                                                     g["frame_index"][:nf])):
            if not resolved[row]:
                self._failed[ShotKey(str(src), str(digest), int(idx))] = row
        log.info("resuming %s: %d shots and %d failures already in it", self.path, n, len(self._failed))

    def _rebuild(self, *, reason: str) -> None:
        """Copy the committed rows into a fresh file of the current version and put it in place (atomic)."""
        log.warning("rebuilding the run file %s from its committed rows (%s)", self.path, reason)
        src = open_run_for_reading(self.path)
        with src, atomic_path(self.path) as tmp:
            n, nf = _counts(src)
            attrs = {k: v for k, v in src.attrs.items() if k not in ("n_shots", "n_failures")}
            with h5py.File(tmp, "w", libver="latest") as f:
                _create_layout(f, {**self._attrs(), **attrs})
                shape = tuple(src["occupation"].shape[1:]) if n and "occupation" in src else (0, 0)
                for start in range(0, n, 64):
                    stop = min(n, start + 64)
                    reserve_space(tmp, f.id.get_filesize() + _block_bytes(stop - start, shape))
                    for name in _MATRICES:
                        d = f[name]
                        d.resize((stop, *shape))
                        d[start:stop] = src[name][start:stop]
                    for name, (dtype, _tail) in _SHOT_COLUMNS.items():
                        d = f[ROWS_GROUP][name]
                        d.resize(stop, axis=0)
                        if name not in _rows(src):
                            # version 1 files stored no origin, versions 1-2 no frame checks,
                            # versions 1-4 no frame digests (empty: not recorded)
                            d[start:stop] = b"" if name in _TEXT else np.nan if name in _NAN_COLUMNS else 0
                        elif name in _TEXT:
                            d[start:stop] = _encode_text(_decode_text(_rows(src)[name], stop)[start:], _TEXT[name])
                        else:
                            d[start:stop] = _rows(src)[name][start:stop]
                g = f["failures"]
                for name in _FAILURE_COLUMNS:
                    g[name].resize(nf, axis=0)
                    if nf:
                        g[name][:] = (_encode_text(_decode_text(src["failures"][name], nf), _TEXT[name])
                                      if name in _TEXT else src["failures"][name][:nf])
                f["committed"][...] = [n, nf]
        log.info("rebuilt %s: %d shots, %d failures kept", self.path, n, nf)

    # --- state -----------------------------------------------------------------------
    @property
    def done(self) -> set[ShotKey]:
        """Keys of the shots already in the file (including those written by this writer)."""
        return set(self._done)

    @property
    def failed(self) -> set[ShotKey]:
        """Keys of unresolved failures in the file."""
        return set(self._failed)

    @property
    def stored_digests(self):
        """Frame digests in the file per ``(source, frame_index)`` ("" for rows of files before
        format version 5, whose pixels were not recorded): a read-only view that follows the
        writer (not copied: a long watch asks for it once per file)."""
        return types.MappingProxyType(self._stored)

    @property
    def n_shots(self) -> int:
        """Committed shots in the file."""
        return self._n

    def same_frame_stored(self, key: ShotKey, frame_digest: str) -> bool:
        """True when the file holds the frame at ``key``'s position of ``key``'s file with these
        pixels (from an earlier version of that file, e.g. before it grew)."""
        return bool(frame_digest) and frame_digest in self._stored.get((key.source, key.frame_index), ())

    def _require_open(self) -> h5py.File:
        if self._file is None:
            raise ExportError(f"the run file {self.path} is closed")
        return self._file

    def _reserve(self, nbytes: int) -> None:
        f = self._require_open()
        reserve_space(self.path, f.id.get_filesize() + int(nbytes))

    def _commit(self) -> None:
        f = self._file
        f.flush()
        self._sync(f)  # the rows reach the disk before the counter that makes them count
        f["committed"][...] = [self._n, self._nf]
        f.flush()
        self._sync(f)  # the committed block survives a power loss

    def _sync(self, f: h5py.File) -> None:
        """fsync the file (HDF5's flush only hands the data to the operating system)."""
        if not SYNC_TO_DISK:
            return
        try:
            fd = f.id.get_vfd_handle()
        except (AttributeError, OSError, ValueError, TypeError):
            fd = None
        if isinstance(fd, int) and fd >= 0:
            os.fsync(fd)
            return
        fd = os.open(self.path, os.O_RDONLY)  # other HDF5 drivers: fsync through our own descriptor
        try:
            os.fsync(fd)
        finally:
            os.close(fd)

    # --- writing ---------------------------------------------------------------------
    def append(self, record: ShotRecord) -> bool:
        """Append one shot; return False (and write nothing) if its key is already in the file."""
        return self.append_many([record]) == 1

    def append_many(self, records) -> int:
        """Append a block of shots with one resize and one flush per dataset.

        Parameters
        ----------
        records : iterable of ShotRecord
            All with the same matrix shape as the file's.

        Returns
        -------
        int
            Number of shots written. Shots already in the file, repeated in ``records``, or
            whose frame (same file, same position, same pixel digest) is in the file from an
            earlier version of their input are skipped with a logged warning; their keys
            count as done.

        Raises
        ------
        DiskFullError
            The disk cannot hold the block; nothing of it was written.
        ExportError
            Wrong matrix shape, or a write error (the file keeps its committed shots).
        """
        f = self._require_open()
        block: list[ShotRecord] = []
        keys: set[ShotKey] = set()
        frames: set[tuple[str, int, str]] = set()
        same: list[ShotKey] = []
        for record in records:
            if record.key in self._done or record.key in keys:
                log.warning("shot %s is already in %s; not written twice", record.key, self.path)
                continue
            frame = (record.key.source, record.key.frame_index, record.frame_digest)
            if self.same_frame_stored(record.key, record.frame_digest) or (record.frame_digest and frame in frames):
                same.append(record.key)
                continue
            keys.add(record.key)
            frames.add(frame)
            block.append(record)
        if same:
            log.warning("%s: already in %s from an earlier version of the file (same pixels); not written twice",
                        describe_keys(same), self.path)
            self._done.update(same)
        if not block:
            return 0
        n = self._n
        held = tuple(f["occupation"].shape[1:]) if n else block[0].matrix_shape
        for record in block:
            if record.matrix_shape != held:
                raise ExportError(
                    f"shot {record.key.frame_index} of {record.key.source} gives a {record.matrix_shape[0]}x"
                    f"{record.matrix_shape[1]} occupation matrix but {self.path} holds {held[0]}x{held[1]} "
                    "matrices; a run must use one calibration")
        m = len(block)
        self._reserve(_block_bytes(m, held))
        now = time.time()
        columns = {
            "source": _encode_text([r.key.source for r in block], _TEXT["source"]),
            "file_hash": _encode_text([r.key.file_hash for r in block], _TEXT["file_hash"]),
            "frame_index": [r.key.frame_index for r in block],
            "offset": [r.offset for r in block],
            "a1": [r.a1 for r in block],
            "a2": [r.a2 for r in block],
            "threshold": [r.threshold for r in block],
            "false_positive_rate": [r.false_positive_rate for r in block],
            "false_negative_rate": [r.false_negative_rate for r in block],
            "n_sites": [r.n_sites for r in block],
            "n_occupied": [r.n_occupied for r in block],
            "filling": [r.filling for r in block],
            "peak_to_background": [r.peak_to_background for r in block],
            "lattice_residual": [r.lattice_residual for r in block],
            "warnings": _encode_text(["\n".join(r.warnings) for r in block], _TEXT["warnings"]),
            "written_at": [now] * m,
            "origin": [r.origin for r in block],
            **{name: [getattr(r, name) for r in block] for name in _CHECK_COLUMNS},
            "frame_digest": _encode_text([r.frame_digest for r in block], _TEXT["frame_digest"]),
            "offset_sigma": [tuple(float(v) for v in r.offset_sigma) for r in block],
            "offset_method": _encode_text([r.offset_method for r in block], _TEXT["offset_method"]),
        }
        matrices = {name: np.stack([np.asarray(getattr(r, name), dtype=dtype) for r in block])
                    for name, (dtype, _fill) in _MATRICES.items()}
        try:
            with _interrupt_deferred():
                for name, values in matrices.items():
                    d = f[name]
                    d.resize((n + m, *held))
                    d[n:n + m] = values
                shots = f[ROWS_GROUP]
                for name, values in columns.items():
                    d = shots[name]
                    d.resize(n + m, axis=0)
                    d[n:n + m] = np.asarray(values, d.dtype)
                # An earlier failure of these shots, or of an older version of their file
                # (e.g. read while the camera was still writing it), is resolved by this success.
                for key in keys:
                    for old in [k for k in self._failed if k == key or (k.source == key.source and
                                                                         k.file_hash != key.file_hash)]:
                        f["failures/resolved"][self._failed.pop(old)] = True
                # Commit: the rows count only once the counter says so.
                self._n = n + m
                self._commit()
        except OSError as exc:
            self._n = n
            first = block[0].key
            raise ExportError(f"writing frame {first.frame_index} of {first.source} to {self.path} failed: "
                              f"{describe_os_error(exc, self.path)} (the file keeps the {n} frames written "
                              "before)") from exc
        self._done.update(keys)
        for source, index, digest in frames:
            self._stored.setdefault((source, index), set()).add(digest)
        return m

    def record_failure(self, key: ShotKey, *, error: str, reason: str) -> None:
        """Record a shot (or a whole file, ``frame_index=-1``) that could not be reconstructed.

        A key that already has an unresolved failure row gets its reason updated instead of a
        second row.
        """
        f = self._require_open()
        g = f["failures"]
        self._reserve(_METADATA_MARGIN)
        try:
            with _interrupt_deferred():
                if key in self._failed:
                    row = self._failed[key]
                    g["error"][row] = _encode_text([error], _TEXT["error"])[0]
                    g["reason"][row] = _encode_text([reason], _TEXT["reason"])[0]
                    g["written_at"][row] = time.time()
                    self._commit()
                else:
                    nf = self._nf
                    values = {"source": _encode_text([key.source], _TEXT["source"]),
                              "file_hash": _encode_text([key.file_hash], _TEXT["file_hash"]),
                              "frame_index": [key.frame_index], "error": _encode_text([error], _TEXT["error"]),
                              "reason": _encode_text([reason], _TEXT["reason"]), "resolved": [False],
                              "written_at": [time.time()]}
                    for name, value in values.items():
                        g[name].resize(nf + 1, axis=0)
                        g[name][nf:nf + 1] = np.asarray(value, g[name].dtype)
                    self._nf = nf + 1
                    self._commit()
                    self._failed[key] = nf
        except OSError as exc:
            raise ExportError(f"writing a failure record to {self.path} failed: "
                              f"{describe_os_error(exc, self.path)}") from exc

    def _close_file(self) -> None:
        f, self._file = self._file, None
        if f is not None:
            try:
                f.flush()
            finally:
                f.close()

    def close(self) -> None:
        """Flush and close the file and release the writer lock (safe to call twice)."""
        try:
            self._close_file()
        finally:
            self._lock.release()

    def __enter__(self) -> "RunWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


@dataclass(frozen=True)
class RunFailures:
    """The ``failures`` table of a run file (one entry per failed shot or file).

    Attributes
    ----------
    source, file_hash, error, reason : (n,) ndarray of str
    frame_index : (n,) ndarray of int64
        -1 when the whole file could not be read.
    resolved : (n,) ndarray of bool
        True when a later retry of the shot succeeded, or a shot of a newer version of the
        same file (other content hash) was written.
    """

    source: np.ndarray
    file_hash: np.ndarray
    frame_index: np.ndarray
    error: np.ndarray
    reason: np.ndarray
    resolved: np.ndarray

    def __len__(self) -> int:
        return int(self.source.size)


@dataclass(frozen=True)
class RunData:
    """A run file read back into numpy arrays (only complete shots).

    Attributes
    ----------
    source, file_hash : (n,) ndarray of str
        Input file path and content hash per shot.
    frame_index : (n,) ndarray of int64
        Frame inside the input file.
    occupation : (n, rows, cols) ndarray of uint8
        1 occupied, 0 empty, 255 outside the region (None if read with ``matrices=False``).
    amplitude, p_occupied, x, y : (n, rows, cols) ndarray of float64
        Photons, posterior, site centre in pixels; NaN outside the region (or None).
    flags : (n, rows, cols) ndarray of uint8 (or None)
    offset, a1, a2 : (n, 2) ndarray of float64
        Lattice offset and vectors ``(x, y)`` in pixels per shot.
    threshold, filling, peak_to_background, lattice_residual, written_at : (n,) float64
        Threshold in photons, filling fraction, lattice diagnostics, Unix time of writing.
    false_positive_rate, false_negative_rate : (n,) float64
        Misread probabilities per site from each shot's threshold fit (NaN if none).
    origin : (n, 2) ndarray of int64
        Lattice site ``(row, col)`` of matrix element ``[0, 0]`` per shot.
    light_outside, model_residual, light_explained : (n,) ndarray of float64
        The image-model checks of each shot (:class:`ShotRecord`); NaN in files before
        format version 3.
    frame_digest : (n,) ndarray of str
        Hex digest of each frame's pixels; "" in files before format version 5.
    offset_sigma : (n, 2) ndarray of float64
        1-sigma error of each offset (x, y), pixels; NaN where not estimated and in files
        before format version 6.
    offset_method : (n,) ndarray of str
        How each offset was found; "" in files before format version 6.
    n_sites, n_occupied : (n,) ndarray of int64
    warnings : tuple of tuple of str
        Warnings per shot.
    failures : RunFailures
    calibration : dict
        The calibration the run was made with.
    program_version : str
    metadata : dict
    """

    source: np.ndarray
    file_hash: np.ndarray
    frame_index: np.ndarray
    occupation: np.ndarray
    amplitude: np.ndarray
    p_occupied: np.ndarray
    x: np.ndarray
    y: np.ndarray
    flags: np.ndarray
    offset: np.ndarray
    a1: np.ndarray
    a2: np.ndarray
    threshold: np.ndarray
    n_sites: np.ndarray
    n_occupied: np.ndarray
    filling: np.ndarray
    peak_to_background: np.ndarray
    lattice_residual: np.ndarray
    written_at: np.ndarray
    false_positive_rate: np.ndarray
    false_negative_rate: np.ndarray
    warnings: tuple
    failures: RunFailures
    calibration: dict = field(repr=False)
    program_version: str = ""
    metadata: dict = field(default_factory=dict, repr=False)
    origin: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), np.int64))
    light_outside: np.ndarray = field(default_factory=lambda: np.zeros(0))
    model_residual: np.ndarray = field(default_factory=lambda: np.zeros(0))
    light_explained: np.ndarray = field(default_factory=lambda: np.zeros(0))
    frame_digest: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=str))
    offset_sigma: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    offset_method: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=str))

    def __len__(self) -> int:
        return int(self.frame_index.size)

    @property
    def keys(self) -> list[ShotKey]:
        """Shot keys in file order."""
        return [ShotKey(str(s), str(h), int(i)) for s, h, i in zip(self.source, self.file_hash, self.frame_index)]

    def shot_table(self) -> dict[str, np.ndarray]:
        """Per-shot columns (one entry per shot), e.g. for ``pandas.DataFrame(run.shot_table())``."""
        return {
            "source": self.source, "file_hash": self.file_hash, "frame_index": self.frame_index,
            "offset_x": self.offset[:, 0], "offset_y": self.offset[:, 1],
            "threshold": self.threshold, "false_positive_rate": self.false_positive_rate,
            "false_negative_rate": self.false_negative_rate, "n_sites": self.n_sites, "n_occupied": self.n_occupied,
            "filling": self.filling, "peak_to_background": self.peak_to_background,
            "lattice_residual": self.lattice_residual, "light_outside": self.light_outside,
            "model_residual": self.model_residual, "light_explained": self.light_explained,
            "frame_digest": self.frame_digest,
            "offset_sigma_x": self.offset_sigma[:, 0], "offset_sigma_y": self.offset_sigma[:, 1],
            "offset_method": self.offset_method,
        }


def read_run(path, *, matrices: bool = True) -> RunData:
    """Read a run file written by ``latticeread batch`` or ``latticeread watch``.

    Parameters
    ----------
    path : str or Path
        The ``.h5`` run file.
    matrices : bool or iterable of str
        Read the per-site matrices (occupation, amplitude, p_occupied, x, y, flags). With
        False only the per-shot table and failures are read (fast and small for long runs)
        and the matrix fields are None; with names, only those matrices are read.

    Returns
    -------
    RunData
        Every completed shot (rows beyond the committed count, left by an interruption,
        are ignored) and the failures table.

    Raises
    ------
    FrameFileError
        The file is missing, not HDF5, or not a run file.
    """
    path = Path(path)
    f = open_run_for_reading(path)
    with f:
        if f.attrs.get("format") != RUN_FORMAT:
            raise FrameFileError(f"{path} is an HDF5 file but not a latticeread run file")
        check_format_version(RUN_FORMAT, f.attrs.get("format_version"), expected_format=RUN_FORMAT,
                             versions=range(1, RUN_FORMAT_VERSION + 1), where=f"the run file {path}",
                             error=FrameFileError, default_version=1)
        n, nf = _counts(f)
        s = _rows(f)
        wanted = set(_MATRICES) if matrices is True else set(matrices or ())
        unknown = wanted - set(_MATRICES)
        if unknown:
            raise ValueError(f"unknown run-file matrices {sorted(unknown)}; choose from {list(_MATRICES)}")
        mats = {}
        for name, (dtype, _fill) in _MATRICES.items():
            if name not in wanted:
                mats[name] = None
            elif name in f and n:
                mats[name] = f[name][:n]
            else:
                mats[name] = np.zeros((0, 0, 0), dtype=dtype)
        g = f["failures"]
        failures = RunFailures(
            source=_decode_text(g["source"], nf),
            file_hash=_decode_text(g["file_hash"], nf),
            frame_index=g["frame_index"][:nf],
            error=_decode_text(g["error"], nf),
            reason=_decode_text(g["reason"], nf),
            resolved=g["resolved"][:nf],
        )
        warnings = tuple(tuple(str(w).split("\n")) if w else () for w in _decode_text(s["warnings"], n))
        return RunData(
            source=_decode_text(s["source"], n),
            file_hash=_decode_text(s["file_hash"], n),
            frame_index=s["frame_index"][:n],
            **mats,
            offset=s["offset"][:n], a1=s["a1"][:n], a2=s["a2"][:n],
            threshold=s["threshold"][:n], n_sites=s["n_sites"][:n], n_occupied=s["n_occupied"][:n],
            filling=s["filling"][:n], peak_to_background=s["peak_to_background"][:n],
            lattice_residual=s["lattice_residual"][:n], written_at=s["written_at"][:n],
            false_positive_rate=s["false_positive_rate"][:n], false_negative_rate=s["false_negative_rate"][:n],
            warnings=warnings, failures=failures,
            origin=s["origin"][:n] if "origin" in s else np.zeros((n, 2), np.int64),
            **{name: s[name][:n] if name in s else np.full(n, np.nan) for name in _CHECK_COLUMNS},
            frame_digest=_decode_text(s["frame_digest"], n) if "frame_digest" in s else np.full(n, "", dtype="<U1"),
            offset_sigma=s["offset_sigma"][:n] if "offset_sigma" in s else np.full((n, 2), np.nan),
            offset_method=_decode_text(s["offset_method"], n) if "offset_method" in s else np.full(n, "", dtype="<U1"),
            calibration=json.loads(str(f.attrs.get("calibration", "{}"))),
            program_version=str(f.attrs.get("program_version", "")),
            metadata=json.loads(str(f.attrs.get("metadata", "{}"))),
        )
