"""``latticeread fidelity``: loss and hopping from consecutive images of the same atoms.

Input is either one stack whose consecutive frames are repeated images of one shot
(``--images-per-shot`` frames per shot, shot-major), or two stacks FIRST and SECOND whose
frame ``i`` are the first and second image of shot ``i``, or a results file: an occupation
HDF5 file written by ``latticeread reconstruct`` or a run file written by ``batch`` /
``watch`` (then nothing is reconstructed again; in a run file the frames of each input file
are grouped into shots as ``batch`` does). Every frame is reconstructed with the same
pipeline as the other commands. The estimate itself is
:func:`latticeread.core.fidelity.fidelity_from_frames`, the one the window and ``batch``
call: misread rates from one pooled histogram fit of the frames' amplitudes at the thresholds
they were classified with (skewed peaks for an EMCCD), unless given on the command line.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

import numpy as np

from latticeread.commands._types import number
from latticeread.errors import FidelityError

log = logging.getLogger(__name__)


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("stacks", nargs="+", type=Path, metavar="STACK",
                        help="PAIRS.tif (consecutive frames are repeated images), or FIRST.tif SECOND.tif, "
                             "or a results .h5 file from 'latticeread reconstruct', 'batch' or 'watch'")
    parser.add_argument("--images-per-shot", type=number(low=2, integer=True), default=2, metavar="N",
                        help="consecutive frames per shot in a single stack (default 2)")
    parser.add_argument("--calibration", "-c", type=Path, default=None, metavar="CAL.json",
                        help="calibration file (default: calibrate from the first stack)")
    parser.add_argument("--out", "-o", type=Path, default=None, metavar="REPORT.json",
                        help="write the full report as JSON (written atomically)")
    parser.add_argument("--false-positive", type=float, default=None, metavar="P",
                        help="probability that an empty site reads occupied, as the histogram claims (default: "
                             "from the histogram fits); the images' own rate is fitted and compared with it")
    parser.add_argument("--false-negative", type=float, default=None, metavar="P",
                        help="probability that an atom reads empty (default: from the histogram fit)")
    parser.add_argument("--false-negative-uncertainty", type=float, default=None, metavar="SIGMA",
                        help="standard deviation of the false-negative rate (default: binomial standard error "
                             "of the pooled histogram fit; none when --false-negative is given)")
    parser.add_argument("--radius", type=number(low=0, low_open=True, unit="sites"), default=2 ** 0.5,
                        metavar="SITES",
                        help="hop range in lattice sites (default 1.414: nearest and diagonal neighbours)")
    parser.add_argument("--fit-pair-loss", action="store_true",
                        help="fit the probability that two atoms meeting on a site are both lost "
                             "(default: fixed at 1, parity projection)")
    parser.add_argument("--bootstrap", type=number(low=0, integer=True), default=200, metavar="N",
                        help="bootstrap replicates for the intervals, over shots or, with fewer than 10 shots, "
                             "over blocks of sites (default 200)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    parser.add_argument("--no-progress", dest="quiet", action="store_true", default=argparse.SUPPRESS,
                        help=argparse.SUPPRESS)  # older spelling of --quiet
    parser.add_argument("--force", action="store_true", help="replace the --out report when it exists")


def _frames_to_occupations(args):
    """Reconstruct the stacks; return occupations, per-frame amplitudes and thresholds, calibration."""
    from tqdm import tqdm

    from latticeread.analysis.service import analyse_stack, open_stack
    from latticeread.core.pipeline import calibrate
    from latticeread.io import load_calibration

    stacks = [open_stack(p) for p in args.stacks]
    if len(stacks) == 2 and len(stacks[0]) != len(stacks[1]):
        raise FidelityError(f"{args.stacks[0].name} has {len(stacks[0])} frames but {args.stacks[1].name} has "
                            f"{len(stacks[1])}; the two stacks must hold the same shots")
    calibration = load_calibration(args.calibration) if args.calibration else calibrate(stacks[0])
    per_stack, amplitudes, thresholds = [], [], []
    total = sum(len(s) for s in stacks)
    with tqdm(total=total, desc="reconstructing", unit="frame", file=sys.stderr,
              disable=args.quiet) as bar:
        for stack in stacks:
            mats, amps, ts = [], [], []
            # the one analysis path: the calibration's threshold policy (pooled over the stack
            # by default) and frame policy, as in the window, reconstruct, batch and watch
            for res in analyse_stack(stack, calibration, progress=lambda done, total: bar.update(1)):
                mats.append(res.occupation_matrix(fill=255))
                amps.append(np.asarray(res.amplitudes, float))
                t = res.threshold
                ts.append(float(getattr(t, "threshold", t)))
            per_stack.append(np.stack(mats))
            amplitudes.append(amps)
            thresholds.append(ts)
    if len(per_stack) == 2:
        occ = np.stack(per_stack, axis=1)                          # (shots, 2, R, C)
        # frames in the order of the occupations: shot 0 image 0, shot 0 image 1, ...
        amps = [a for pair in zip(*amplitudes) for a in pair]
        ts = [t for pair in zip(*thresholds) for t in pair]
    else:
        amps, ts = amplitudes[0], thresholds[0]
        n, k = len(per_stack[0]), int(args.images_per_shot)
        if k < 2:
            raise FidelityError(f"--images-per-shot must be at least 2, got {k}")
        if n % k:
            raise FidelityError(f"{args.stacks[0].name} has {n} frames, not a multiple of --images-per-shot {k}")
        occ = per_stack[0].reshape(n // k, k, *per_stack[0].shape[1:])
    return occ, amps, np.asarray(ts, float), calibration


def _occupation_file(path: Path, args):
    """Occupations, amplitudes, thresholds and calibration of a ``reconstruct`` output file."""
    from latticeread.io import read_occupation_hdf5

    data = read_occupation_hdf5(path)
    n, k = data.occupation.shape[0], int(args.images_per_shot)
    if n % k:
        raise FidelityError(f"{path.name} holds {n} frames, not a multiple of --images-per-shot {k}")
    occ = data.occupation.reshape(n // k, k, *data.occupation.shape[1:])
    return occ, data.amplitude, np.asarray(data.threshold, float), data.calibration


def _run_file(path: Path, args):
    """Occupations, amplitudes, thresholds and calibration of a ``batch`` / ``watch`` run file.

    The frames of each input file are grouped into shots of ``--images-per-shot`` images as
    ``batch`` groups them (:func:`latticeread.runs.batch.group_shots`); incomplete shots are
    left out.
    """
    import json as _json

    from latticeread.io import read_run
    from latticeread.io.calibration_file import calibration_from_json
    from latticeread.runs.batch import group_shots

    k = int(args.images_per_shot)
    if k < 2:
        raise FidelityError(f"--images-per-shot must be at least 2, got {k}")
    run = read_run(path, matrices=("occupation", "amplitude"))
    occ, rows = group_shots(run, k)
    if occ.shape[0] == 0:
        raise FidelityError(f"{path.name} holds {len(run)} frames but no complete shot of {k} consecutive images "
                            "of one input file")
    calibration = calibration_from_json(_json.dumps(run.calibration), where=f"the calibration stored in {path.name}") \
        if run.calibration else None
    return occ, run.amplitude[rows.ravel()], run.threshold[rows.ravel()], calibration


def run(args: argparse.Namespace) -> int:
    from latticeread.core.fidelity import fidelity_from_frames
    from latticeread.io import atomic_write

    if len(args.stacks) > 2:
        return _usage(f"give one stack of repeated images or two stacks (FIRST SECOND), not {len(args.stacks)} files")
    if args.out is not None and args.out.suffix.lower() != ".json":
        return _usage(f"the report {args.out} must end in .json")
    if args.bootstrap < 0:
        return _usage(f"--bootstrap must be 0 or more, got {args.bootstrap}")
    if args.out is not None:
        from latticeread.io.outputs import check_outputs

        check_outputs([args.out], force=args.force,
                      inputs={"input stack": list(args.stacks), "calibration": args.calibration})
    single = args.stacks[0]
    kind = _results_kind(single) if len(args.stacks) == 1 and single.suffix.lower() in (".h5", ".hdf5") else None
    if kind == "run":
        occ, amplitudes, thresholds, calibration = _run_file(single, args)
    elif kind == "occupation":
        occ, amplitudes, thresholds, calibration = _occupation_file(single, args)
    else:
        occ, amplitudes, thresholds, calibration = _frames_to_occupations(args)

    report = fidelity_from_frames(
        occ, amplitudes=amplitudes, thresholds=thresholds, camera=None if calibration is None else calibration.camera,
        false_positive_rate=args.false_positive, false_negative_rate=args.false_negative,
        false_negative_uncertainty=args.false_negative_uncertainty,
        neighbour_radius=args.radius, geometry=None if calibration is None else calibration.geometry,
        pair_loss=None if args.fit_pair_loss else 1.0, n_bootstrap=args.bootstrap, rng=args.seed)
    print(report.format_table())
    if args.out is not None:
        data = report.to_dict()
        data["inputs"] = [str(p) for p in args.stacks]
        data["calibration_file"] = None if args.calibration is None else str(args.calibration)
        with atomic_write(args.out, "w", protect=[p for p in (*args.stacks, args.calibration) if p]) as fh:
            json.dump(data, fh, indent=2)
        print(f"wrote {args.out}")
    return 0


def _usage(message: str) -> int:
    """Report a command-line usage mistake (exit code 2, like argparse)."""
    print(f"latticeread fidelity: error: {message}", file=sys.stderr)
    return 2


def _results_kind(path: Path) -> str | None:
    """``"run"`` for a batch/watch run file, ``"occupation"`` for a reconstruct output, else None."""
    import h5py

    from latticeread.io.run_file import RUN_FORMAT

    try:
        with h5py.File(path, "r") as h5:
            if h5.attrs.get("format") == RUN_FORMAT:
                return "run"
            return "occupation" if "occupation" in h5 else None
    except OSError:
        return None
