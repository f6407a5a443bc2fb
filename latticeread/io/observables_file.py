"""Files of the observables: occupation input, per-shot parameter tables, HDF5 and CSV output.

Input
-----
:func:`read_occupation_input` reads the occupation matrices, posteriors, lattice vectors,
misread rates and provenance from a results file (``latticeread batch`` / ``watch`` /
``reconstruct``, :func:`latticeread.io.results.read_results`) or from an occupation HDF5
file in the older layout (:func:`latticeread.io.export.read_occupation_hdf5`).

:func:`read_shot_parameters` reads a table of per-shot parameters: shot index (0-based
position in the input file) -> named values. CSV: a header line with a ``shot`` column (or
the first column) and one column per parameter. JSON: ``{"0": {"hold_ms": 5}, ...}``, a list
of records with a ``shot`` key, or columns ``{"shot": [...], "hold_ms": [...]}``.

Output (HDF5, written atomically)
---------------------------------
Root attributes: ``format`` = ``"latticeread-observables"``, ``format_version``,
``program_version``, ``created`` (UTC), ``settings``, ``inputs`` (provenance: input file,
its format, shots, calibration, misread rates and where they came from), ``warnings``
(JSON text). One group per set of shots: ``all`` and, with a grouping parameter,
``by_<name>/<value>``; each holds ``shots`` (indices used) and the sub-groups ``density``,
``radial``, ``azimuthal``, ``line_a1``, ``line_a2``, ``atoms``, ``correlator``,
``structure``, ``order`` and (with rates) ``corrected``; scalars are attributes, arrays
datasets, each with a ``units`` attribute. With groups, ``transport_a1`` /
``transport_a2`` tables hold the centre of mass and width per group.

CSV: ``<stem>.profiles.csv`` (columns ``set,profile,coordinate,unit,mean,stderr,n_sites``)
and, with groups, ``<stem>.transport.csv``; one header line, no comments; the settings go
to ``<name>.csv.json`` beside each.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io as _io
import json
import logging
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from latticeread import __version__
from latticeread.errors import FrameFileError, LatticeReadError

from .atomic import atomic_path, atomic_write
from .calibration_file import to_jsonable

__all__ = ["OccupationInput", "read_occupation_input", "read_shot_parameters", "write_observables",
           "read_observables_attrs", "OBSERVABLES_FORMAT"]

log = logging.getLogger(__name__)

OBSERVABLES_FORMAT = "latticeread-observables"


class ParameterFileError(LatticeReadError, ValueError):
    """A per-shot parameter table cannot be read or does not match the shots."""

    exit_code = 3


@dataclass(frozen=True)
class OccupationInput:
    """Occupation matrices and what came with them.

    Attributes
    ----------
    occupation : (N, R, C) ndarray of uint8
        1 occupied, 0 empty, 255 outside the region.
    p_occupied : (N, R, C) ndarray of float or None
        Posteriors (NaN outside the region).
    vectors : (2, 2) ndarray or None
        Lattice vectors a1, a2 as (x, y) pixels (median over shots for a run file).
    origin : (row, col)
        Lattice indices of matrix element [0, 0].
    false_positive, false_negative : (N,) ndarray of float
        Misread rates per shot from the threshold fits (NaN when unknown).
    kind : str
        ``"run"`` or ``"occupation"``.
    provenance : dict
        Input path, format, program version, calibration, shot sources.
    """

    occupation: np.ndarray
    p_occupied: np.ndarray | None
    vectors: np.ndarray | None
    origin: tuple[int, int]
    false_positive: np.ndarray
    false_negative: np.ndarray
    kind: str
    provenance: dict = field(default_factory=dict)


def _h5_format(path: Path) -> str:
    import h5py

    if not path.exists():
        raise FrameFileError(f"the input {path} does not exist")
    try:
        with h5py.File(path, "r") as h5:
            fmt = h5.attrs.get("format", "")
            fmt = fmt.decode() if isinstance(fmt, bytes) else str(fmt)
            has_occ = "occupation" in h5
    except OSError as exc:
        raise FrameFileError(f"{path.name} is not a readable HDF5 file ({exc})") from exc
    if fmt == "latticeread-run":
        return "run"
    if has_occ:
        return "occupation"
    raise FrameFileError(f"{path.name} holds no occupation matrices: give a run file from 'latticeread batch' or "
                         "an occupation file from 'latticeread reconstruct'")


def _aligned(occupation, p_occupied, origins):
    """Put matrices whose element [0, 0] is a different lattice site into one common frame."""
    origins = np.asarray(origins, dtype=np.int64).reshape(-1, 2)
    if origins.shape[0] == 0 or (origins == origins[0]).all():
        return occupation, p_occupied, (tuple(int(v) for v in origins[0]) if origins.shape[0] else (0, 0))
    n, rows, cols = occupation.shape
    lo = origins.min(axis=0)
    hi = origins.max(axis=0) + (rows, cols)
    occ = np.full((n, *(hi - lo)), 255, np.uint8)
    post = None if p_occupied is None else np.full(occ.shape, np.nan)
    for k, (r, c) in enumerate(origins - lo):
        occ[k, r:r + rows, c:c + cols] = occupation[k]
        if post is not None:
            post[k, r:r + rows, c:c + cols] = p_occupied[k]
    log.info("shots have %d different site origins: matrices aligned on the lattice indices",
             len({tuple(o) for o in origins}))
    return occ, post, (int(lo[0]), int(lo[1]))


def _fit_rates(calibration_dict, n) -> tuple[np.ndarray, np.ndarray]:
    """Misread rates of the calibration's stored threshold fit (NaN when none)."""
    from latticeread.core.calibration import Calibration

    fp = fn = float("nan")
    try:
        fit = Calibration.from_dict(calibration_dict).threshold_fit if calibration_dict else None
    except (LatticeReadError, ValueError, KeyError, TypeError) as exc:
        log.warning("stored calibration unreadable (%s); no misread rates from it", exc)
        fit = None
    if fit is not None:
        fp = float(getattr(fit, "false_positive_rate", math.nan))
        fn = float(getattr(fit, "false_negative_rate", math.nan))
    return np.full(n, fp), np.full(n, fn)


def read_occupation_input(path) -> OccupationInput:
    """Read occupation matrices from a results file (run layout) or an older occupation file.

    Results files (``latticeread batch``, ``watch``, ``reconstruct``, the window's export) are
    read with :func:`latticeread.io.results.read_results`; files in the older occupation
    layout with :func:`latticeread.io.export.read_occupation_hdf5`. Shots whose matrices start
    at different lattice sites are aligned on the lattice indices.

    Raises
    ------
    FrameFileError
        Missing, unreadable, or not one of the two file kinds; or no shots in it.
    """
    path = Path(os.fspath(path))
    kind = _h5_format(path)
    if kind == "run":
        from .results import read_results

        arrays, settings = read_results(path)
        n = int(arrays["frame_index"].size)
        if n == 0:
            raise FrameFileError(f"the results file {path.name} holds no completed shots")
        vectors = np.array([np.nanmedian(arrays["a1"], axis=0), np.nanmedian(arrays["a2"], axis=0)])
        occ, post, origin = _aligned(arrays["occupation"], arrays["p_occupied"], arrays["origin"])
        fp = np.asarray(arrays["false_positive_rate"], float)
        fn = np.asarray(arrays["false_negative_rate"], float)
        if not (np.isfinite(fp).any() and np.isfinite(fn).any()):
            fp, fn = _fit_rates(settings.get("calibration"), n)
        prov = {"path": str(path.resolve()), "format": "latticeread-run",
                "program_version": settings.get("program_version", ""), "n_shots": n,
                "calibration": settings.get("calibration"), "metadata": settings.get("metadata"),
                "shots": [{"source": str(s), "file_hash": str(h), "frame_index": int(i)}
                          for s, h, i in zip(arrays["source"], arrays["file_hash"], arrays["frame_index"])]}
        return OccupationInput(occupation=occ, p_occupied=post,
                               vectors=vectors if np.isfinite(vectors).all() else None, origin=origin,
                               false_positive=fp, false_negative=fn, kind="run", provenance=prov)
    from .export import read_occupation_hdf5

    data = read_occupation_hdf5(path)
    n = data.occupation.shape[0]
    if n == 0:
        raise FrameFileError(f"the occupation file {path.name} holds no frames")
    cal = data.attrs.get("calibration") or {}
    geo = cal.get("geometry") if isinstance(cal, dict) else None
    vectors = None
    if isinstance(geo, dict) and "a1" in geo and "a2" in geo:
        vectors = np.array([geo["a1"], geo["a2"]], dtype=float)
    fp, fn = _fit_rates(cal if isinstance(cal, dict) else None, n)
    prov = {"path": str(path.resolve()), "format": str(data.attrs.get("format", "latticeread-occupation")),
            "program_version": str(data.attrs.get("program_version", "")), "n_shots": int(n),
            "calibration": cal or None, "inputs": data.attrs.get("inputs"),
            "frame_index": data.frame_index.tolist()}
    return OccupationInput(occupation=data.occupation, p_occupied=data.p_occupied, vectors=vectors,
                           origin=(data.row_min, data.col_min), false_positive=fp, false_negative=fn,
                           kind="occupation", provenance=prov)


# --- per-shot parameters -------------------------------------------------------------------

def _number(text):
    if isinstance(text, (int, float)) or text is None:
        return float("nan") if text is None else text
    t = str(text).strip()
    if t == "":
        return float("nan")
    try:
        v = float(t)
    except ValueError:
        return t
    return int(v) if v.is_integer() and "." not in t and "e" not in t.lower() else v


def read_shot_parameters(path, *, n_shots: int) -> dict[str, list]:
    """Read a per-shot parameter table.

    Parameters
    ----------
    path : str or Path
        ``.csv`` or ``.json`` file (layouts in the module docstring).
    n_shots : int
        Shots in the input; shot indices must lie in ``0..n_shots-1``.

    Returns
    -------
    dict
        parameter name -> list of ``n_shots`` values (NaN for shots the table does not list).

    Raises
    ------
    ParameterFileError
        Missing file, unknown suffix, malformed content, bad or repeated shot indices.
    """
    path = Path(os.fspath(path))
    if not path.exists():
        raise ParameterFileError(f"the parameter table {path} does not exist")
    suffix = path.suffix.lower()
    text = path.read_text(encoding="utf-8")
    records: list[dict] = []
    if suffix == ".csv":
        rows = list(csv.reader(_io.StringIO(text)))
        rows = [r for r in rows if r and any(c.strip() for c in r)]
        if len(rows) < 2:
            raise ParameterFileError(f"{path.name} needs a header line and at least one row")
        header = [h.strip() for h in rows[0]]
        key = "shot" if "shot" in header else header[0]
        for k, r in enumerate(rows[1:], start=2):
            if len(r) != len(header):
                raise ParameterFileError(f"{path.name} line {k} has {len(r)} fields but the header has {len(header)}")
            records.append({h: v for h, v in zip(header, r)})
    elif suffix == ".json":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ParameterFileError(f"{path.name} is not valid JSON ({exc})") from exc
        key = "shot"
        if isinstance(data, dict) and "shot" in data and isinstance(data["shot"], list):
            cols = {k: v for k, v in data.items() if isinstance(v, list)}
            lengths = {len(v) for v in cols.values()}
            if len(lengths) != 1:
                raise ParameterFileError(f"the columns of {path.name} have different lengths {sorted(lengths)}")
            records = [{k: cols[k][i] for k in cols} for i in range(lengths.pop())]
        elif isinstance(data, dict):
            for s, vals in data.items():
                if not isinstance(vals, dict):
                    raise ParameterFileError(f"{path.name}: the entry of shot {s!r} must be an object of named values")
                records.append({"shot": s, **vals})
        elif isinstance(data, list) and all(isinstance(r, dict) for r in data):
            records = data
        else:
            raise ParameterFileError(f"{path.name}: expected an object or a list of records")
    else:
        raise ParameterFileError(f"the parameter table {path.name} must end in .csv or .json")
    out: dict[str, list] = {}
    seen = set()
    for rec in records:
        if key not in rec:
            raise ParameterFileError(f"{path.name}: a record has no {key!r} index")
        try:
            shot = int(str(rec[key]).strip())
        except ValueError as exc:
            raise ParameterFileError(f"{path.name}: shot index {rec[key]!r} is not a whole number") from exc
        if not 0 <= shot < n_shots:
            raise ParameterFileError(f"{path.name}: shot {shot} does not exist (the input has shots 0..{n_shots - 1})")
        if shot in seen:
            raise ParameterFileError(f"{path.name}: shot {shot} is listed twice")
        seen.add(shot)
        for name, value in rec.items():
            if name == key:
                continue
            out.setdefault(name, [float("nan")] * n_shots)[shot] = _number(value)
    if not out:
        raise ParameterFileError(f"{path.name} holds shot indices but no parameter columns")
    return out


# --- output --------------------------------------------------------------------------------

def _put(g, name, value, units=""):
    ds = g.create_dataset(name, data=np.asarray(value), compression="gzip" if np.size(value) > 256 else None)
    if units:
        ds.attrs["units"] = units
    return ds


def _write_set(g, obs, shots) -> None:
    """One set of shots (an ``Observables``) into the HDF5 group ``g``."""
    _put(g, "shots", np.asarray(shots, np.int64), "shot index (0-based)")
    g.attrs["warnings"] = json.dumps(list(obs.warnings))
    d = g.create_group("density")
    _put(d, "mean", obs.density.mean, "atoms per site (NaN outside the region)")
    _put(d, "stderr", obs.density.stderr, "atoms per site")
    _put(d, "region", obs.density.region.astype(np.uint8), "1 analysed site")
    if obs.posterior_density is not None:
        _put(d, "posterior_mean", obs.posterior_density, "atoms per site (mean posterior)")
    d.attrs.update(filling=obs.density.filling, filling_err=obs.density.filling_err,
                   centroid=np.asarray(obs.density.centroid), n_shots=obs.density.n_shots)
    for name in ("radial", "azimuthal"):
        p = getattr(obs, name)
        h = g.create_group(name)
        _put(h, "coordinate", p.coordinate, p.unit)
        _put(h, "mean", p.mean, "atoms per site")
        _put(h, "stderr", p.stderr, "atoms per site")
        _put(h, "n_sites", p.n_sites, "sites")
        h.attrs["centre"] = np.asarray(p.centre)
    for name in ("line_a1", "line_a2"):
        p = getattr(obs, name)
        h = g.create_group(name)
        _put(h, "position", p.position, "sites (matrix index along the axis)")
        _put(h, "mean", p.mean, "atoms per site")
        _put(h, "stderr", p.stderr, "atoms per site")
        _put(h, "per_shot_com", p.per_shot_com, "sites")
        _put(h, "per_shot_width", p.per_shot_width, "sites")
        h.attrs.update(axis=p.axis, band=np.asarray(p.band), centre_of_mass=p.centre_of_mass,
                       centre_of_mass_err=p.centre_of_mass_err, width=p.width, width_err=p.width_err)
    a = g.create_group("atoms")
    _put(a, "per_shot", obs.atoms.per_shot, "atoms")
    _put(a, "histogram", obs.atoms.histogram, "shots")
    _put(a, "bin_edges", obs.atoms.bin_edges, "atoms")
    a.attrs.update(mean=obs.atoms.mean, mean_err=obs.atoms.mean_err, variance=obs.atoms.variance,
                   variance_err=obs.atoms.variance_err)
    c = obs.correlator
    h = g.create_group("correlator")
    _put(h, "displacement", c.displacement, "sites")
    _put(h, "map", c.map, "atoms^2 (map[a, b] = C(displacement[a] along a1, displacement[b] along a2))")
    _put(h, "err", c.err, "atoms^2 (bootstrap standard error)")
    _put(h, "n_pairs", c.n_pairs, "site pairs")
    _put(h, "distance", c.distance, obs.settings.get("distance_unit", ""))
    _put(h, "radial", c.radial, "atoms^2")
    _put(h, "radial_err", c.radial_err, "atoms^2")
    h.attrs.update(chi2=c.chi2, dof=c.dof, p_value=c.p_value, n_bootstrap=c.n_bootstrap,
                   definition="C(d) = N/(N-1) mean_i(<n_i n_i+d> - <n_i><n_i+d>)")
    s = obs.structure
    h = g.create_group("structure")
    _put(h, "q1", s.q1, "rad per site along a1")
    _put(h, "q2", s.q2, "rad per site along a2")
    _put(h, "s", s.s, "dimensionless (pseudo-spin s = 2n - 1; N_sites for perfect order)")
    _put(h, "err", s.err, "dimensionless")
    h.attrs["n_sites"] = s.n_sites
    o = obs.order
    h = g.create_group("order")
    _put(h, "per_shot", o.per_shot, "staggered order m (-1..1)")
    _put(h, "histogram", o.histogram, "shots")
    _put(h, "bin_edges", o.bin_edges, "m")
    _put(h, "local", o.local, f"mean |m| in {o.window}x{o.window} sites")
    h.attrs.update(mean_abs=o.mean_abs, mean_abs_err=o.mean_abs_err, s_pi_pi=o.s_pi_pi, s_pi_pi_err=o.s_pi_pi_err,
                   window=o.window, n_sites=o.n_sites)
    k = obs.corrected
    if k is not None:
        h = g.create_group("corrected")
        for name in ("density", "density_stat_err", "density_rate_err", "density_err"):
            _put(h, name, getattr(k, name), "atoms per site")
        _put(h, "density_flag", k.density_flag.astype(np.uint8), "1 where the correction exceeds the statistical error")
        for name in ("correlator", "correlator_stat_err", "correlator_rate_err", "correlator_err"):
            _put(h, name, getattr(k, name), "atoms^2")
        _put(h, "correlator_flag", k.correlator_flag.astype(np.uint8),
             "1 where the correction exceeds the bootstrap error")
        h.attrs.update(filling=k.filling, filling_stat_err=k.filling_stat_err, filling_rate_err=k.filling_rate_err,
                       rates=json.dumps(to_jsonable(k.rates.__dict__)), warnings=json.dumps(list(k.warnings)))


def _profile_rows(label, obs):
    for name in ("radial", "azimuthal"):
        p = getattr(obs, name)
        for x, m, e, n in zip(p.coordinate, p.mean, p.stderr, p.n_sites):
            yield [label, name, repr(float(x)), p.unit, repr(float(m)), repr(float(e)), str(int(n))]
    for name in ("line_a1", "line_a2"):
        p = getattr(obs, name)
        for x, m, e in zip(p.position, p.mean, p.stderr):
            yield [label, name, repr(float(x)), "sites", repr(float(m)), repr(float(e)),
                   str(p.band[1] - p.band[0] + 1)]


def _write_csv(path: Path, header, rows, meta, protect) -> None:
    with atomic_write(path, "w", protect=protect, newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    with atomic_write(path.with_name(path.name + ".json"), "w", protect=protect) as fh:
        json.dump(to_jsonable(meta), fh, indent=2)


def write_observables(path, sets: dict, *, settings: dict, inputs: dict, transport: dict | None = None,
                      group_by: str | None = None, protect=None) -> list[Path]:
    """Write observables to HDF5 and the profile (and transport) tables to CSV, atomically.

    Parameters
    ----------
    path : str or Path
        The ``.h5`` output.
    sets : dict
        label -> (Observables, shot indices); ``"all"`` first, then group values.
    settings, inputs : dict
        Settings of the computation and the input's provenance (stored as JSON).
    transport : dict, optional
        ``{"a1": GroupMoments, "a2": GroupMoments}`` across the groups.
    group_by : str, optional
        Name of the grouping parameter.
    protect : iterable of paths, optional
        Input files that must never be overwritten.

    Returns
    -------
    list of Path
        Files written.
    """
    import h5py

    path = Path(os.fspath(path))
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    all_warnings = []
    for label, (obs, _shots) in sets.items():
        all_warnings.extend(f"{label}: {w}" for w in obs.warnings)
    with atomic_path(path, protect=protect) as tmp:
        with h5py.File(tmp, "w") as h5:
            h5.attrs.update(format=OBSERVABLES_FORMAT, format_version=1, program_version=__version__,
                            created=created, settings=json.dumps(to_jsonable(settings)),
                            inputs=json.dumps(to_jsonable(inputs)), warnings=json.dumps(all_warnings),
                            group_by=group_by or "")
            for label, (obs, shots) in sets.items():
                name = "all" if label == "all" else f"by_{group_by}/{label}"
                _write_set(h5.create_group(name), obs, shots)
            for axis, gm in (transport or {}).items():
                h = h5.create_group(f"transport_{axis}")
                _put(h, "value", np.asarray([str(v) for v in gm.labels], dtype=object).astype("S"), group_by or "")
                for f in ("n_shots", "centre_of_mass", "centre_of_mass_err", "width", "width_err", "delta_com",
                          "delta_com_err", "delta_width", "delta_width_err"):
                    _put(h, f, getattr(gm, f), "shots" if f == "n_shots" else "sites")
    written = [path]
    meta = {"format": "latticeread-observables-profiles", "program_version": __version__, "created": created,
            "source": str(path.name), "settings": settings, "inputs": {k: v for k, v in inputs.items() if k != "shots"},
            "warnings": all_warnings,
            "columns": {"set": "all or the group value", "profile": "radial, azimuthal, line_a1, line_a2",
                        "coordinate": "see unit", "mean": "atoms per site", "stderr": "atoms per site (over shots)",
                        "n_sites": "sites in the bin (line profiles: band width)"}}
    prof = path.with_name(path.stem + ".profiles.csv")
    rows = [r for label, (obs, _s) in sets.items() for r in _profile_rows(label, obs)]
    _write_csv(prof, ["set", "profile", "coordinate", "unit", "mean", "stderr", "n_sites"], rows, meta, protect)
    written.append(prof)
    if transport:
        tp = path.with_name(path.stem + ".transport.csv")
        rows = []
        for axis, gm in transport.items():
            for i, v in enumerate(gm.labels):
                rows.append([axis, str(v), str(int(gm.n_shots[i])),
                             *(repr(float(getattr(gm, f)[i])) for f in (
                                 "centre_of_mass", "centre_of_mass_err", "width", "width_err", "delta_com",
                                 "delta_com_err"))])
        _write_csv(tp, ["axis", group_by or "group", "n_shots", "centre_of_mass", "centre_of_mass_err", "width",
                        "width_err", "delta_com", "delta_com_err"], rows, {**meta, "columns": "sites; delta vs the "
                                                                           "first group"}, protect)
        written.append(tp)
    return written


def read_observables_attrs(path) -> dict:
    """Root attributes of an observables file, JSON ones decoded."""
    import h5py

    with h5py.File(path, "r") as h5:
        if h5.attrs.get("format") != OBSERVABLES_FORMAT:
            raise FrameFileError(f"{path} is not a latticeread observables file")
        out = {}
        for k, v in h5.attrs.items():
            v = v.decode() if isinstance(v, bytes) else v
            if k in ("settings", "inputs", "warnings"):
                v = json.loads(v)
            out[k] = v.item() if isinstance(v, np.generic) else v
        return out
