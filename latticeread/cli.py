"""The ``latticeread`` command line.

``latticeread [FILE ...]`` opens the desktop program (optionally on files); the other
commands run without a window. Each command lives in its own module under
:mod:`latticeread.commands` with two functions, ``add_parser(subparsers)`` and
``run(args) -> int``; this module only dispatches and turns errors into messages and exit
codes (see :mod:`latticeread.errors`).
"""

from __future__ import annotations

import argparse
import contextlib
import difflib
import importlib
import logging
import re
import sys
import warnings
from pathlib import Path

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
    ("observables", "observables", "density, profiles, atom numbers, correlations and order from occupation matrices"),
]


#: Values argparse must read as numbers, not as options: besides -5 and -0.5 (which argparse
#: knows) also -1e9, -inf and -nan, so that ``--threshold -1e9`` reaches the option's range
#: check and its message instead of "expected one argument".
_NEGATIVE_NUMBER = re.compile(r"^-(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$|^-(inf|infinity|nan)$", re.IGNORECASE)


def _read_negative_numbers(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    if hasattr(parser, "_negative_number_matcher"):  # argparse's own pattern (CPython 3.9-3.13)
        parser._negative_number_matcher = _NEGATIVE_NUMBER
    return parser


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="latticeread",
        description="Occupation matrices from site-resolved fluorescence images of lattice atoms.",
        epilog="Run 'latticeread COMMAND --help' for the options of one command. "
        "Exit codes: 0 ok, 1 internal error (a bug), 2 usage, 3 input data, 4 output (also: exists without "
        "--force, or would replace an input), 5 calibration, 130 interrupted.",
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
        p = _read_negative_numbers(sub.add_parser(name, help=help_text, description=help_text))
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show full tracebacks and debug logging")
        mod.add_parser(p)
        p.set_defaults(_run=mod.run)
    return parser


#: Options of the window (the default command) that take a value, so the value is not a command.
_GUI_VALUE_OPTIONS = {"--settings"}


def unknown_command_message(word: str) -> str:
    """The usage message for a first argument that is neither a command nor an existing file."""
    names = [name for name, _, _ in COMMANDS]
    close = difflib.get_close_matches(word, names, n=1, cutoff=0.6)
    hint = f"did you mean '{close[0]}'? " if close else ""
    return (f"'{word}' is not a command and no such file exists; {hint}"
            f"commands: {', '.join(names)} (run 'latticeread --help')")


class _OwnMessagesOnly(logging.Filter):
    """Pass the program's own log records; other libraries' (tifffile, h5py...) only with --debug.

    Problems those libraries log (a damaged TIFF page, for instance) reach the user as the
    program's own error message, so their raw lines would only repeat it in other words.
    """

    def filter(self, record: logging.LogRecord) -> bool:
        return record.name == "latticeread" or record.name.startswith("latticeread.")


def _setup_logging(debug: bool) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(levelname)s %(name)s: %(message)s"))
    if not debug:
        handler.addFilter(_OwnMessagesOnly())
    root = logging.getLogger()
    for old in [h for h in root.handlers if getattr(h, "_latticeread", False)]:
        root.removeHandler(old)
    handler._latticeread = True
    root.addHandler(handler)
    root.setLevel(logging.DEBUG if debug else logging.WARNING)


@contextlib.contextmanager
def _plain_warnings(command: str, debug: bool):
    """The program's warnings as one line each ("latticeread CMD: warning: ..."), without the
    source line Python prints; numerical library warnings (numpy's "All-NaN slice" and the
    like, which the program's own checks already turn into messages) only with --debug.
    The warning filters in force stay as they are (tests turn the program's warnings into errors)."""
    if debug:
        yield
        return

    def one_line(message, category, filename, lineno, line=None):
        return f"latticeread {command}: warning: {message}\n"

    # the format, not the display: a caller that records warnings (pytest.warns) still gets them
    previous = warnings.formatwarning
    warnings.formatwarning = one_line
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", category=RuntimeWarning)
            yield
    finally:
        warnings.formatwarning = previous


def _end_interrupted_program(code: int) -> None:
    """End the process now, skipping the interpreter's own shutdown.

    After Ctrl-C everything that matters is done: the run file is committed and closed, its
    lock released, the workers terminated. Tearing down the interpreter (modules, garbage,
    atexit handlers of libraries) still took 0.2-0.9 s on a busy 2-core machine (measured
    with bench/bench_faults.py), a large part of the one second Ctrl-C may take. Helper
    processes (forkserver, resource tracker) end when this process goes (closed pipes and
    the parent-death signal).
    """
    import os

    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):
            pass
    logging.shutdown()
    os._exit(code)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code.

    Called as the program (``argv`` None: the ``latticeread`` script or ``python -m
    latticeread``), an interrupted command (exit code 130) ends the process at once instead
    of returning (:func:`_end_interrupted_program`).
    """
    code = _main(argv)
    if argv is None and code == 130:
        _end_interrupted_program(code)
    return code


def _main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    names = {name for name, _, _ in COMMANDS}
    # ``latticeread`` or ``latticeread FILE...`` opens the window; a word that is neither a
    # command nor an existing file is a mistyped command: a usage error, not the window.
    first = next((a for k, a in enumerate(argv)
                  if not a.startswith("-") and (k == 0 or argv[k - 1] not in _GUI_VALUE_OPTIONS)), None)
    asks_help = any(a in ("-h", "--help", "--version") for a in argv)
    if first is not None and first not in names and not Path(first).exists() and not asks_help:
        print(f"latticeread: error: {unknown_command_message(first)}", file=sys.stderr)
        return 2
    if (first is None or first not in names) and not asks_help:
        argv = ["gui", *argv]
    parser = build_parser()
    args = parser.parse_args(argv)
    debug = bool(getattr(args, "debug", False))
    _setup_logging(debug)
    if not hasattr(args, "_run"):
        parser.print_help()
        return 2
    from latticeread.errors import LatticeReadError

    try:
        with _plain_warnings(args.command, debug):
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
