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


def test_old_option_spellings_are_hidden_aliases_of_one_name(capsys):
    from latticeread.cli import build_parser

    parser = build_parser()
    args = parser.parse_args(["camera", "d.tif", "--kind", "emccd"])
    assert args.camera_kind == "emccd"
    assert parser.parse_args(["camera", "d.tif"]).camera_kind == "scmos"
    args = parser.parse_args(["reconstruct", "f.tif", "-o", "s.csv", "--qe", "0.5"])
    assert args.quantum_efficiency == 0.5
    assert parser.parse_args(["calibrate", "f.tif", "-o", "c.json"]).quantum_efficiency == 1.0
    for command in (["batch", "f.tif", "-c", "c.json", "-o", "r.h5"], ["fidelity", "f.tif"]):
        assert parser.parse_args([*command, "--no-progress"]).quiet is True
        assert parser.parse_args([*command, "-q"]).quiet is True
        assert parser.parse_args(command).quiet is False
    assert parser.parse_args(["batch", "f.tif", "-c", "c.json", "-o", "r.h5", "--fidelity-bootstrap", "7"]).bootstrap == 7
    assert parser.parse_args(["batch", "f.tif", "-c", "c.json", "-o", "r.h5", "--bootstrap", "7"]).bootstrap == 7
    for command in ("camera", "reconstruct", "batch", "fidelity"):
        with pytest.raises(SystemExit):
            parser.parse_args([command, "--help"])
        text = capsys.readouterr().out
        assert "--qe " not in text and "--kind " not in text and "--no-progress" not in text
        assert "--fidelity-bootstrap" not in text


def test_other_libraries_log_lines_stay_off_stderr_unless_debugging(monkeypatch, capsys):
    import logging

    import latticeread.commands.simulate as sim

    def noisy(args):
        logging.getLogger("tifffile").error("<tifffile.TiffPage 0> raw library complaint")
        logging.getLogger("latticeread.io.frames").warning("the program's own warning")
        return 0

    monkeypatch.setattr(sim, "run", noisy)
    assert main(["simulate", "x.tif"]) == 0
    err = capsys.readouterr().err
    assert "the program's own warning" in err and "raw library complaint" not in err
    assert main(["simulate", "x.tif", "--debug"]) == 0
    assert "raw library complaint" in capsys.readouterr().err


def test_a_mistyped_command_is_a_usage_error_with_a_suggestion(monkeypatch, capsys):
    import latticeread.commands.gui as gui

    monkeypatch.setattr(gui, "run", lambda args: pytest.fail("a mistyped command must not open the window"))
    assert main(["reconstuct", "frames.tif"]) == 2
    assert "did you mean 'reconstruct'" in capsys.readouterr().err
    assert main(["--settings", "new.ini", "nonsense"]) == 2
    assert "'nonsense' is not a command" in capsys.readouterr().err


def test_a_truncated_tiff_gives_one_message_without_tifffile_lines(tmp_path, capsys):
    from pathlib import Path

    sample = Path(__file__).resolve().parents[1] / "sample_data" / "demo_folded.tif"
    (tmp_path / "cut.tif").write_bytes(sample.read_bytes()[:50000])
    assert main(["calibrate", str(tmp_path / "cut.tif"), "-o", str(tmp_path / "c.json")]) == 3
    err = capsys.readouterr().err
    assert "cut.tif is truncated" in err
    assert "tifffile" not in err and err.count("\n") == 1


def test_existing_files_and_no_arguments_still_open_the_window(monkeypatch, tmp_path):
    import latticeread.commands.gui as gui

    opened = []
    monkeypatch.setattr(gui, "run", lambda args: opened.append(list(args.files)) or 0)
    (tmp_path / "frames.tif").write_bytes(b"II*\x00")
    assert main([str(tmp_path / "frames.tif")]) == 0
    assert main([]) == 0
    assert main(["--settings", str(tmp_path / "new.ini")]) == 0
    assert opened == [[str(tmp_path / "frames.tif")], [], []]
