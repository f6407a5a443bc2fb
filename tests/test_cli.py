"""The command-line dispatcher: help, version, error messages and exit codes."""

import subprocess
import sys

import pytest

from latticeread import __version__
from latticeread.cli import COMMANDS, main
from latticeread.errors import CalibrationError, ExportError, FrameError, LatticeNotFound


def test_help_lists_every_command_that_exists(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    import importlib

    for name, module, _ in COMMANDS:
        try:
            importlib.import_module(f"latticeread.commands.{module}")
        except ModuleNotFoundError:
            continue
        assert name in out


def test_python_dash_m_works():
    res = subprocess.run([sys.executable, "-m", "latticeread", "--version"], capture_output=True, text=True,
                         timeout=60)
    assert res.returncode == 0
    assert __version__ in res.stdout


@pytest.mark.parametrize("error, code", [(FrameError("bad frame"), 3), (LatticeNotFound("no lattice"), 3),
                                         (ExportError("read-only"), 4), (CalibrationError("missing key"), 5)])
def test_project_errors_become_messages_and_exit_codes(monkeypatch, capsys, error, code):
    import latticeread.commands.simulate as sim

    def boom(args):
        raise error

    monkeypatch.setattr(sim, "run", boom)
    assert main(["simulate", "x.tif"]) == code
    err = capsys.readouterr().err
    assert str(error) in err and "Traceback" not in err


def test_unexpected_errors_say_it_is_a_bug(monkeypatch, capsys):
    import latticeread.commands.simulate as sim

    monkeypatch.setattr(sim, "run", lambda args: 1 / 0)
    assert main(["simulate", "x.tif"]) == 1
    assert "--debug" in capsys.readouterr().err
    with pytest.raises(ZeroDivisionError):
        main(["--debug", "simulate", "x.tif"])
