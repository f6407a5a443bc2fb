"""The ``latticeread`` command line.

``latticeread [FILE ...]`` opens the desktop program (optionally on files); the other
commands run without a window. Each command lives in its own module under
:mod:`latticeread.commands` with two functions, ``add_parser(subparsers)`` and
``run(args) -> int``; this module only dispatches and turns errors into messages and exit
codes (see :mod:`latticeread.errors`).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys

from latticeread import __version__

#: (command name, module under latticeread.commands, one-line help)
COMMANDS = [
    ("gui", "gui", "open the desktop program (the default)"),
    ("simulate", "simulate", "write simulated microscope frames and their ground truth"),
    ("calibrate", "calibrate", "estimate lattice geometry, PSF and threshold from frames"),
    ("reconstruct", "reconstruct", "turn frames into occupation matrices and a per-site table"),
    ("fidelity", "fidelity", "estimate loss and hopping from consecutive images"),
    ("batch", "batch", "reconstruct a whole data set into one resumable HDF5 run file"),
    ("watch", "watch", "reconstruct new frames as the camera writes them"),
    ("camera", "camera", "estimate bias, read noise and gain from dark and flat frames"),
]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="latticeread",
        description="Occupation matrices from site-resolved fluorescence images of lattice atoms.",
        epilog="Run 'latticeread COMMAND --help' for the options of one command. "
        "Exit codes: 0 ok, 1 internal error, 2 usage, 3 input data, 4 output, 5 calibration, 130 interrupted.",
    )
    parser.add_argument("--version", action="version", version=f"latticeread {__version__}")
    parser.add_argument("--debug", action="store_true", help="show full tracebacks and debug logging")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module, help_text in COMMANDS:
        try:
            mod = importlib.import_module(f"latticeread.commands.{module}")
        except ModuleNotFoundError as exc:  # a command not built yet must not break the others
            if exc.name != f"latticeread.commands.{module}":
                raise
            continue
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show full tracebacks and debug logging")
        mod.add_parser(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    names = {name for name, _, _ in COMMANDS}
    # ``latticeread`` or ``latticeread FILE...`` opens the window.
    first = next((a for a in argv if not a.startswith("-")), None)
    if first is None or first not in names:
        if not any(a in ("-h", "--help", "--version") for a in argv):
            argv = ["gui", *argv]
    parser = build_parser()
    args = parser.parse_args(argv)
    debug = bool(getattr(args, "debug", False))
    logging.basicConfig(level=logging.DEBUG if debug else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    if not hasattr(args, "_run"):
        parser.print_help()
        return 2
    from latticeread.errors import LatticeReadError

    try:
        return int(args._run(args) or 0)
    except KeyboardInterrupt:
        print("latticeread: interrupted", file=sys.stderr)
        return 130
    except LatticeReadError as exc:
        if debug:
            raise
        print(f"latticeread {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except Exception as exc:  # noqa: BLE001 - last line of defence for the command line
        if debug:
            raise
        print(f"latticeread {args.command}: internal error: {type(exc).__name__}: {exc}\n"
              "This is a bug; run again with --debug and report the traceback.", file=sys.stderr)
        return 1


if __name__ == "__main__":
    raise SystemExit(main())
