"""``latticeread batch``: reconstruct a whole data set into one resumable HDF5 run file."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from latticeread.commands._types import number


def _workers(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = -1
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be 0 (this process) or a positive number of processes, got {text!r}")
    return value


def _images(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a whole number of at least 1, got {text!r}")
    return value


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        "The run file holds one row per frame (camera image), written as the frames are done; an interrupted "
        "run keeps every frame written so far, and running the same command again skips them (frames are "
        "matched by file path, file content and frame index). Failed frames are listed in the run file's "
        "failures table. HDF5 inputs must hold a single frame dataset. Exit code 0 when at least one frame was "
        "written or nothing was left to do, 3 when every frame of this run failed.")
    parser.add_argument("inputs", nargs="+", metavar="INPUT",
                        help="frame files (TIFF, HDF5, .npy/.npz), folders of them, or glob patterns "
                             "(quote them: 'data/**/*.tif')")
    parser.add_argument("--calibration", "-c", required=True, type=Path, metavar="CAL.json",
                        help="calibration file (from 'latticeread calibrate')")
    parser.add_argument("--out", "-o", required=True, type=Path, metavar="RUN.h5",
                        help="run file to create, or to continue when it exists")
    parser.add_argument("--workers", "-j", type=_workers, default=None, metavar="N",
                        help="worker processes on this machine (default: all CPUs; 0 = this process only)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="run on a Dask cluster: a scheduler address (tcp://host:8786; its workers must see "
                             "the input files under the same paths) or 'local' to start one on this machine; "
                             "needs pip install 'latticeread[cluster]'")
    parser.add_argument("--images-per-shot", type=_images, default=1, metavar="N",
                        help="consecutive frames of each file that image the same atoms; with 2 or more the "
                             "summary estimates loss and hopping between them (default 1)")
    parser.add_argument("--bootstrap", type=number(low=0, integer=True), default=200, metavar="N",
                        help="bootstrap replicates for the fidelity intervals (default 200; 0 = point estimates "
                             "only, faster)")
    parser.add_argument("--fidelity-bootstrap", dest="bootstrap", type=number(low=0, integer=True),
                        default=argparse.SUPPRESS, help=argparse.SUPPRESS)  # older spelling of --bootstrap
    parser.add_argument("--retry-failed", action="store_true",
                        help="try again the frames that failed in an earlier run of this run file")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar")
    parser.add_argument("--no-progress", dest="quiet", action="store_true", default=argparse.SUPPRESS,
                        help=argparse.SUPPRESS)  # older spelling of --quiet
    parser.add_argument("--json", action="store_true", help="print the summary as JSON instead of text")


def run(args: argparse.Namespace) -> int:
    from latticeread.io.outputs import check_outputs, check_suffix
    from latticeread.runs.batch import run_batch, summary_dict

    # an existing run file is continued, never replaced; it must not be one of the inputs
    check_suffix(args.out, [".h5", ".hdf5"], what="the run file")
    check_outputs([args.out], force=True, inputs={"input": list(args.inputs), "calibration": args.calibration})

    try:
        summary = run_batch(args.inputs, calibration=args.calibration, out=args.out, workers=args.workers,
                            scheduler=args.scheduler, retry_failed=args.retry_failed,
                            progress=not args.quiet, metadata={"command": "batch"},
                            images_per_shot=args.images_per_shot, fidelity_bootstrap=args.bootstrap)
    except KeyboardInterrupt:
        print(f"latticeread batch: interrupted; every frame written so far is kept in {args.out}. "
              "Run the same command again to continue.", file=sys.stderr)
        return 130
    if args.json:
        print(json.dumps(summary_dict(summary), indent=2, default=str))
    else:
        print(summary.format())
    if summary.n_new == 0 and summary.n_failed > 0:
        return 3
    return 0
