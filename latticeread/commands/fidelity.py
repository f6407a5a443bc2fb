"""``latticeread fidelity``: loss and hopping from consecutive images of the same atoms.

Input is either one stack whose consecutive frames are repeated images of one shot
(``--images-per-shot`` frames per shot, shot-major), or two stacks FIRST and SECOND whose
frame ``i`` are the first and second image of shot ``i``, or an occupation HDF5 file written
by ``latticeread reconstruct`` / ``batch`` (then nothing is reconstructed again). Every frame
is reconstructed with the same pipeline as the other commands; the misread rates come from
the histogram fits of the frames unless given on the command line.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

import numpy as np

from latticeread.errors import FidelityError

log = logging.getLogger(__name__)


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("stacks", nargs="+", type=Path, metavar="STACK",
                        help="PAIRS.tif (consecutive frames are repeated images), or FIRST.tif SECOND.tif, "
                             "or an occupation .h5 file from 'latticeread reconstruct'")
    parser.add_argument("--images-per-shot", type=int, default=2, metavar="N",
                        help="consecutive frames per shot in a single stack (default 2)")
    parser.add_argument("--calibration", "-c", type=Path, default=None, metavar="CAL.json",
                        help="calibration file (default: calibrate from the first stack)")
    parser.add_argument("--out", "-o", type=Path, default=None, metavar="REPORT.json",
                        help="write the full report as JSON (written atomically)")
    parser.add_argument("--false-positive", type=float, default=None, metavar="P",
                        help="probability that an empty site reads occupied, as the histogram claims (default: "
                             "from the histogram fits); the images' own rate is fitted and compared with it")
    parser.add_argument("--false-negative", type=float, default=None, metavar="P",
                        help="probability that an atom reads empty (default: from the histogram fits)")
    parser.add_argument("--false-negative-uncertainty", type=float, default=None, metavar="SIGMA",
                        help="standard deviation of the false-negative rate (default: standard error of the "
                             "per-frame histogram fits)")
    parser.add_argument("--radius", type=float, default=2 ** 0.5, metavar="SITES",
                        help="hop range in lattice sites (default 1.414: nearest and diagonal neighbours)")
    parser.add_argument("--fit-pair-loss", action="store_true",
                        help="fit the probability that two atoms meeting on a site are both lost "
                             "(default: fixed at 1, parity projection)")
    parser.add_argument("--bootstrap", type=int, default=200, metavar="N",
                        help="bootstrap replicates over shots for the intervals (default 200)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def _frames_to_occupations(args):
    """Reconstruct the stacks; return occupations, per-frame misread rates, histogram fit, calibration."""
    from tqdm import tqdm

    from latticeread.core.pipeline import Reconstructor, calibrate
    from latticeread.io import load_calibration, load_frames

    stacks = [load_frames(p) for p in args.stacks]
    if len(stacks) == 2 and len(stacks[0]) != len(stacks[1]):
        raise FidelityError(f"{args.stacks[0].name} has {len(stacks[0])} frames but {args.stacks[1].name} has "
                            f"{len(stacks[1])}; the two stacks must hold the same shots")
    calibration = load_calibration(args.calibration) if args.calibration else calibrate(stacks[0])
    rec = Reconstructor(calibration)
    per_stack = []
    fp, fn, first_fit = [], [], None
    total = sum(len(s) for s in stacks)
    with tqdm(total=total, desc="reconstructing", unit="frame", file=sys.stderr,
              disable=args.no_progress) as bar:
        for stack in stacks:
            mats = []
            for i in range(len(stack)):
                res = rec(stack[i], frame_index=i)
                mats.append(res.occupation_matrix(fill=255))
                tr = res.threshold_result
                if tr is not None:
                    first_fit = first_fit or tr
                    fp.append(tr.false_positive_rate)
                    fn.append(tr.false_negative_rate)
                bar.update(1)
            per_stack.append(np.stack(mats))
    if len(per_stack) == 2:
        occ = np.stack(per_stack, axis=1)                          # (shots, 2, R, C)
    else:
        n, k = len(per_stack[0]), int(args.images_per_shot)
        if k < 2:
            raise FidelityError(f"--images-per-shot must be at least 2, got {k}")
        if n % k:
            raise FidelityError(f"{args.stacks[0].name} has {n} frames, not a multiple of --images-per-shot {k}")
        occ = per_stack[0].reshape(n // k, k, *per_stack[0].shape[1:])
    return occ, np.asarray(fp, float), np.asarray(fn, float), first_fit, calibration


def _occupation_file(path: Path, args):
    from latticeread.io import read_occupation_hdf5

    data = read_occupation_hdf5(path)
    n, k = data.occupation.shape[0], int(args.images_per_shot)
    if n % k:
        raise FidelityError(f"{path.name} holds {n} frames, not a multiple of --images-per-shot {k}")
    occ = data.occupation.reshape(n // k, k, *data.occupation.shape[1:])
    fp, fn = np.array([]), np.array([])
    cal = data.calibration
    fit = cal.threshold_fit if cal is not None else None
    if fit is not None:
        fp, fn = np.array([float(fit.false_positive_rate)]), np.array([float(fit.false_negative_rate)])
    return occ, fp, fn, None, cal


def run(args: argparse.Namespace) -> int:
    from latticeread.core.fidelity import estimate_fidelity
    from latticeread.io import atomic_write

    if len(args.stacks) > 2:
        return _usage(f"give one stack of repeated images or two stacks (FIRST SECOND), not {len(args.stacks)} files")
    if args.out is not None and args.out.suffix.lower() != ".json":
        return _usage(f"the report {args.out} must end in .json")
    if args.bootstrap < 0:
        return _usage(f"--bootstrap must be 0 or more, got {args.bootstrap}")
    single = args.stacks[0]
    if len(args.stacks) == 1 and single.suffix.lower() in (".h5", ".hdf5") and _is_occupation_file(single):
        occ, fp, fn, fit, calibration = _occupation_file(single, args)
    else:
        occ, fp, fn, fit, calibration = _frames_to_occupations(args)

    fp_rate = args.false_positive if args.false_positive is not None else (float(fp.mean()) if fp.size else None)
    fn_rate = args.false_negative if args.false_negative is not None else (float(fn.mean()) if fn.size else None)
    if args.false_negative_uncertainty is not None:
        s_fn = float(args.false_negative_uncertainty)
    elif fn.size > 1 and args.false_negative is None:
        s_fn = float(fn.std(ddof=1) / np.sqrt(fn.size)) or None    # spread of the per-frame fits
    else:
        s_fn = None
    report = estimate_fidelity(
        occ, false_positive_rate=fp_rate, false_negative_rate=fn_rate, false_negative_uncertainty=s_fn,
        neighbour_radius=args.radius, geometry=None if calibration is None else calibration.geometry,
        pair_loss=None if args.fit_pair_loss else 1.0, histogram=fit, n_bootstrap=args.bootstrap, rng=args.seed)
    print(report.format_table())
    if args.out is not None:
        data = report.to_dict()
        data["inputs"] = [str(p) for p in args.stacks]
        data["calibration_file"] = None if args.calibration is None else str(args.calibration)
        with atomic_write(args.out, "w", protect=args.stacks) as fh:
            json.dump(data, fh, indent=2)
        print(f"wrote {args.out}")
    return 0


def _usage(message: str) -> int:
    """Report a command-line usage mistake (exit code 2, like argparse)."""
    print(f"latticeread fidelity: error: {message}", file=sys.stderr)
    return 2


def _is_occupation_file(path: Path) -> bool:
    """True when ``path`` is an HDF5 file with an ``occupation`` dataset."""
    import h5py

    try:
        with h5py.File(path, "r") as h5:
            return "occupation" in h5
    except OSError:
        return False
