"""The resumable HDF5 run file written by ``latticeread batch`` and ``latticeread watch``.

A run file collects the reconstruction of many shots. It is appended to shot by shot (or a
small block of shots at a time) and flushed after every append, so a run that is killed
leaves a readable file holding every shot written so far; running the same command again skips those shots (each is keyed by
the input file path, a content hash of the file and the frame index inside it).

Layout (all per-shot datasets share the first axis, one entry per completed shot)
--------------------------------------------------------------------------------
Root attributes
    ``format`` = ``"latticeread-run"``, ``format_version``, ``program_version``,
    ``calibration`` (the calibration as JSON text), ``created`` (UTC ISO time),
    ``n_shots`` and ``n_failures`` (number of complete rows; rows beyond these were cut
    short by an interruption and are ignored and overwritten), ``metadata`` (JSON).
``shots/`` (one row per completed shot)
    ``source`` (str, absolute input path), ``file_hash`` (str, hex BLAKE2b-128 of the file
    bytes), ``frame_index`` (int64, frame inside that file), ``offset``, ``a1``, ``a2``
    ((n, 2) float64, lattice offset and vectors ``(x, y)`` in pixels used for that shot),
    ``threshold`` (float64, photons), ``false_positive_rate``, ``false_negative_rate``
    (float64, misread probabilities per site from the threshold fit; NaN for a fixed
    threshold without a fit), ``n_sites``, ``n_occupied`` (int64), ``filling``
    (float64, occupied / valid sites), ``peak_to_background``, ``lattice_residual``
    (float64, lattice fit diagnostics), ``warnings`` (str, one per line), ``written_at``
    (float64, Unix time of writing).
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

Only one process writes a run file (the main process of a run); workers return records.
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import os
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from latticeread import __version__
from latticeread.errors import ExportError, FrameFileError

__all__ = [
    "RUN_FORMAT",
    "RUN_FORMAT_VERSION",
    "ShotKey",
    "ShotRecord",
    "RunWriter",
    "RunData",
    "RunFailures",
    "read_run",
]

log = logging.getLogger(__name__)

RUN_FORMAT = "latticeread-run"
RUN_FORMAT_VERSION = 1

_STR = h5py.string_dtype("utf-8")
#: per-shot scalar/vector columns of ``shots/``: name -> (dtype, trailing shape)
_SHOT_COLUMNS = {
    "source": (_STR, ()),
    "file_hash": (_STR, ()),
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
    "warnings": (_STR, ()),
    "written_at": (np.float64, ()),
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
_FAILURE_COLUMNS = {
    "source": _STR,
    "file_hash": _STR,
    "frame_index": np.int64,
    "error": _STR,
    "reason": _STR,
    "resolved": np.bool_,
    "written_at": np.float64,
}


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


class RunWriter:
    """Create or resume a run file and append shots to it, one at a time.

    Parameters
    ----------
    path : str or Path
        The run file (``.h5``). Created if missing; an existing run file is resumed.
    calibration_json : str
        The calibration as JSON text; stored as an attribute. Resuming a file made with a
        different calibration raises :class:`~latticeread.errors.ExportError`.
    metadata : dict, optional
        Free-form JSON-able information stored with the run (command line, inputs...).

    Notes
    -----
    Every :meth:`append` / :meth:`append_many` writes the data rows first, then increments
    the ``n_shots`` attribute and flushes the file, so an interruption at any point leaves
    the file with ``n_shots`` complete rows. Use as a context manager, or call :meth:`close`.
    """

    def __init__(self, path, *, calibration_json: str, metadata: dict | None = None):
        self.path = Path(path)
        self._calibration_json = calibration_json
        self._metadata = dict(metadata or {})
        self._file: h5py.File | None = None
        self._done: set[ShotKey] = set()
        self._failed: dict[ShotKey, int] = {}
        self._open()

    # --- opening -------------------------------------------------------------------
    def _open(self) -> None:
        folder = self.path.parent if str(self.path.parent) else Path(".")
        if not folder.is_dir():
            raise ExportError(f"cannot write the run file {self.path}: the folder {folder} does not exist")
        if self.path.exists():
            self._resume()
        else:
            self._create()

    def _create(self) -> None:
        folder = self.path.parent if str(self.path.parent) else Path(".")
        # Build the empty file under a temporary name and rename it into place, so a
        # failure here never leaves a half-made file at the requested path.
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".part", dir=folder)
        except OSError as exc:
            raise ExportError(f"cannot write the run file {self.path}: the folder {folder} is not writable "
                              f"({exc.strerror})") from exc
        os.close(fd)
        try:
            with h5py.File(tmp, "w") as f:
                f.attrs["format"] = RUN_FORMAT
                f.attrs["format_version"] = RUN_FORMAT_VERSION
                f.attrs["program_version"] = __version__
                f.attrs["calibration"] = self._calibration_json
                f.attrs["created"] = _now_iso()
                f.attrs["metadata"] = json.dumps(self._metadata, sort_keys=True, default=str)
                f.attrs["n_shots"] = 0
                f.attrs["n_failures"] = 0
                shots = f.create_group("shots")
                for name, (dtype, tail) in _SHOT_COLUMNS.items():
                    shots.create_dataset(name, shape=(0, *tail), maxshape=(None, *tail), dtype=dtype,
                                         chunks=(256, *tail))
                failures = f.create_group("failures")
                for name, dtype in _FAILURE_COLUMNS.items():
                    failures.create_dataset(name, shape=(0,), maxshape=(None,), dtype=dtype, chunks=(64,))
            os.replace(tmp, self.path)
        except OSError as exc:
            Path(tmp).unlink(missing_ok=True)
            raise ExportError(f"cannot write the run file {self.path}: {exc}") from exc
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        self._file = self._open_h5("r+")

    def _open_h5(self, mode: str) -> h5py.File:
        try:
            return h5py.File(self.path, mode)
        except BlockingIOError as exc:
            raise ExportError(f"the run file {self.path} is open in another program (another batch or watch "
                              "run?); wait for it to finish or choose another --out") from exc
        except PermissionError as exc:
            raise ExportError(f"cannot write the run file {self.path}: permission denied") from exc
        except OSError as exc:
            raise ExportError(f"the existing file {self.path} cannot be opened as a run file "
                              f"({exc}); it is left untouched: choose another --out") from exc

    def _resume(self) -> None:
        f = self._open_h5("r+")
        try:
            if f.attrs.get("format") != RUN_FORMAT:
                raise ExportError(f"{self.path} exists and is not a latticeread run file; it is left "
                                  "untouched: choose another --out")
            version = int(f.attrs.get("format_version", 0))
            if version > RUN_FORMAT_VERSION:
                raise ExportError(f"{self.path} was written by a newer latticeread (run format {version}); "
                                  "update latticeread or choose another --out")
            stored = str(f.attrs.get("calibration", "{}"))
            if _calibration_identity(stored) != _calibration_identity(self._calibration_json):
                raise ExportError(f"{self.path} holds a run made with a different calibration; resume it with "
                                  "the same calibration or choose another --out")
            n = int(f.attrs["n_shots"])
            nf = int(f.attrs["n_failures"])
            # Drop rows an interruption left half-written (beyond the committed counts).
            for name in _SHOT_COLUMNS:
                if f["shots"][name].shape[0] != n:
                    f["shots"][name].resize(n, axis=0)
            for name in _MATRICES:
                if name in f and f[name].shape[0] != n:
                    f[name].resize(n, axis=0)
            for name in _FAILURE_COLUMNS:
                if f["failures"][name].shape[0] != nf:
                    f["failures"][name].resize(nf, axis=0)
            sources = f["shots/source"].asstr()[:n]
            hashes = f["shots/file_hash"].asstr()[:n]
            frames = f["shots/frame_index"][:n]
            self._done = {ShotKey(s, h, int(i)) for s, h, i in zip(sources, hashes, frames)}
            fs = f["failures/source"].asstr()[:nf]
            fh = f["failures/file_hash"].asstr()[:nf]
            fi = f["failures/frame_index"][:nf]
            fr = f["failures/resolved"][:nf]
            self._failed = {ShotKey(s, h, int(i)): row for row, (s, h, i, r) in enumerate(zip(fs, fh, fi, fr))
                            if not r}
            f.attrs["resumed"] = _now_iso()
            f.flush()
        except BaseException:
            f.close()
            raise
        self._file = f
        log.info("resuming %s: %d shots done, %d failed", self.path, len(self._done), len(self._failed))

    # --- state ---------------------------------------------------------------------
    @property
    def done(self) -> frozenset[ShotKey]:
        """Keys of the shots already in the file."""
        return frozenset(self._done)

    @property
    def failed(self) -> frozenset[ShotKey]:
        """Keys of unresolved failures recorded in the file."""
        return frozenset(self._failed)

    @property
    def n_shots(self) -> int:
        return len(self._done)

    @property
    def matrix_shape(self) -> tuple[int, int] | None:
        """(rows, cols) of the occupation matrices, or None before the first shot."""
        f = self._require_open()
        return tuple(f["occupation"].shape[1:]) if "occupation" in f else None

    def _require_open(self) -> h5py.File:
        if self._file is None:
            raise ExportError(f"the run file {self.path} is closed")
        return self._file

    # --- writing -------------------------------------------------------------------
    def append(self, record: ShotRecord) -> bool:
        """Write one completed shot and flush the file.

        Returns
        -------
        bool
            True if written; False if a shot with the same key is already in the file (it
            is not written twice).
        """
        return self.append_many([record]) == 1

    def append_many(self, records) -> int:
        """Write several completed shots as one block, then commit and flush once.

        Writing a block costs about as much as writing one shot (HDF5 calls dominate), so
        a batch run gathers the shots that come back within a fraction of a second. An
        interruption before the commit leaves the file with the shots of earlier blocks.

        Parameters
        ----------
        records : iterable of ShotRecord
            All with the same matrix shape as the file's.

        Returns
        -------
        int
            Number of shots written (shots already in the file, or repeated in ``records``,
            are skipped with a logged warning).
        """
        f = self._require_open()
        block: list[ShotRecord] = []
        keys: set[ShotKey] = set()
        for record in records:
            if record.key in self._done or record.key in keys:
                log.warning("shot %s is already in %s; not written twice", record.key, self.path)
                continue
            keys.add(record.key)
            block.append(record)
        if not block:
            return 0
        shape = block[0].matrix_shape
        if "occupation" not in f:
            for name, (dtype, fill) in _MATRICES.items():
                # gzip level 1 with byte shuffling: half the size of raw float64 at a few
                # ms per shot; level 4 compresses hardly better at twice the time.
                f.create_dataset(name, shape=(0, *shape), maxshape=(None, *shape), dtype=dtype,
                                 chunks=(1, *shape), compression="gzip", compression_opts=1, shuffle=True,
                                 fillvalue=fill)
        held = tuple(f["occupation"].shape[1:])
        for record in block:
            if record.matrix_shape != held:
                raise ExportError(
                    f"shot {record.key.frame_index} of {record.key.source} gives a {record.matrix_shape[0]}x"
                    f"{record.matrix_shape[1]} occupation matrix but {self.path} holds {held[0]}x{held[1]} "
                    "matrices; a run must use one calibration")
        n = int(f.attrs["n_shots"])
        m = len(block)
        now = time.time()
        try:
            for name, (dtype, _fill) in _MATRICES.items():
                d = f[name]
                d.resize(n + m, axis=0)
                d[n:n + m] = np.stack([np.asarray(getattr(r, name), dtype=dtype) for r in block])
            columns = {
                "source": [r.key.source for r in block],
                "file_hash": [r.key.file_hash for r in block],
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
                "warnings": ["\n".join(r.warnings) for r in block],
                "written_at": [now] * m,
            }
            shots = f["shots"]
            for name, values in columns.items():
                d = shots[name]
                d.resize(n + m, axis=0)
                d[n:n + m] = np.asarray(values, dtype=object) if d.dtype.kind == "O" else np.asarray(values, d.dtype)
            # Commit: the rows count only once the counter says so.
            f.attrs["n_shots"] = n + m
            # An earlier failure of these shots, or of an older version of their file (e.g.
            # read while the camera was still writing it), is resolved by this success.
            for key in keys:
                for old in [k for k in self._failed if k == key or (k.source == key.source and
                                                                     k.file_hash != key.file_hash)]:
                    f["failures/resolved"][self._failed.pop(old)] = True
            f.flush()
        except OSError as exc:
            first = block[0].key
            raise ExportError(f"writing shot {first.frame_index} of {first.source} to {self.path} failed: {exc} "
                              f"(the file keeps the {n} shots written before)") from exc
        self._done.update(keys)
        return m

    def record_failure(self, key: ShotKey, *, error: str, reason: str) -> None:
        """Record a shot (or a whole file, ``frame_index=-1``) that could not be reconstructed.

        A key that already has an unresolved failure row gets its reason updated instead of a
        second row.
        """
        f = self._require_open()
        g = f["failures"]
        try:
            if key in self._failed:
                row = self._failed[key]
                g["error"][row] = error
                g["reason"][row] = reason
                g["written_at"][row] = time.time()
            else:
                n = int(f.attrs["n_failures"])
                values = {"source": key.source, "file_hash": key.file_hash, "frame_index": key.frame_index,
                          "error": error, "reason": reason, "resolved": False, "written_at": time.time()}
                for name, value in values.items():
                    g[name].resize(n + 1, axis=0)
                    g[name][n] = value
                f.attrs["n_failures"] = n + 1
                self._failed[key] = n
            f.flush()
        except OSError as exc:
            raise ExportError(f"writing a failure record to {self.path} failed: {exc}") from exc

    def close(self) -> None:
        if self._file is not None:
            try:
                self._file.flush()
            finally:
                self._file.close()
                self._file = None

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
            "lattice_residual": self.lattice_residual,
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
    if not path.exists():
        raise FrameFileError(f"the run file {path} does not exist")
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise FrameFileError(f"{path} cannot be opened as an HDF5 run file: {exc}") from exc
    with f:
        if f.attrs.get("format") != RUN_FORMAT:
            raise FrameFileError(f"{path} is an HDF5 file but not a latticeread run file")
        n = int(f.attrs["n_shots"])
        nf = int(f.attrs["n_failures"])
        s = f["shots"]
        wanted = set(_MATRICES) if matrices is True else set(matrices or ())
        unknown = wanted - set(_MATRICES)
        if unknown:
            raise ValueError(f"unknown run-file matrices {sorted(unknown)}; choose from {list(_MATRICES)}")
        mats = {}
        for name, (dtype, _fill) in _MATRICES.items():
            if name not in wanted:
                mats[name] = None
            elif name in f:
                mats[name] = f[name][:n]
            else:
                mats[name] = np.zeros((0, 0, 0), dtype=dtype)
        g = f["failures"]
        failures = RunFailures(
            source=np.asarray(g["source"].asstr()[:nf], dtype=object).astype(str),
            file_hash=np.asarray(g["file_hash"].asstr()[:nf], dtype=object).astype(str),
            frame_index=g["frame_index"][:nf],
            error=np.asarray(g["error"].asstr()[:nf], dtype=object).astype(str),
            reason=np.asarray(g["reason"].asstr()[:nf], dtype=object).astype(str),
            resolved=g["resolved"][:nf],
        )
        warnings = tuple(tuple(w.split("\n")) if w else () for w in s["warnings"].asstr()[:n])
        return RunData(
            source=np.asarray(s["source"].asstr()[:n], dtype=object).astype(str),
            file_hash=np.asarray(s["file_hash"].asstr()[:n], dtype=object).astype(str),
            frame_index=s["frame_index"][:n],
            **mats,
            offset=s["offset"][:n], a1=s["a1"][:n], a2=s["a2"][:n],
            threshold=s["threshold"][:n], n_sites=s["n_sites"][:n], n_occupied=s["n_occupied"][:n],
            filling=s["filling"][:n], peak_to_background=s["peak_to_background"][:n],
            lattice_residual=s["lattice_residual"][:n], written_at=s["written_at"][:n],
            false_positive_rate=s["false_positive_rate"][:n], false_negative_rate=s["false_negative_rate"][:n],
            warnings=warnings, failures=failures,
            calibration=json.loads(str(f.attrs.get("calibration", "{}"))),
            program_version=str(f.attrs.get("program_version", "")),
            metadata=json.loads(str(f.attrs.get("metadata", "{}"))),
        )
