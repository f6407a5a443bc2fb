"""Per-site tables (CSV) and occupation matrices (HDF5): the output contract.

Both writers take an iterable of per-frame results (``FrameResult`` from
:mod:`latticeread.core.pipeline`, read duck-typed) and consume it lazily (the CSV one frame
at a time, the HDF5 file in slabs of a few frames, about 1 MiB per dataset), so a
generator over thousands of frames runs in flat memory. Both are atomic: the output appears
complete or not at all, and an existing file is never left half-overwritten.

CSV (``write_sites_csv``)
-------------------------
One header line, then one row per reconstructed site; no comment lines, so every CSV reader
works without options (``numpy.loadtxt(path, delimiter=",", skiprows=1)``,
``pandas.read_csv(path)``). Columns:

===========  ==========  ======================================================================
column       type        meaning
===========  ==========  ======================================================================
frame        int         0-based frame index in the input stack
row, col     int         lattice site indices along a1 and a2
x, y         float       site centre in pixels (x = column, y = row, centre of pixel (0,0) at 0,0)
amplitude    float       site amplitude in PHOTONS (counts converted with the camera model)
occupied     0/1         classification against the threshold
p_occupied   float       posterior probability that the site holds an atom
flags        int         quality bits, see :mod:`latticeread.core.flags` (0 = reliable)
===========  ==========  ======================================================================

Floats are written with the shortest text that reads back to the identical double, so a
round trip is bit-exact. The settings that made the table (calibration, thresholds,
program version, input files, creation time, units) go into a companion JSON file next to
it, ``<name>.csv.json`` (see :func:`sidecar_path`).

HDF5 (``write_occupation_hdf5``)
--------------------------------
Datasets (``n`` frames, matrices of ``R x C`` sites; element ``[i, j]`` is site
``(row_min + i, col_min + j)``, ``row_min``/``col_min`` are root attributes):

* ``occupation`` (n, R, C) uint8: 1 occupied, 0 empty, **255 outside the region**
  (the dataset's fill value);
* ``amplitude`` (n, R, C) float64, photons; ``p_occupied`` (n, R, C) float64;
  ``x``, ``y`` (n, R, C) float64, pixels; all NaN outside the region;
* ``flags`` (n, R, C) uint8 quality bits (0 outside the region; 128 on sites excluded from
  the analysed region, which keep occupation 255, NaN amplitude and their ``x``, ``y``);
* ``frame_index`` (n,) int64; ``offset`` (n, 2) float64 per-frame lattice offset (x, y) in
  pixels; ``threshold`` (n,) float64 photons; ``warnings`` (n,) text (``""`` when none).

Root attributes (JSON text where structured): ``format``, ``format_version``,
``program_version``, ``created`` (ISO 8601, UTC), ``units``, ``row_min``, ``col_min``,
``geometry``, ``psf``, ``camera``, ``threshold``, ``calibration``, ``inputs`` (input file
names), ``fidelity`` and ``metadata``. Each dataset also carries ``units`` and
``description`` attributes.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from latticeread import __version__
from latticeread.errors import FrameFileError, ReconstructionError

from .atomic import atomic_path, atomic_write
from .calibration_file import from_jsonable, to_jsonable
from .formats import check_format_version

__all__ = [
    "CSV_COLUMNS",
    "OUTSIDE",
    "OccupationFile",
    "write_sites_csv",
    "read_sites_csv",
    "read_sites_metadata",
    "write_occupation_hdf5",
    "read_occupation_hdf5",
    "sidecar_path",
]

log = logging.getLogger(__name__)

#: Column name -> numpy dtype of the per-site table.
CSV_COLUMNS = {
    "frame": np.int64,
    "row": np.int64,
    "col": np.int64,
    "x": np.float64,
    "y": np.float64,
    "amplitude": np.float64,
    "occupied": np.uint8,
    "p_occupied": np.float64,
    "flags": np.uint8,
}

#: Fill value of the ``occupation`` dataset for sites outside the reconstructed region.
OUTSIDE = 255

UNITS = {
    "frame": "index (0-based)",
    "row": "lattice sites along a1",
    "col": "lattice sites along a2",
    "x": "pixels (column; centre of pixel (0,0) at 0)",
    "y": "pixels (row, downwards; centre of pixel (0,0) at 0)",
    "amplitude": "photons",
    "occupied": "1 occupied, 0 empty, 255 outside the region (in the CSV: sites excluded from the analysed "
                "region, flag 128)",
    "p_occupied": "probability",
    "flags": "bit field, see latticeread.core.flags",
    "offset": "pixels (x, y) of lattice site (0, 0) in each frame",
    "threshold": "photons",
}



def units_for(calibration) -> dict:
    """:data:`UNITS` with the amplitude and threshold in photons only when the camera description makes them photons.

    Without a camera description (1 count = 1 photon) they are camera counts above the bias.
    """
    if calibration is None:
        return dict(UNITS)
    from latticeread.core.frame_check import amplitude_unit

    unit = amplitude_unit(calibration.camera)
    if unit == "photons":
        return dict(UNITS)
    return dict(UNITS, amplitude="counts (no camera description: not converted to photons)",
                threshold="counts (no camera description: not converted to photons)")


_FORMAT_CSV = "latticeread-sites-csv"
_FORMAT_H5 = "latticeread-occupation"


# --- reading a FrameResult duck-typed ------------------------------------------------------

@dataclass(frozen=True)
class _Frame:
    index: int
    rows: np.ndarray
    cols: np.ndarray
    x: np.ndarray
    y: np.ndarray
    amplitude: np.ndarray
    occupied: np.ndarray
    p_occupied: np.ndarray
    flags: np.ndarray
    threshold: float
    offset: tuple[float, float]
    warnings: tuple[str, ...]
    check: dict
    offset_sigma: tuple[float, float] = (float("nan"), float("nan"))
    offset_method: str = ""


def _check_numbers(result) -> dict:
    """The frame's image-model check (:mod:`latticeread.core.frame_check`) as run-file columns; {} if none."""
    check = getattr(result, "check", None)
    if check is None:
        return {}
    return {"light_outside": float(check.outside_fraction), "model_residual": float(check.residual_ratio),
            "light_explained": float(check.explained_fraction)}


def _threshold_value(result) -> float:
    t = getattr(result, "threshold", None)
    if t is None:
        tr = getattr(result, "threshold_result", None)
        t = getattr(tr, "threshold", None) if tr is not None else None
    if t is not None and hasattr(t, "threshold"):
        t = t.threshold
    return float("nan") if t is None else float(t)


def _frame_warnings(result) -> tuple[str, ...]:
    found: list[str] = []
    for source in (result, getattr(result, "threshold_result", None),
                   getattr(getattr(result, "geometry", None), "quality", None)):
        for w in getattr(source, "warnings", ()) or ():
            if str(w) not in found:
                found.append(str(w))
    return tuple(found)


def _read_result(result, position: int) -> _Frame:
    try:
        sites = result.sites
        rows = np.asarray(sites.rows, dtype=np.int64)
        cols = np.asarray(sites.cols, dtype=np.int64)
        x = np.asarray(sites.x, dtype=np.float64)
        y = np.asarray(sites.y, dtype=np.float64)
        amplitude = np.asarray(result.amplitudes, dtype=np.float64)
        occupied = np.asarray(result.occupied)
        p_occ = np.asarray(result.p_occupied, dtype=np.float64)
        flags = np.asarray(getattr(result, "flags", None) if getattr(result, "flags", None) is not None
                           else np.zeros(rows.shape, np.uint8))
        index = int(getattr(result, "frame_index", position))
    except AttributeError as exc:
        raise ReconstructionError(
            f"result number {position} cannot be exported: it has no attribute {exc.name!r} "
            "(expected a per-frame reconstruction result)") from exc
    n = rows.size
    for name, arr in (("cols", cols), ("x", x), ("y", y), ("amplitudes", amplitude), ("occupied", occupied),
                      ("p_occupied", p_occ), ("flags", flags)):
        if arr.shape != (n,):
            raise ReconstructionError(
                f"frame {index}: {name} has shape {arr.shape} but there are {n} sites; cannot export")
    if occupied.size and not np.isin(occupied, (0, 1)).all():
        raise ReconstructionError(f"frame {index}: 'occupied' must hold only 0 and 1")
    if flags.size and (flags.min() < 0 or flags.max() > 255):
        raise ReconstructionError(f"frame {index}: site flags must fit in 8 bits")
    occupied, flags = occupied.astype(np.uint8), flags.astype(np.uint8)
    excluded = getattr(result, "excluded", None)
    if excluded is not None and len(excluded):
        # sites left out of the analysed region: marked, not dropped (occupied 255, no amplitude)
        from latticeread.core.flags import EXCLUDED

        m = len(excluded)
        nan = np.full(m, np.nan)
        rows = np.concatenate([rows, np.asarray(excluded.rows, dtype=np.int64)])
        cols = np.concatenate([cols, np.asarray(excluded.cols, dtype=np.int64)])
        x = np.concatenate([x, np.asarray(excluded.x, dtype=np.float64)])
        y = np.concatenate([y, np.asarray(excluded.y, dtype=np.float64)])
        amplitude, p_occ = np.concatenate([amplitude, nan]), np.concatenate([p_occ, nan])
        occupied = np.concatenate([occupied, np.full(m, OUTSIDE, np.uint8)])
        flags = np.concatenate([flags, np.full(m, EXCLUDED, np.uint8)])
        order = np.lexsort((cols, rows))  # one table in lattice order, excluded rows among the others
        rows, cols, x, y, amplitude, occupied, p_occ, flags = (a[order] for a in (
            rows, cols, x, y, amplitude, occupied, p_occ, flags))
    geometry = getattr(result, "geometry", None)
    offset = tuple(float(v) for v in geometry.offset) if geometry is not None else (float("nan"),) * 2
    sigma = tuple(float(v) for v in getattr(result, "offset_sigma", (float("nan"),) * 2))
    return _Frame(index, rows, cols, x, y, amplitude, occupied, p_occ, flags,
                  _threshold_value(result), offset, _frame_warnings(result), _check_numbers(result),
                  offset_sigma=sigma, offset_method=str(getattr(result, "offset_method", "") or ""))


def _settings(calibration, metadata: Mapping | None, *, fmt: str) -> dict:
    meta = dict(metadata or {})
    out = {
        "format": fmt,
        "format_version": 1,
        "program_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "units": units_for(calibration),
        "inputs": _input_names(meta.pop("inputs", [])),
        "calibration": None if calibration is None else calibration.to_dict(),
        "fidelity": meta.pop("fidelity", None),
        "metadata": meta,
    }
    return to_jsonable(out)


def _input_names(inputs) -> list[str]:
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    return [os.fspath(p) for p in inputs]


def sidecar_path(path) -> Path:
    """Companion JSON of a CSV table: ``run.csv`` -> ``run.csv.json``."""
    path = Path(os.fspath(path))
    return path.with_name(path.name + ".json")


# --- CSV ------------------------------------------------------------------------------------

def _fmt_float(values: np.ndarray) -> list[str]:
    # repr(float) is the shortest text that reads back to the same double ("nan" for NaN);
    # map() runs it in a C loop, without a Python frame per value.
    return list(map(repr, values.tolist()))


#: Text of the small integers (indices, 0/1, flags), looked up instead of formatted.
_SMALL_INTS = np.array([str(i) for i in range(4096)], dtype=object)


def _fmt_int(values: np.ndarray) -> list[str]:
    values = np.asarray(values)
    if values.size and values.min() >= 0 and values.max() < _SMALL_INTS.size:
        return _SMALL_INTS[values.astype(np.intp)].tolist()
    return list(map(str, values.tolist()))


def _csv_block(f: "_Frame") -> str:
    """The rows of one frame as one string: columns formatted whole, rows joined in C loops."""
    n = f.rows.size
    if n == 0:
        return ""
    columns = [[str(f.index)] * n, _fmt_int(f.rows), _fmt_int(f.cols), _fmt_float(f.x), _fmt_float(f.y),
               _fmt_float(f.amplitude), _fmt_int(f.occupied), _fmt_float(f.p_occupied), _fmt_int(f.flags)]
    return "\n".join(map(",".join, zip(*columns))) + "\n"


def write_sites_csv(path, results: Iterable, *, calibration=None, metadata: Mapping | None = None,
                    protect=None) -> int:
    """Write the per-site table of many frames to CSV, plus a companion JSON of settings.

    Parameters
    ----------
    path : str or PathLike
        Output CSV file. The settings go to ``<path>.json`` (:func:`sidecar_path`).
    results : iterable of FrameResult
        Per-frame results (a generator is consumed lazily, one frame in memory at a time).
        Read attributes: ``frame_index``, ``sites`` (``rows``, ``cols``, ``x``, ``y`` in
        pixels), ``amplitudes`` (photons), ``occupied``, ``p_occupied``, ``flags``,
        ``threshold`` (photons), ``geometry``.
    calibration : Calibration, optional
        Stored in the companion JSON.
    metadata : mapping, optional
        JSON-able extras. ``metadata["inputs"]`` (input file names) and
        ``metadata["fidelity"]`` (a fidelity report or dict) get their own entries.
    protect : iterable of paths, optional
        Input files that must not be overwritten.

    Returns
    -------
    int
        Number of site rows written.

    Notes
    -----
    Read the table back with :func:`read_sites_csv`, ``pandas.read_csv(path)`` or
    ``numpy.loadtxt(path, delimiter=",", skiprows=1)``. The file has no comment lines.

    Raises
    ------
    ExportError
        The file cannot be written (nothing is left behind).
    ReconstructionError
        A result lacks a required attribute or has inconsistent array lengths.
    """
    path = Path(os.fspath(path))
    settings = _settings(calibration, metadata, fmt=_FORMAT_CSV)
    n_rows = 0
    n_frames = 0
    warnings_by_frame: dict[str, list[str]] = {}
    checks_by_frame: dict[str, dict] = {}
    offsets_by_frame: dict[str, dict] = {}
    # the two files are renamed into place one after the other: a kill between the renames
    # would leave a table beside another table's settings, so the settings carry the table's
    # checksum and read_sites_metadata refuses settings that do not match their table
    digest, n_bytes = hashlib.sha256(), 0
    with atomic_write(sidecar_path(path), "w", protect=protect) as side, \
            atomic_write(path, "w", protect=protect, newline="") as fh:

        def write(text: str) -> None:
            nonlocal n_bytes
            data = text.encode("utf-8")
            fh.write(text)
            digest.update(data)
            n_bytes += len(data)

        write(",".join(CSV_COLUMNS) + "\n")
        for position, result in enumerate(results):
            f = _read_result(result, position)
            if f.warnings:
                warnings_by_frame[str(f.index)] = list(f.warnings)
            if f.check:
                checks_by_frame[str(f.index)] = f.check
            offsets_by_frame[str(f.index)] = {"offset": list(f.offset), "sigma": list(f.offset_sigma),
                                              "method": f.offset_method}
            write(_csv_block(f))
            n_rows += f.rows.size
            n_frames += 1
        settings["n_frames"] = n_frames
        settings["n_rows"] = n_rows
        settings["table_bytes"] = n_bytes
        settings["table_sha256"] = digest.hexdigest()
        settings["columns"] = {name: settings["units"][name] for name in CSV_COLUMNS}
        settings["frame_warnings"] = warnings_by_frame
        # does the site model explain each frame: light outside the region and bright light
        # explained (fractions), residual over the camera's expected noise (1 = as expected)
        settings["frame_checks"] = to_jsonable(checks_by_frame)
        # each frame's lattice offset (pixels), its 1-sigma (pixels, "NaN": not estimated) and how it was found
        settings["frame_offsets"] = to_jsonable(offsets_by_frame)
        side.write(json.dumps(settings, indent=2, allow_nan=False) + "\n")
    log.info("wrote %d site rows of %d frames to %s", n_rows, n_frames, path)
    return n_rows


def read_sites_csv(path) -> dict[str, np.ndarray]:
    """Read a per-site CSV table.

    Parameters
    ----------
    path : str or PathLike

    Returns
    -------
    dict of str -> (N,) ndarray
        One array per column with the dtypes of :data:`CSV_COLUMNS` (extra columns added
        by other tools are returned as float64).

    Raises
    ------
    FrameFileError
        Missing file, or not a per-site table (required column missing, bad value).
    """
    path = Path(os.fspath(path))
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            header = fh.readline().strip()
            names = [h.strip() for h in header.split(",")]
            missing = [c for c in CSV_COLUMNS if c not in names]
            if missing:
                raise FrameFileError(f"{path.name} is not a per-site table: column(s) {', '.join(missing)} missing")
            dtype = [(name, CSV_COLUMNS.get(name, np.float64)) for name in names]
            try:
                table = np.loadtxt(fh, delimiter=",", dtype=dtype, ndmin=1)
            except ValueError as exc:
                raise FrameFileError(f"{path.name}: unreadable value in the per-site table ({exc})") from exc
    except FileNotFoundError as exc:
        raise FrameFileError(f"per-site table {path} does not exist") from exc
    except UnicodeDecodeError as exc:
        raise FrameFileError(f"{path.name} is not a text CSV file") from exc
    return {name: np.ascontiguousarray(table[name]) for name in names}


def read_sites_metadata(path) -> dict:
    """Settings stored beside a CSV table (its companion JSON), or ``{}`` when absent.

    Raises
    ------
    FrameFileError
        The companion is not valid JSON, or it was written for another table: its
        ``table_sha256`` (SHA-256 of the table's bytes, stored since the companion carries it)
        differs from the table's.
    """
    path = Path(os.fspath(path))
    side = sidecar_path(path)
    if not side.exists():
        return {}
    try:
        settings = from_jsonable(json.loads(side.read_text(encoding="utf-8")))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise FrameFileError(f"{side.name} (settings of {path.name}) is not valid JSON: {exc}") from exc
    expected = settings.get("table_sha256") if isinstance(settings, dict) else None
    if expected is not None and path.exists():
        digest = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                digest.update(block)
        if digest.hexdigest() != expected:
            raise FrameFileError(f"{side.name} holds the settings of another table than {path.name} (the table's "
                                 "checksum differs from the one stored with the settings; a run stopped between "
                                 "writing the two, or one of them was replaced): write the table again")
    return settings


# --- HDF5 -----------------------------------------------------------------------------------

_MATRIX_DATASETS = {
    # name: (dtype, fill value, description)
    "occupation": (np.uint8, OUTSIDE, "1 occupied, 0 empty, 255 outside the reconstructed region"),
    "amplitude": (np.float64, np.nan, "site amplitude"),
    "p_occupied": (np.float64, np.nan, "posterior probability of occupation"),
    "flags": (np.uint8, 0, "quality bits, see latticeread.core.flags"),
    "x": (np.float64, np.nan, "site centre x"),
    "y": (np.float64, np.nan, "site centre y"),
}


def write_occupation_hdf5(path, results: Iterable, *, calibration=None, metadata: Mapping | None = None,
                          protect=None, block: int = 32) -> int:
    """Write occupation matrices and per-site arrays of many frames to one results file.

    The file has the run-file layout of :mod:`latticeread.io.run_file` (the one layout
    that batch and watch write too), plus the output contract's root attributes
    (``geometry``, ``psf``, ``camera``, ``threshold``, ``inputs``, ``fidelity``,
    ``units``, ``row_min``, ``col_min``). It is written under a temporary name and renamed
    when complete: the path holds the whole new file or its previous content.

    Parameters
    ----------
    path : str or PathLike
        Output file (``.h5``).
    results : iterable of FrameResult
        Per-frame results; a generator is written in blocks of ``block`` frames, so memory
        stays flat. All frames must share the site index set of the first frame (a fixed
        calibration), otherwise ReconstructionError.
    calibration : Calibration, optional
        Stored as root attributes (``calibration``, ``geometry``, ``psf``, ``camera``,
        ``threshold``).
    metadata : mapping, optional
        ``inputs`` (input file names) and ``fidelity`` become their own attributes, the
        rest goes to the ``metadata`` attribute (JSON). With exactly one input file its
        path is each shot's ``source``.
    protect : iterable of paths, optional
        Input files that must not be overwritten.
    block : int
        Frames per written block.

    Returns
    -------
    int
        Number of frames written.

    Raises
    ------
    ExportError
        The file cannot be written (nothing is left behind), e.g. a full disk.
    ReconstructionError
        No results, inconsistent arrays, or a frame with sites outside the first frame's
        index range.
    """
    from .run_file import RunWriter, ShotKey, ShotRecord

    path = Path(os.fspath(path))
    settings = _settings(calibration, metadata, fmt=_FORMAT_H5)
    cal = settings["calibration"]
    inputs = settings["inputs"]
    source = inputs[0] if len(inputs) == 1 else ""
    n = 0
    with atomic_path(path, protect=protect) as tmp:
        tmp.unlink()  # the run writer creates it (under its own temporary name)
        row_min = col_min = n_r = n_c = 0
        attrs = {"units": settings["units"], "inputs": inputs, "fidelity": settings["fidelity"],
                 **{key: None if cal is None else cal[key] for key in ("geometry", "psf", "camera")},
                 "threshold": np.nan if cal is None or cal["threshold"] is None else float(cal["threshold"])}
        pending: list = []
        writer = None
        try:
            for position, result in enumerate(results):
                f = _read_result(result, position)
                if writer is None:
                    if f.rows.size:
                        row_min, col_min = int(f.rows.min()), int(f.cols.min())
                        n_r, n_c = int(f.rows.max()) - row_min + 1, int(f.cols.max()) - col_min + 1
                    attrs.update(row_min=row_min, col_min=col_min)
                    writer = RunWriter(tmp, calibration_json=json.dumps(cal, allow_nan=False),
                                       metadata=settings["metadata"], attrs=attrs)
                ii, jj = f.rows - row_min, f.cols - col_min
                if f.rows.size and (ii.min() < 0 or jj.min() < 0 or ii.max() >= n_r or jj.max() >= n_c):
                    raise ReconstructionError(
                        f"frame {f.index} has sites outside the index range of the first frame "
                        f"(rows {row_min}..{row_min + n_r - 1}, cols {col_min}..{col_min + n_c - 1}); "
                        "frames exported together must share one calibration's site set")
                matrices = {}
                for name, values in (("occupation", f.occupied), ("amplitude", f.amplitude),
                                     ("p_occupied", f.p_occupied), ("flags", f.flags), ("x", f.x), ("y", f.y)):
                    dtype, fill, _ = _MATRIX_DATASETS[name]
                    m = np.full((n_r, n_c), fill, dtype=dtype)
                    m[ii, jj] = values
                    matrices[name] = m
                geometry = getattr(result, "geometry", None)
                nan2 = (float("nan"), float("nan"))
                pending.append(ShotRecord(
                    key=ShotKey(source, "", f.index), **matrices, offset=f.offset,
                    a1=tuple(float(v) for v in geometry.a1) if geometry is not None else nan2,
                    a2=tuple(float(v) for v in geometry.a2) if geometry is not None else nan2,
                    threshold=f.threshold, warnings=f.warnings, origin=(row_min, col_min),
                    offset_sigma=f.offset_sigma, offset_method=f.offset_method, **f.check))
                if len(pending) >= block:
                    n += writer.append_many(pending)
                    pending = []
            if writer is not None and pending:
                n += writer.append_many(pending)
            if n == 0:
                raise ReconstructionError(f"nothing to export to {path.name}: there are no frame results")
        finally:
            if writer is not None:
                writer.close()
    log.info("wrote %d frames to %s", n, path)
    return n


@dataclass(frozen=True)
class OccupationFile:
    """Contents of an HDF5 file written by :func:`write_occupation_hdf5`.

    Attributes
    ----------
    occupation : (n, R, C) ndarray of uint8
        1 occupied, 0 empty, 255 (:data:`OUTSIDE`) outside the region.
    amplitude, p_occupied, x, y : (n, R, C) ndarray of float64
        Photons, probability, pixels, pixels; NaN outside the region.
    flags : (n, R, C) ndarray of uint8
    frame_index : (n,) ndarray of int64
    offset : (n, 2) ndarray of float64
        Lattice offset (x, y) in pixels of each frame.
    threshold : (n,) ndarray of float64
        Photons.
    warnings : tuple of str
        One entry per frame (``""`` when none).
    row_min, col_min : int
        Lattice indices of matrix element ``[0, 0]``.
    attrs : dict
        Root attributes, JSON ones decoded (``calibration``, ``geometry``, ``psf``,
        ``camera``, ``units``, ``inputs``, ``fidelity``, ``metadata``...).
    """

    occupation: np.ndarray
    amplitude: np.ndarray
    p_occupied: np.ndarray
    flags: np.ndarray
    x: np.ndarray
    y: np.ndarray
    frame_index: np.ndarray
    offset: np.ndarray
    threshold: np.ndarray
    warnings: tuple[str, ...]
    row_min: int
    col_min: int
    attrs: dict = field(default_factory=dict)

    @property
    def calibration(self):
        """The stored :class:`~latticeread.core.calibration.Calibration`, or None."""
        from latticeread.core.calibration import Calibration

        data = self.attrs.get("calibration")
        return None if data is None else Calibration.from_dict(data)

    def site_indices(self) -> tuple[np.ndarray, np.ndarray]:
        """Lattice indices ``(rows, cols)`` of the matrix axes."""
        return (self.row_min + np.arange(self.occupation.shape[1]),
                self.col_min + np.arange(self.occupation.shape[2]))


_JSON_ATTRS = ("units", "inputs", "fidelity", "metadata", "calibration", "geometry", "psf", "camera")


def read_occupation_hdf5(path) -> OccupationFile:
    """Read a results file (run layout, or the occupation layout of version 1) into memory.

    Reads the files of ``reconstruct --out x.h5``, ``batch``, ``watch`` and the window's
    export alike (:mod:`latticeread.io.run_file`); shots whose writer was interrupted are
    left out. For a notebook, :func:`latticeread.io.read_results` gives the same content as
    plain arrays and a dict.

    Raises
    ------
    FrameFileError
        Missing file, not HDF5, or not a latticeread results file.
    """
    from .run_file import RUN_FORMAT, open_run_for_reading, read_run

    path = Path(os.fspath(path))
    if not path.exists():
        raise FrameFileError(f"occupation file {path} does not exist")
    try:
        h5 = open_run_for_reading(path)
    except FrameFileError as exc:
        raise FrameFileError(f"{path.name} is not a readable HDF5 file ({exc})") from exc
    with h5:
        attrs = _decoded_attrs(h5)
        if attrs.get("format") != RUN_FORMAT:
            return _read_occupation_v1(h5, path, attrs)
    run = read_run(path)
    cal = attrs.get("calibration")
    for key in ("geometry", "psf", "camera"):
        if attrs.get(key) is None and isinstance(cal, dict):
            attrs[key] = cal.get(key)
    if "threshold" not in attrs and isinstance(cal, dict):
        attrs["threshold"] = np.nan if cal.get("threshold") is None else float(cal["threshold"])
    attrs.setdefault("inputs", sorted(set(run.source.tolist())))
    attrs.setdefault("units", UNITS)
    row_min, col_min = (int(v) for v in run.origin[0]) if len(run) else \
        (int(attrs.get("row_min", 0)), int(attrs.get("col_min", 0)))
    return OccupationFile(occupation=run.occupation, amplitude=run.amplitude, p_occupied=run.p_occupied,
                          flags=run.flags, x=run.x, y=run.y, frame_index=run.frame_index, offset=run.offset,
                          threshold=run.threshold, warnings=tuple("; ".join(w) for w in run.warnings),
                          row_min=row_min, col_min=col_min, attrs=attrs)


def _decoded_attrs(h5) -> dict:
    attrs = {}
    for key, value in h5.attrs.items():
        if isinstance(value, bytes):
            value = value.decode("utf-8")
        if key in _JSON_ATTRS and isinstance(value, str):
            try:
                value = from_jsonable(json.loads(value))
            except json.JSONDecodeError:
                pass
        elif isinstance(value, np.generic):
            value = value.item()
        attrs[key] = value
    return attrs


def _read_occupation_v1(h5, path: Path, attrs: dict) -> OccupationFile:
    """The occupation layout written before the run layout became the one results file."""
    needed = [*_MATRIX_DATASETS, "frame_index", "offset", "threshold", "warnings"]
    missing = [k for k in needed if k not in h5]
    if missing:
        raise FrameFileError(f"{path.name} is not a latticeread occupation file: dataset(s) "
                             f"{', '.join(missing)} missing")
    check_format_version(attrs.get("format"), attrs.get("format_version"), expected_format=_FORMAT_H5,
                         versions=[1], where=path.name, error=FrameFileError, default_version=1)
    arrays = {k: h5[k][()] for k in [*_MATRIX_DATASETS, "frame_index", "offset", "threshold"]}
    warnings = tuple(w.decode("utf-8") if isinstance(w, bytes) else str(w) for w in h5["warnings"][()])
    return OccupationFile(**arrays, warnings=warnings, row_min=int(attrs.get("row_min", 0)),
                          col_min=int(attrs.get("col_min", 0)), attrs=attrs)
