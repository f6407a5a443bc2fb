"""``latticeread watch``: reconstruct new frame files as the camera writes them."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

#: Default of --settle: the same as latticeread.runs.watch.DEFAULT_SETTLE_SECONDS (a test checks),
#: written here so that building the parser does not import the watch machinery.
DEFAULT_SETTLE_SECONDS = 0.3


def _positive(kind):
    def check(text: str):
        try:
            value = kind(text)
        except ValueError:
            value = 0
        if not value > 0:
            raise argparse.ArgumentTypeError(f"must be a positive number, got {text!r}")
        return value
    return check


def _non_negative(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not value >= 0:
        raise argparse.ArgumentTypeError(f"must be 0 or a positive number of seconds, got {text!r}")
    return value


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        "A file is taken when its size and time have not changed between two looks at the folder nor for the "
        "settle time (a camera that appends frames to one file pauses between frames: make --settle longer "
        "than that pause), and it opens as a complete frame file. Each frame is appended to the run file at once (same format as "
        "'latticeread batch'; files already in it are skipped). Stop with Ctrl-C.")
    parser.add_argument("folder", type=Path, help="folder the camera writes frame files to")
    parser.add_argument("--calibration", "-c", required=True, type=Path, metavar="CAL.json",
                        help="calibration file (from 'latticeread calibrate')")
    parser.add_argument("--out", "-o", required=True, type=Path, metavar="LIVE.h5",
                        help="run file to create, or to continue when it exists")
    parser.add_argument("--interval", type=_positive(float), default=0.5, metavar="SECONDS",
                        help="time between two looks at the folder (default 0.5 s)")
    parser.add_argument("--settle", type=_non_negative, default=DEFAULT_SETTLE_SECONDS, metavar="SECONDS",
                        help="a file must stay unchanged this long before it is taken; longer than the pause "
                             f"of a camera that appends frames to one file (default {DEFAULT_SETTLE_SECONDS:g} s)")
    parser.add_argument("--max-files", type=_positive(int), default=None, metavar="N",
                        help="stop after N files (default: run until Ctrl-C)")
    parser.add_argument("--timeout", type=_positive(float), default=None, metavar="SECONDS",
                        help="stop when no new file arrived for this long (default: never)")
    parser.add_argument("--new-only", action="store_true",
                        help="ignore the files already in the folder when the watch starts")
    parser.add_argument("--retry-failed", action="store_true",
                        help="try again files that failed in an earlier run of this run file")
    parser.add_argument("--quiet", "-q", action="store_true", help="no line per frame, only the summary")


def run(args: argparse.Namespace) -> int:
    from latticeread.io.outputs import check_outputs, check_suffix
    from latticeread.runs.watch import watch_folder

    # an existing run file is continued, never replaced; it must not be the calibration
    check_suffix(args.out, [".h5", ".hdf5"], what="the run file")
    check_outputs([args.out], force=True, inputs={"calibration": args.calibration})

    def show(outcome, stats):
        if not args.quiet:
            print(stats.describe(outcome), flush=True)

    print(f"watching {args.folder} (Ctrl-C to stop); results go to {args.out}", file=sys.stderr, flush=True)
    summary = watch_folder(args.folder, calibration=args.calibration, out=args.out, interval=args.interval,
                           max_files=args.max_files, timeout=args.timeout, include_existing=not args.new_only,
                           on_shot=show, retry_failed=args.retry_failed, metadata={"command": "watch"},
                           settle=args.settle)
    print(summary.format())
    from latticeread.runs.watch import INTERRUPTED_NOTE

    return 130 if INTERRUPTED_NOTE in summary.warnings else 0
