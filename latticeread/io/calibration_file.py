"""Calibration files: one JSON object per imaging setting.

The file is plain, strict JSON (RFC 8259) so any language can read it. JSON has no
NaN or infinity, so non-finite numbers (for instance an undetermined fit residual) are
written as the strings ``"NaN"``, ``"Infinity"`` and ``"-Infinity"`` and turned back into
floats when the file is loaded.

Layout (all lengths in pixels, amplitudes and thresholds in photons)::

    {
      "format": "latticeread-calibration", "format_version": 2, "program_version": "0.1.0",
      "geometry": {"a1": [x, y], "a2": [x, y], "offset": [x, y], "quality": {...}},
      "psf": {"kind": "airy" | "gaussian" | "empirical", "fwhm": px, "radius": px,
              "params": {...}, "supersample": n, "kernel": [[...], ...] (empirical only)},
      "camera": {"kind": "emccd" | "scmos", "em_gain": ..., "counts_per_electron": ...,
                 "bias": counts, "read_noise": counts, "quantum_efficiency": ...,
                 "clock_induced_charge": electrons, "saturation": counts},
      "frame_shape": [height, width],
      "threshold": photons or null, "threshold_method": "mixture" | "otsu" | "minimum",
      "threshold_scope": "pooled" | "per_frame", "threshold_fit": {...} or null,
      "amplitude_method": "...", "pixel_size_nm": nm or null,
      "reconstruction": {"weighting": "none" | "camera", "index_bounds": [r0, r1, c0, c1] or null,
                         "photons_per_atom": photons or null, "phase_method": "atoms" | "model" | "fourier",
                         "refit_phase": true, "reference": {"block", "shape", "values", "n_frames"} or null,
                         "region": {"include": [shape, ...], "exclude": [shape, ...],
                                    "excluded_sites": [[row, col], ...]} (optional: every site)},
          shape = {"kind": "polygon", "points": [[x, y], ...]} or
                  {"kind": "rectangle" | "ellipse", "origin": [x, y], "width": px, "height": px,
                   "angle": degrees}
      "frame_policy": {"nonfinite": "flag" | "fail", "saturated": "flag" | "fail"},
      "distortion": {"centre": [x, y], "scale": px, "order": n, "coef_x": [...], "coef_y": [...],
                     "applied": bool, ...fit diagnostics} or null   (optional; absent = none),
      "brightness": {"centre": [x, y], "scale": px, "order": n, "coef": [...], "applied": bool,
                     ...fit diagnostics} or null   (optional; absent = uniform),
      "psf_zones": {"grid": [rows, cols], "bounds": [x0, x1, y0, y1], "psfs": [psf, ...],
                    "n_atoms": [...], "fitted": [...], "fwhm": [...], "applied": bool, "warnings": [...]}
                   or null   (optional; absent = one PSF everywhere),
      "notes": {...}   (provenance only)
    }

Format version 1 had no ``threshold_scope``, ``threshold_fit``, ``reconstruction`` or
``frame_policy``; its settings (``weighting``, ``index_bounds``, ``photons_per_atom``,
``reference_photons``, ``threshold_result``) travelled in ``notes``. Such files still load:
the settings are moved into the typed fields. A file without ``reconstruction.region``
analyses every site (:mod:`latticeread.core.region`).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from pathlib import Path

import numpy as np

from latticeread.core.calibration import FORMAT_VERSION, Calibration
from latticeread.errors import CalibrationError

from .atomic import atomic_write
from .limits import check_calibration_values

__all__ = ["save_calibration", "load_calibration", "calibration_to_json", "calibration_from_json",
           "save_camera", "load_camera", "to_jsonable", "from_jsonable"]

_NONFINITE = {"NaN": math.nan, "Infinity": math.inf, "-Infinity": -math.inf}


def to_jsonable(value):
    """Convert ``value`` into plain JSON types (strict: no NaN/inf tokens).

    numpy scalars and arrays become numbers and lists, paths become strings, objects with
    a ``to_dict()`` method and dataclasses become objects, non-finite floats become the
    strings ``"NaN"``, ``"Infinity"``, ``"-Infinity"``.
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (int, np.integer)) and not isinstance(value, np.bool_):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return "NaN"
        if math.isinf(v):
            return "Infinity" if v > 0 else "-Infinity"
        return v
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [to_jsonable(v) for v in value]
    if hasattr(value, "to_dict") and callable(value.to_dict):
        return to_jsonable(value.to_dict())
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return to_jsonable({f.name: getattr(value, f.name) for f in dataclasses.fields(value)})
    raise TypeError(f"cannot store a {type(value).__name__} in a JSON file")


def from_jsonable(value):
    """Inverse of :func:`to_jsonable` for non-finite numbers (strings back to floats)."""
    if isinstance(value, str):
        return _NONFINITE.get(value, value)
    if isinstance(value, dict):
        return {k: from_jsonable(v) for k, v in value.items()}
    if isinstance(value, list):
        return [from_jsonable(v) for v in value]
    return value


def calibration_to_json(calibration: Calibration) -> str:
    """The JSON text of a calibration (strict JSON, indented)."""
    return json.dumps(to_jsonable(calibration.to_dict()), indent=2, allow_nan=False) + "\n"


def save_calibration(path, calibration: Calibration, *, protect=None) -> Path:
    """Write a calibration to a JSON file, atomically.

    Parameters
    ----------
    path : str or PathLike
        Output file (``.json`` by convention).
    calibration : Calibration
        Geometry (pixels), PSF (pixels), camera (counts), threshold (photons).
    protect : iterable of paths, optional
        Input files that must not be overwritten.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    ExportError
        The file cannot be written; an existing file is left unchanged.
    """
    if not isinstance(calibration, Calibration):
        raise TypeError(f"save_calibration needs a Calibration, got {type(calibration).__name__}")
    text = calibration_to_json(calibration)
    path = Path(os.fspath(path))
    with atomic_write(path, "w", protect=protect) as fh:
        fh.write(text)
    return path


# --- schema check: name the offending key ------------------------------------------------

def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _describe(v) -> str:
    if v is None:
        return "null"
    kind = {dict: "an object", list: "a list", str: "a string", bool: "true/false"}.get(type(v))
    if kind is None:
        kind = "a number" if _is_number(v) else type(v).__name__
    text = json.dumps(v) if not isinstance(v, (dict, list)) else ""
    return f"{kind} ({text})" if text and len(text) < 40 else kind


def _pair(v) -> bool:
    return isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v)


def _int_pair(v) -> bool:
    return isinstance(v, list) and len(v) == 2 and all(isinstance(x, int) and not isinstance(x, bool) for x in v)


def _matrix(v) -> bool:
    return (isinstance(v, list) and len(v) > 0 and all(isinstance(r, list) for r in v)
            and len({len(r) for r in v}) == 1 and all(_is_number(x) for r in v for x in r))


_number = (_is_number, "a number")
_int = (lambda v: isinstance(v, int) and not isinstance(v, bool), "a whole number")
_str = (lambda v: isinstance(v, str), "a string")
_obj = (lambda v: isinstance(v, dict), "an object")
_xy = (_pair, "a list of two numbers [x, y] in pixels")
_bool = (lambda v: isinstance(v, bool), "true or false")
_numbers = (lambda v: isinstance(v, list) and all(_is_number(x) for x in v), "a list of numbers")

#: key path -> (required, (check, expected description), nullable)
_SCHEMA = {
    "geometry": (True, _obj, False),
    "geometry.a1": (True, _xy, False),
    "geometry.a2": (True, _xy, False),
    "geometry.offset": (False, _xy, False),
    "geometry.quality": (False, _obj, False),
    "psf": (True, _obj, False),
    "psf.kind": (True, _str, False),
    "psf.fwhm": (True, _number, False),
    "psf.radius": (True, _int, False),
    "psf.params": (False, _obj, False),
    "psf.supersample": (False, _int, False),
    "psf.kernel": (False, (_matrix, "a rectangular list of lists of numbers"), True),
    "camera": (True, _obj, False),
    "camera.kind": (False, _str, False),
    "camera.em_gain": (False, _number, False),
    "camera.counts_per_electron": (False, _number, False),
    "camera.bias": (False, _number, False),
    "camera.read_noise": (False, _number, False),
    "camera.quantum_efficiency": (False, _number, False),
    "camera.clock_induced_charge": (False, _number, False),
    "camera.saturation": (False, _int, False),
    "frame_shape": (True, (_int_pair, "a list of two whole numbers [height, width]"), False),
    "threshold": (False, _number, True),
    "threshold_method": (False, _str, False),
    "amplitude_method": (False, _str, False),
    "pixel_size_nm": (False, _number, True),
    "threshold_scope": (False, _str, False),
    "threshold_fit": (False, _obj, True),
    "reconstruction": (False, _obj, False),
    "reconstruction.weighting": (False, _str, False),
    "reconstruction.index_bounds": (False, (lambda v: isinstance(v, list) and len(v) == 4 and all(
        isinstance(x, int) and not isinstance(x, bool) for x in v), "a list of four whole numbers"), True),
    "reconstruction.photons_per_atom": (False, _number, True),
    "reconstruction.phase_method": (False, _str, False),
    "reconstruction.background": (False, _str, False),
    "reconstruction.refit_phase": (False, _bool, False),
    "reconstruction.reference": (False, _obj, True),
    "reconstruction.region": (False, _obj, True),
    "reconstruction.region.include": (False, (lambda v: isinstance(v, list), "a list of shapes"), False),
    "reconstruction.region.exclude": (False, (lambda v: isinstance(v, list), "a list of shapes"), False),
    "reconstruction.region.excluded_sites": (False, (lambda v: isinstance(v, list) and all(
        _int_pair(p) for p in v), "a list of [row, col] pairs of whole numbers"), False),
    "frame_policy": (False, _obj, False),
    "frame_policy.nonfinite": (False, _str, False),
    "frame_policy.saturated": (False, _str, False),
    "distortion": (False, _obj, True),
    "distortion.centre": (True, _xy, False),
    "distortion.scale": (True, _number, False),
    "distortion.order": (True, _int, False),
    "distortion.coef_x": (True, _numbers, False),
    "distortion.coef_y": (True, _numbers, False),
    "brightness": (False, _obj, True),
    "brightness.centre": (True, _xy, False),
    "brightness.scale": (True, _number, False),
    "brightness.order": (True, _int, False),
    "brightness.coef": (True, _numbers, False),
    "psf_zones": (False, _obj, True),
    "psf_zones.grid": (True, (_int_pair, "a list of two whole numbers [rows, columns]"), False),
    "psf_zones.bounds": (True, (lambda v: isinstance(v, list) and len(v) == 4 and all(_is_number(x) for x in v),
                                "a list of four numbers [x0, x1, y0, y1]"), False),
    "psf_zones.psfs": (True, (lambda v: isinstance(v, list) and all(isinstance(x, dict) for x in v),
                              "a list of PSF objects"), False),
    "notes": (False, _obj, False),
}


def _check_schema(data, where: str) -> None:
    if not isinstance(data, dict):
        raise CalibrationError(f"{where}: a calibration must be a JSON object, got {_describe(data)}")
    fmt = data.get("format", "latticeread-calibration")
    if fmt != "latticeread-calibration":
        raise CalibrationError(f"{where}: this is not a latticeread calibration (format is {fmt!r})")
    version = data.get("format_version", 1)
    if _is_number(version) and (version != int(version) or version < 1):
        raise CalibrationError(f"{where}: calibration format version {version!r} is not one this program knows "
                               f"(whole numbers 1 to {FORMAT_VERSION})")
    if not _is_number(version) or version > FORMAT_VERSION:
        raise CalibrationError(
            f"{where}: calibration format version {version!r} is newer than this program understands "
            f"({FORMAT_VERSION}); update latticeread")
    for key, (required, (check, expected), nullable) in _SCHEMA.items():
        parent_key, _, name = key.rpartition(".")
        parent = data
        for part in (parent_key.split(".") if parent_key else ()):
            parent = parent.get(part) if isinstance(parent, dict) else None
        if not isinstance(parent, dict):
            continue  # a missing/wrong parent is reported under its own key
        if name not in parent:
            if required:
                raise CalibrationError(f"{where}: key '{key}' is missing")
            continue
        value = parent[name]
        if value is None and nullable:
            continue
        if not check(value):
            raise CalibrationError(f"{where}: key '{key}' must be {expected}, got {_describe(value)}")


def calibration_from_json(text: str, *, where: str = "calibration") -> Calibration:
    """Parse calibration JSON text (see the module docstring for the layout).

    Raises
    ------
    CalibrationError
        Not JSON, a key missing or of the wrong type (the message names the key, e.g.
        ``geometry.a1``), or values the models reject (negative gain...).
    """
    try:
        data = from_jsonable(json.loads(text))
    except json.JSONDecodeError as exc:
        raise CalibrationError(
            f"{where} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})") from exc
    except RecursionError as exc:
        raise CalibrationError(f"{where} is nested too deeply to be a calibration (lists or objects inside "
                               "each other thousands of levels deep)") from exc
    _check_schema(data, where)
    check_calibration_values(data, where=where)
    try:
        return Calibration.from_dict(data)
    except CalibrationError as exc:
        raise CalibrationError(f"{where}: {exc}") from exc
    except (KeyError, TypeError, ValueError) as exc:  # defensive: a model rejected a value
        raise CalibrationError(f"{where}: {exc}") from exc


def load_calibration(path) -> Calibration:
    """Read a calibration JSON file written by :func:`save_calibration`.

    Parameters
    ----------
    path : str or PathLike

    Returns
    -------
    Calibration
        Equal to the saved object (``to_dict()`` identical, empirical kernel bit-exact).

    Raises
    ------
    CalibrationError
        Missing or unreadable file, invalid JSON, a missing key or a key of the wrong type
        (named in the message, e.g. ``key 'camera.em_gain' must be a number``).
    """
    path = Path(os.fspath(path))
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise CalibrationError(f"calibration file {path} does not exist") from exc
    except IsADirectoryError as exc:
        raise CalibrationError(f"calibration file {path} is a folder, not a file") from exc
    except OSError as exc:
        raise CalibrationError(f"cannot read calibration file {path}: {exc.strerror or exc}") from exc
    if not raw.strip():
        raise CalibrationError(f"calibration file {path} is empty")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CalibrationError(f"calibration file {path} is not a text (UTF-8 JSON) file") from exc
    return calibration_from_json(text, where=f"calibration file {path.name}")


# --- camera files (written by ``latticeread camera``) ------------------------------------------

def save_camera(path, estimate, *, inputs=None, protect=None) -> Path:
    """Write a measured camera (a ``CameraEstimate`` or a ``CameraModel``) to JSON, atomically.

    Parameters
    ----------
    path : str or PathLike
    estimate : CameraEstimate or CameraModel
        Camera fields in counts plus, for an estimate, the dark and photon-transfer
        diagnostics.
    inputs : mapping, optional
        Input file names, stored for traceability.
    protect : iterable of paths, optional
        Files that must not be overwritten (the dark and flat frame files).
    """
    import datetime as _dt

    from latticeread import __version__
    from latticeread.core.camera import CameraModel

    body = {"camera": estimate.to_dict()} if isinstance(estimate, CameraModel) else estimate.to_dict()
    data = {"format": "latticeread-camera", "format_version": 1, "program_version": __version__,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "inputs": inputs or {}, **body}
    path = Path(os.fspath(path))
    with atomic_write(path, "w", protect=protect) as fh:
        fh.write(json.dumps(to_jsonable(data), indent=2, allow_nan=False) + "\n")
    return path


_CAMERA_KEYS = ("camera.kind", "camera.em_gain", "camera.counts_per_electron", "camera.bias", "camera.read_noise",
                "camera.quantum_efficiency", "camera.clock_induced_charge", "camera.saturation")


def load_camera(path):
    """Read the camera of a camera file (``latticeread camera``) or of a calibration file.

    Returns
    -------
    CameraModel

    Raises
    ------
    CalibrationError
        Missing/unreadable file, invalid JSON, no ``camera`` object, or a camera field of
        the wrong type or value (the message names the key).
    """
    from latticeread.core.camera import CameraModel

    path = Path(os.fspath(path))
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise CalibrationError(f"camera file {path} does not exist") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise CalibrationError(f"cannot read camera file {path}: {exc}") from exc
    where = f"camera file {path.name}"
    try:
        data = from_jsonable(json.loads(text))
    except json.JSONDecodeError as exc:
        raise CalibrationError(f"{where} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})") from exc
    if not isinstance(data, dict) or not isinstance(data.get("camera"), dict):
        raise CalibrationError(f"{where}: key 'camera' is missing")
    for key in _CAMERA_KEYS:
        _, name = key.split(".")
        if name in data["camera"]:
            check, expected = _SCHEMA[key][1]
            if not check(data["camera"][name]):
                raise CalibrationError(f"{where}: key '{key}' must be {expected}, got {_describe(data['camera'][name])}")
    try:
        return CameraModel.from_dict(data["camera"])
    except (TypeError, ValueError) as exc:
        raise CalibrationError(f"{where}: {exc}") from exc
