"""``latticeread observables``: density, profiles, counting statistics, correlations and order.

Reads the occupation matrices of a run file (``latticeread batch`` / ``watch``) or of an
occupation HDF5 file (``latticeread reconstruct``), optionally groups the shots by a per-shot
parameter table, computes every observable of :mod:`latticeread.core.observables` for all
shots and for each group, corrects the density and the correlator for the misread and loss
rates (from the input's threshold fits, a fidelity report or the command line), and writes
an HDF5 file plus CSV tables of the profiles (layout in
:mod:`latticeread.io.observables_file`).
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import sys
from pathlib import Path

import numpy as np

from latticeread.errors import LatticeReadError

log = logging.getLogger(__name__)

#: Two-sided 95 % normal quantile, to turn a fidelity report's 95 % interval into a standard error.
Z95 = 1.959963984540054


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("input", type=Path, metavar="RESULTS.h5",
                        help="run file from 'latticeread batch'/'watch' or occupation file from 'reconstruct'")
    parser.add_argument("--out", "-o", type=Path, required=True, metavar="OBS.h5",
                        help="output HDF5 file; profiles also go to OBS.profiles.csv")
    parser.add_argument("--params", type=Path, default=None, metavar="SHOTS.csv|json",
                        help="per-shot parameters: shot index (0-based, input order) -> named values")
    parser.add_argument("--group-by", default=None, metavar="NAME",
                        help="compute the observables for each value of this parameter too (needs --params)")
    parser.add_argument("--keep", nargs=3, action="append", default=[], metavar=("NAME", "LOW", "HIGH"),
                        help="post-select shots whose parameter NAME lies in [LOW, HIGH] (repeatable)")
    parser.add_argument("--min-atoms", type=float, default=None, help="post-select shots with at least this many atoms")
    parser.add_argument("--max-atoms", type=float, default=None, help="post-select shots with at most this many atoms")
    parser.add_argument("--centre", type=float, nargs=2, default=None, metavar=("ROW", "COL"),
                        help="profile centre in matrix indices (default: the density centroid)")
    parser.add_argument("--max-distance", type=int, default=4, metavar="SITES",
                        help="largest correlator displacement along each axis (default 4)")
    parser.add_argument("--bin-width", type=float, default=1.0, metavar="SITES",
                        help="radial bin width in lattice units (default 1)")
    parser.add_argument("--band", type=int, default=2, metavar="SITES",
                        help="half-width of the band of the 1-D profiles (default 2: five lines)")
    parser.add_argument("--window", type=int, default=3, metavar="SITES",
                        help="odd window side of the local staggered order map (default 3)")
    parser.add_argument("--bootstrap", type=int, default=200, metavar="N",
                        help="bootstrap replicates over shots for the correlator errors (default 200)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    rates = parser.add_argument_group("misread correction")
    rates.add_argument("--fidelity", type=Path, default=None, metavar="REPORT.json",
                       help="report of 'latticeread fidelity --out': loss and misread rates with 95 %% intervals")
    rates.add_argument("--false-positive", type=float, default=None, metavar="P",
                       help="empty site read occupied (default: the input's threshold fits)")
    rates.add_argument("--false-negative", type=float, default=None, metavar="P",
                       help="atom read empty (default: the input's threshold fits)")
    rates.add_argument("--loss", type=float, default=None, metavar="P",
                       help="atom lost during the image (default: the fidelity report, else 0)")
    rates.add_argument("--false-positive-uncertainty", type=float, default=None, metavar="SIGMA")
    rates.add_argument("--false-negative-uncertainty", type=float, default=None, metavar="SIGMA")
    rates.add_argument("--loss-uncertainty", type=float, default=None, metavar="SIGMA")
    rates.add_argument("--no-correction", action="store_true", help="do not correct for misreads")
    parser.add_argument("--force", action="store_true", help="overwrite existing output files")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar and no summary")


class UsageError(LatticeReadError, ValueError):
    """A command-line option is wrong or missing (exit code 2, like argparse)."""

    exit_code = 2


def _rate(value, err, name):
    if value is not None and not (0 <= value < 1):
        raise UsageError(f"--{name} must be a probability in [0, 1); got {value}")
    if err is not None and not err >= 0:
        raise UsageError(f"--{name}-uncertainty must be 0 or more; got {err}")


def _from_report(path: Path) -> dict:
    from latticeread.core.observables import ObservablesError

    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise ObservablesError(f"cannot read the fidelity report {path}: {exc}") from exc
    if not isinstance(data, dict) or data.get("format") != "latticeread-fidelity":
        raise ObservablesError(f"{path} is not a report of 'latticeread fidelity'")
    out = {}
    for key, name in (("loss", "loss"), ("false_positive_rate", "false_positive"),
                      ("false_negative_rate", "false_negative")):
        est = data.get(key) or {}
        value = est.get("value")
        if isinstance(value, (int, float)) and math.isfinite(value):
            lo, hi = est.get("low"), est.get("high")
            err = (hi - lo) / (2 * Z95) if isinstance(lo, (int, float)) and isinstance(hi, (int, float)) else 0.0
            out[name] = (float(value), float(err) if math.isfinite(err) else 0.0)
    return out


def _rates(args, inp, shots):
    """MisreadRates and a description of where each rate came from (or None, reason)."""
    from latticeread.core.observables import MisreadRates

    if args.no_correction:
        return None, {"applied": False, "reason": "--no-correction"}
    for v, e, n in ((args.false_positive, args.false_positive_uncertainty, "false-positive"),
                    (args.false_negative, args.false_negative_uncertainty, "false-negative"),
                    (args.loss, args.loss_uncertainty, "loss")):
        _rate(v, e, n)
    report = _from_report(args.fidelity) if args.fidelity else {}
    chosen, source = {}, {}
    for name, per_shot in (("false_positive", inp.false_positive), ("false_negative", inp.false_negative),
                           ("loss", None)):
        given = getattr(args, name)
        given_err = getattr(args, name + "_uncertainty")
        if given is not None:
            chosen[name] = (given, given_err or 0.0)
            source[name] = "command line"
        elif name in report:
            chosen[name] = (report[name][0], given_err if given_err is not None else report[name][1])
            source[name] = f"fidelity report {args.fidelity.name}"
        elif per_shot is not None and np.isfinite(per_shot[shots]).any():
            v = per_shot[shots][np.isfinite(per_shot[shots])]
            err = float(v.std(ddof=1) / math.sqrt(v.size)) if v.size > 1 else 0.0
            chosen[name] = (float(v.mean()), given_err if given_err is not None else err)
            source[name] = f"threshold fits of {v.size} shot(s) in the input (mean, standard error)"
        elif name == "loss":
            chosen[name] = (0.0, given_err or 0.0)
            source[name] = "not given: 0 (no loss correction)"
    missing = [n for n in ("false_positive", "false_negative") if n not in chosen]
    if missing:
        return None, {"applied": False, "reason": "no " + " and no ".join(m.replace("_", "-") for m in missing) +
                      " rate in the input; give --false-positive/--false-negative or --fidelity"}
    rates = MisreadRates(chosen["false_positive"][0], chosen["false_negative"][0], chosen["loss"][0],
                         false_positive_err=chosen["false_positive"][1],
                         false_negative_err=chosen["false_negative"][1], loss_err=chosen["loss"][1])
    return rates, {"applied": True, "sources": source, **{k: list(v) for k, v in chosen.items()}}


def run(args: argparse.Namespace) -> int:
    from tqdm import tqdm

    from latticeread.core import observables as ob
    from latticeread.io.observables_file import read_occupation_input, read_shot_parameters, write_observables

    out = Path(args.out)
    if out.suffix.lower() not in (".h5", ".hdf5"):
        raise UsageError(f"the output {out} must end in .h5 or .hdf5")
    targets = [out, out.with_name(out.stem + ".profiles.csv")]
    if args.group_by:
        targets.append(out.with_name(out.stem + ".transport.csv"))
    existing = [p for p in targets if p.exists()]
    if existing and not args.force:
        raise LatticeReadError(f"{existing[0]} exists; pass --force to overwrite it")
    if args.group_by and args.params is None:
        raise UsageError("--group-by needs a parameter table (--params shots.csv)")
    if args.keep and args.params is None:
        raise UsageError("--keep needs a parameter table (--params shots.csv)")

    inp = read_occupation_input(args.input)
    n = inp.occupation.shape[0]
    params = read_shot_parameters(args.params, n_shots=n) if args.params is not None else {}
    for name in [args.group_by, *(k[0] for k in args.keep)]:
        if name and name not in params:
            raise UsageError(f"the parameter table has no column {name!r}; it has {', '.join(params)}")

    occ_all = inp.occupation
    _occ, region, _ = ob.region_of(occ_all)
    atoms = _occ.reshape(n, -1).sum(axis=1)
    keep = ob.select_shots(atoms, min_atoms=args.min_atoms, max_atoms=args.max_atoms)
    for name, lo, hi in args.keep:
        vals = np.array([v if isinstance(v, (int, float)) else np.nan for v in params[name]], float)
        keep &= ob.select_shots(atoms, parameter=vals, low=float(lo), high=float(hi))
    shots = np.flatnonzero(keep)
    if shots.size < 2:
        raise ob.ObservablesError(f"only {shots.size} of {n} shots pass the post-selection; at least 2 are needed")

    rates, rate_info = _rates(args, inp, shots)
    if not rate_info["applied"]:
        log.warning("no misread correction: %s", rate_info["reason"])
    sets_spec = {"all": shots}
    if args.group_by:
        groups = ob.group_shots([params[args.group_by][i] for i in shots])
        for value, idx in groups.items():
            if idx.size < 2:
                log.warning("group %s=%s has %d shot(s) and is left out", args.group_by, value, idx.size)
                continue
            sets_spec[value] = shots[idx]
    kwargs = dict(vectors=inp.vectors, origin=inp.origin, centre=args.centre, max_distance=args.max_distance,
                  bin_width=args.bin_width, half_width=args.band, window=args.window, n_bootstrap=args.bootstrap)
    sets = {}
    with tqdm(total=len(sets_spec), desc="observables", unit="set", file=sys.stderr,
              disable=args.quiet or None) as bar:
        for label, idx in sets_spec.items():
            obs = ob.compute_observables(
                occ_all[idx], mask=region, p_occupied=None if inp.p_occupied is None else inp.p_occupied[idx],
                rates=rates, rng=args.seed, **kwargs)
            sets[label] = (obs, idx)
            bar.update(1)
    transport = None
    if len(sets) > 2:
        groups = {label: idx for label, idx in sets_spec.items() if label != "all"}
        centre = args.centre if args.centre is not None else sets["all"][0].density.centroid
        transport = {axis: ob.moments_by_group(occ_all, groups, axis=axis, mask=region, centre=centre,
                                               half_width=args.band) for axis in ("a1", "a2")}
    settings = {**sets["all"][0].settings, "group_by": args.group_by, "keep": args.keep,
                "min_atoms": args.min_atoms, "max_atoms": args.max_atoms, "seed": args.seed,
                "n_input_shots": n, "n_selected_shots": int(shots.size), "misread_correction": rate_info,
                "params_file": None if args.params is None else str(args.params.resolve())}
    inputs = {**inp.provenance, "fidelity_report": None if args.fidelity is None else str(args.fidelity.resolve())}
    protect = [args.input] + ([args.params] if args.params else []) + ([args.fidelity] if args.fidelity else [])
    written = write_observables(out, sets, settings=settings, inputs=inputs, transport=transport,
                                group_by=args.group_by, protect=protect)
    if not args.quiet:
        print(_summary(sets, rate_info, transport, args.group_by))
    for p in written:
        print(f"wrote {p}")
    return 0


def _summary(sets, rate_info, transport, group_by) -> str:
    obs = sets["all"][0]
    d, c, o, a = obs.density, obs.correlator, obs.order, obs.atoms
    k = (c.map.shape[0] - 1) // 2
    lines = [f"shots {d.n_shots}, region {int(d.region.sum())} sites",
             f"filling          {d.filling:.4f} +- {d.filling_err:.4f} atoms/site",
             f"atoms per shot   {a.mean:.1f} +- {a.mean_err:.1f}, variance {a.variance:.1f} +- {a.variance_err:.1f}",
             f"C(0,1), C(1,0)   {c.map[k, k + 1]:+.4f} +- {c.err[k, k + 1]:.4f}, "
             f"{c.map[k + 1, k]:+.4f} +- {c.err[k + 1, k]:.4f}   (chi2/dof vs 0: {c.chi2:.1f}/{c.dof}, "
             f"p = {c.p_value:.3g})",
             f"staggered order  <|m|> = {o.mean_abs:.3f} +- {o.mean_abs_err:.3f}, S(pi,pi) = {o.s_pi_pi:.1f} +- "
             f"{o.s_pi_pi_err:.1f} (of {o.n_sites} sites)"]
    if obs.corrected is not None:
        kc = obs.corrected
        lines.append(f"corrected        filling {kc.filling:.4f} +- {kc.filling_stat_err:.4f} (stat) "
                     f"+- {kc.filling_rate_err:.4f} (rates); C(0,1) {kc.correlator[k, k + 1]:+.4f} +- "
                     f"{kc.correlator_err[k, k + 1]:.4f}")
    else:
        lines.append(f"corrected        not applied: {rate_info.get('reason')}")
    if transport:
        gm = transport["a1"]
        lines.append(f"along a1 by {group_by}: " + ", ".join(
            f"{v}: {x:.2f}+-{e:.2f}" for v, x, e in zip(gm.labels, gm.centre_of_mass, gm.centre_of_mass_err)))
    for w in obs.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
