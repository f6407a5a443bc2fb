"""The session file: a JSON document plus an HDF5 file of results beside it.

``<name>.json`` holds what the user set up (the frame file, the current frame, the
calibration and where it came from, its undo history, the analysis settings, the fidelity
report); ``<name>.h5`` holds the per-frame results (site amplitudes, flags, lattice offsets,
backgrounds) and, when the frames were held in memory rather than read from a file, the
frames themselves. Both are written atomically (:mod:`latticeread.io.atomic`): the HDF5 file
first, then the JSON that names it, so a JSON never points at a missing or half-written
results file.

This module knows the layout only; :class:`latticeread.session.Session` turns a
:class:`SessionRecord` into its state and back.

Layout of the JSON (format ``"latticeread-session"``, version 2; version 1 files, without
``calibration_origin`` and ``fidelity``, still load)::

    format, format_version, program_version
    frames: {source, dataset, n_frames, frame_shape}
    current_index
    calibration            Calibration.to_dict() or null
    calibration_origin     {kind, path, stack, edited} or null
    undo                   list of Calibration.to_dict() or null (oldest first)
    settings               the session's analysis settings
    fidelity               FidelityReport.to_dict() or null
    results_file           name of the HDF5 file beside the JSON

Layout of the HDF5 file: attributes ``format``, ``program_version``, ``frame_warnings``
(JSON list per frame); datasets ``rows``, ``cols`` (site indices), ``done`` (bool per
frame), ``offset`` (n_frames, 2) pixels, ``background`` (photons per pixel), ``amplitude``
(n_frames, N) photons, ``flags`` (n_frames, N) uint8, and ``frames`` when stored.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path
from typing import Any, Callable

import numpy as np

from latticeread import __version__
from latticeread.errors import FrameFileError
from latticeread.io.atomic import atomic_path, atomic_write
from latticeread.io.formats import check_format_version

__all__ = ["SESSION_FORMAT", "SESSION_FORMAT_VERSION", "SessionRecord", "SessionResults", "write_session",
           "read_session"]

SESSION_FORMAT = "latticeread-session"
SESSION_FORMAT_VERSION = 2


@dataclasses.dataclass(frozen=True)
class SessionResults:
    """Per-frame results of a session (arrays over frames and sites).

    Attributes
    ----------
    rows, cols : (N,) ndarray of int
        Site indices along a1 and a2.
    done : (n_frames,) ndarray of bool
        Which frames have amplitudes.
    amplitude : (n_frames, N) ndarray
        Site amplitudes in photons (NaN where not done).
    flags : (n_frames, N) ndarray of uint8
        Site flags (latticeread.core.flags).
    offset : (n_frames, 2) ndarray
        Lattice offset ``(x, y)`` of each frame, pixels (NaN where not done).
    background : (n_frames,) ndarray
        Fitted background, photons per pixel.
    frame_warnings : tuple of tuple of str
        Warnings of each frame's extraction.
    offset_sigma : (n_frames, 2) ndarray or None
        1-sigma of each frame's offset, pixels (NaN: not estimated; None: not recorded, older files).
    offset_method : tuple of str
        How each frame's offset was found ("" where not recorded).
    """

    rows: np.ndarray
    cols: np.ndarray
    done: np.ndarray
    amplitude: np.ndarray
    flags: np.ndarray
    offset: np.ndarray
    background: np.ndarray
    frame_warnings: tuple
    offset_sigma: np.ndarray | None = None
    offset_method: tuple = ()


@dataclasses.dataclass(frozen=True)
class SessionRecord:
    """Everything a session file holds (see the module notes for the layout).

    ``frames`` is None when the frames come from ``frames_source``; otherwise, when writing,
    a pair ``(read, n)`` (``read(i)`` returns frame ``i``) or an (n, H, W) array, and when
    reading, the (n, H, W) array stored in the results file.
    """

    frames_source: str | None = None
    frames_dataset: str | None = None
    n_frames: int | None = None
    frame_shape: tuple | None = None
    current_index: int = 0
    calibration: dict | None = None
    calibration_origin: dict | None = None
    undo: tuple = ()
    settings: dict = dataclasses.field(default_factory=dict)
    fidelity: dict | None = None
    frames: Any = None
    results: SessionResults | None = None
    format_version: int = SESSION_FORMAT_VERSION


def _json_default(obj):
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    raise TypeError(f"cannot store {type(obj).__name__} in a session file")


def session_paths(path) -> tuple[Path, Path]:
    """``(json_path, h5_path)`` of a session saved under ``path`` (the suffix becomes .json)."""
    path = Path(path)
    if path.suffix.lower() != ".json":
        path = path.with_suffix(".json")
    return path, path.with_suffix(".h5")


def write_session(path, record: SessionRecord, *, protect=None) -> Path:
    """Write ``record``: the HDF5 results file first, then the JSON (both atomic).

    Parameters
    ----------
    path : str or Path
        Session file name; ``.json`` is used whatever the suffix, the results go to ``.h5``.
    protect : iterable of path, optional
        Files never to overwrite (the frame file).

    Returns
    -------
    Path
        The JSON file written.
    """
    import h5py

    json_path, h5_path = session_paths(path)
    doc = {
        "format": SESSION_FORMAT,
        "format_version": SESSION_FORMAT_VERSION,
        "program_version": __version__,
        "frames": {"source": record.frames_source, "dataset": record.frames_dataset, "n_frames": record.n_frames,
                   "frame_shape": None if record.frame_shape is None else list(record.frame_shape)},
        "current_index": int(record.current_index),
        "calibration": record.calibration,
        "calibration_origin": record.calibration_origin,
        "undo": list(record.undo),
        "settings": dict(record.settings),
        "fidelity": record.fidelity,
        "results_file": h5_path.name,
    }
    text = json.dumps(doc, indent=1, default=_json_default)  # before any file is touched: fails cleanly
    with atomic_path(h5_path, protect=protect) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = SESSION_FORMAT
            f.attrs["program_version"] = __version__
            if record.frames is not None:
                _write_frames(f, record.frames)
            res = record.results
            if res is not None:
                for key in ("rows", "cols", "done", "offset", "background"):
                    f.create_dataset(key, data=getattr(res, key))
                # lzf: fast enough to autosave thousands of frames without a long pause
                f.create_dataset("amplitude", data=res.amplitude, compression="lzf")
                f.create_dataset("flags", data=res.flags, compression="lzf")
                f.attrs["frame_warnings"] = json.dumps([list(w) for w in res.frame_warnings])
                if res.offset_sigma is not None:
                    f.create_dataset("offset_sigma", data=np.asarray(res.offset_sigma, float))
                f.attrs["offset_method"] = json.dumps(list(res.offset_method))
    with atomic_write(json_path, "w", protect=protect) as fh:
        fh.write(text)
    return json_path


def _write_frames(f, frames) -> None:
    if isinstance(frames, np.ndarray):
        read: Callable[[int], np.ndarray] = lambda i: frames[i]  # noqa: E731
        n = len(frames)
    else:
        read, n = frames
    first = np.asarray(read(0))
    ds = f.create_dataset("frames", shape=(n,) + first.shape, dtype=first.dtype, chunks=(1,) + first.shape,
                          compression="lzf")
    for i in range(n):
        ds[i] = first if i == 0 else np.asarray(read(i))


def read_session(path) -> SessionRecord:
    """Read a session file written by :func:`write_session` (format versions 1 and 2).

    Raises
    ------
    FrameFileError
        The file does not exist, is not JSON, is not a latticeread session, or its results
        file is damaged.
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise FrameFileError(f"session file {path} does not exist") from exc
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise FrameFileError(f"{path.name} is not a readable session file: {exc}") from exc
    except RecursionError as exc:
        raise FrameFileError(f"{path.name} is not a readable session file: it is nested too deeply") from exc
    if not isinstance(doc, dict) or doc.get("format") != SESSION_FORMAT:
        raise FrameFileError(f"{path.name} is not a latticeread session file")
    version = check_format_version(doc.get("format"), doc.get("format_version"), expected_format=SESSION_FORMAT,
                                   versions=range(1, SESSION_FORMAT_VERSION + 1),
                                   where=f"session file {path.name}", error=FrameFileError, default_version=1)
    _check_structure(doc, f"session file {path.name}")
    frames_info = doc.get("frames") or {}
    h5_path = path.parent / doc.get("results_file", path.with_suffix(".h5").name)
    frames, results = _read_results(h5_path) if h5_path.exists() else (None, None)
    shape = frames_info.get("frame_shape")
    return SessionRecord(
        frames_source=frames_info.get("source"), frames_dataset=frames_info.get("dataset"),
        n_frames=frames_info.get("n_frames"), frame_shape=None if shape is None else tuple(shape),
        current_index=int(doc.get("current_index", 0)), calibration=doc.get("calibration"),
        calibration_origin=doc.get("calibration_origin"), undo=tuple(doc.get("undo", [])),
        settings=dict(doc.get("settings", {})), fidelity=doc.get("fidelity"), frames=frames, results=results,
        format_version=version)


#: Expected JSON types of the session file's entries (None allowed everywhere: older files).
_ENTRY_TYPES = {"frames": (dict, "an object"), "calibration": (dict, "an object"),
                "calibration_origin": (dict, "an object"), "undo": (list, "a list"), "settings": (dict, "an object"),
                "fidelity": (dict, "an object"), "results_file": (str, "a file name")}


def _check_structure(doc: dict, where: str) -> None:
    """Refuse entries of the wrong JSON type with a message, before anything uses them.

    Raises
    ------
    FrameFileError
        An entry has the wrong type (the file is damaged or not written by latticeread).
    CalibrationError
        The stored calibration has values outside the physical ranges
        (:func:`latticeread.io.limits.check_calibration_values`).
    """
    def bad(what: str):
        raise FrameFileError(f"{where}: {what}; the file is damaged or was not written by latticeread")

    for key, (kind, name) in _ENTRY_TYPES.items():
        if doc.get(key) is not None and not isinstance(doc[key], kind):
            bad(f"'{key}' must be {name}, not {type(doc[key]).__name__}")
    frames = doc.get("frames") or {}
    for key in ("source", "dataset"):
        if frames.get(key) is not None and not isinstance(frames[key], str):
            bad(f"'frames.{key}' must be text, not {type(frames[key]).__name__}")
    index = doc.get("current_index", 0)
    if isinstance(index, bool) or not isinstance(index, int) or index < 0:
        bad(f"'current_index' must be a frame number (0 or more), not {index!r}")
    if isinstance(doc.get("calibration"), dict):
        from latticeread.errors import CalibrationError
        from latticeread.io.limits import check_calibration_values

        try:
            check_calibration_values(doc["calibration"], where=f"{where}: calibration")
        except CalibrationError:
            raise
        except (TypeError, ValueError, AttributeError, IndexError) as exc:
            raise CalibrationError(f"{where}: the stored calibration is malformed ({exc})") from exc


def _read_results(h5_path: Path):
    import h5py

    try:
        with h5py.File(h5_path, "r") as h5:
            frames = h5["frames"][()] if "frames" in h5 else None
            if "amplitude" not in h5:
                return frames, None
            n = h5["amplitude"].shape[0]
            warnings = [tuple(w) for w in json.loads(h5.attrs.get("frame_warnings", "[]"))] or [()] * n
            results = SessionResults(
                rows=h5["rows"][()], cols=h5["cols"][()], done=h5["done"][()].astype(bool),
                amplitude=h5["amplitude"][()], flags=h5["flags"][()], offset=h5["offset"][()],
                background=h5["background"][()] if "background" in h5 else np.zeros(n),
                frame_warnings=tuple(warnings),
                offset_sigma=h5["offset_sigma"][()] if "offset_sigma" in h5 else None,
                offset_method=tuple(str(m) for m in json.loads(h5.attrs.get("offset_method", "[]"))))
    except (OSError, KeyError, ValueError) as exc:
        raise FrameFileError(f"the results file {h5_path.name} of this session is damaged: {exc}") from exc
    return frames, results
