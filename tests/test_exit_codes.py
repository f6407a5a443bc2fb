"""Every deliberate refusal of the command line exits with the code the README's table gives.

Each case runs the real command on small files; the refusals happen before any frame is
analysed, so the whole file takes about a second. Existing files must be left untouched.
"""

import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from latticeread.cli import main

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data"


@pytest.fixture()
def files(tmp_path):
    """A frame file, its calibration, and a few existing files that must never change."""
    shutil.copy(SAMPLE / "demo_folded.tif", tmp_path / "frames.tif")
    shutil.copy(SAMPLE / "demo_folded.calibration.json", tmp_path / "cal.json")
    for name in ("old.csv", "old.h5", "old.json", "old_only.csv.json", "old.tif", "taken.truth.h5", "data.h5"):
        (tmp_path / name).write_text(f"existing {name}")
    (tmp_path / "empty_cal.json").write_text("{}")
    return tmp_path


# (command line with {d} for the folder, expected exit code, words of the message)
REFUSALS = [
    (["recontruct", "{d}/frames.tif"], 2, "did you mean 'reconstruct'"),
    (["calibrat"], 2, "did you mean 'calibrate'"),
    (["reconstruct", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/sites.txt"], 2, "must end in one of"),
    (["calibrate", "{d}/frames.tif", "-o", "{d}/cal.yaml"], 2, "must end in one of: .json"),
    (["simulate", "{d}/frames.png"], 2, "must end in one of: .tif"),
    (["batch", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/run.json"], 2, "run file"),
    (["watch", "{d}", "-c", "{d}/cal.json", "-o", "{d}/live.csv"], 2, "run file"),
    (["fidelity", "{d}/frames.tif", "--out", "{d}/report.txt"], 2, "must end in .json"),
    (["reconstruct", "{d}/missing.tif", "-c", "{d}/cal.json", "-o", "{d}/s.csv"], 3, "does not exist"),
    (["reconstruct", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/old.csv"], 4, "already exists"),
    (["reconstruct", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/old.h5"], 4, "already exists"),
    (["reconstruct", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/old_only.csv"], 4,
     "old_only.csv.json already exists"),
    (["calibrate", "{d}/frames.tif", "-o", "{d}/old.json"], 4, "already exists"),
    (["calibrate", "{d}/frames.tif", "--camera", "{d}/old.json", "-o", "{d}/old.json", "--force"], 4,
     "camera description this command reads"),
    (["simulate", "{d}/old.tif"], 4, "already exists"),
    (["simulate", "{d}/taken.tif"], 4, "taken.truth.h5 already exists"),
    (["fidelity", "{d}/frames.tif", "-c", "{d}/cal.json", "--out", "{d}/old.json"], 4, "already exists"),
    (["fidelity", "{d}/frames.tif", "-c", "{d}/cal.json", "--out", "{d}/cal.json", "--force"], 4,
     "calibration this command reads"),
    (["camera", "{d}/frames.tif", "--out", "{d}/old.json"], 4, "already exists"),
    (["batch", "{d}/data.h5", "{d}/frames.tif", "-c", "{d}/cal.json", "-o", "{d}/data.h5"], 4,
     "input this command reads"),
    (["reconstruct", "{d}/frames.tif", "-c", "{d}/empty_cal.json", "-o", "{d}/s.csv"], 5, ""),
]


@pytest.mark.parametrize("argv, code, words", REFUSALS, ids=[" ".join(r[0][:1] + [str(r[1])]) + f"-{i}"
                                                             for i, r in enumerate(REFUSALS)])
def test_each_refusal_exits_with_its_code_and_touches_nothing(files, capsys, monkeypatch, argv, code, words):
    import latticeread.commands.gui as gui

    monkeypatch.setattr(gui, "run", lambda args: pytest.fail("a refusal must not open the window"))
    before = {p.name: p.read_bytes() for p in files.iterdir()}
    assert main([a.format(d=files) for a in argv]) == code
    err = capsys.readouterr().err
    assert words in err
    assert "internal error" not in err and "Traceback" not in err
    after = {p.name: p.read_bytes() for p in files.iterdir()}
    assert after == before


def _readme_codes() -> dict[int, str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    return {int(m.group(1)): m.group(2) for m in re.finditer(r"^\| (\d+) \| (.+) \|$", text, re.M)}


def test_readme_table_lists_every_exit_code_of_the_program():
    from latticeread import errors

    codes = _readme_codes()
    assert set(codes) == {0, 1, 2, 3, 4, 5, 130}
    used = {cls.exit_code for cls in vars(errors).values()
            if isinstance(cls, type) and issubclass(cls, errors.LatticeReadError) and cls is not errors.LatticeReadError}
    assert used <= set(codes)
    assert "bug" in codes[1]


def test_every_refusal_code_of_the_table_is_exercised():
    assert {code for _, code, _ in REFUSALS} == {c for c in _readme_codes() if c not in (0, 1, 130)}


# Option values outside their range: argparse refuses them (exit 2) before any file is read.
OUT_OF_RANGE = [
    (["calibrate", "f.tif", "-o", "c.json", "--max-frames", "0"], "must be a whole number at least 1"),
    (["calibrate", "f.tif", "-o", "c.json", "--refine-frames", "-2"], "must be a whole number at least 1"),
    (["calibrate", "f.tif", "-o", "c.json", "--psf", "gaussian", "--fwhm", "1e6"],
     "must be a number above 0 up to 60 pixels"),
    (["calibrate", "f.tif", "-o", "c.json", "--lattice-spacing", "0.3"], "two pixels per site at least: Nyquist"),
    (["calibrate", "f.tif", "-o", "c.json", "--na", "2.5"], "must be a number above 0 up to 1.7"),
    (["calibrate", "f.tif", "-o", "c.json", "--wavelength-nm", "nan"], "from 100 to 3000 nm"),
    (["reconstruct", "f.tif", "-o", "s.csv", "--pixel-size-nm", "0"], "from 1 to 100000 nm"),
    (["simulate", "x.tif", "--shots", "0"], "must be a whole number at least 1"),
    (["simulate", "x.tif", "--size", "0", "10"], "from 16 to 16384 pixels"),
    (["simulate", "x.tif", "--filling", "2"], "must be a number from 0 to 1"),
    (["simulate", "x.tif", "--photons", "-5"], "above 0 up to 1e+07 photons"),
    (["fidelity", "f.tif", "--images-per-shot", "1"], "must be a whole number at least 2"),
    (["fidelity", "f.tif", "--radius", "-1"], "must be a number above 0 sites"),
    (["camera", "d.tif", "--frames-per-level", "0"], "must be a whole number at least 2"),
    (["watch", "d", "-c", "c.json", "-o", "l.h5", "--settle", "-1"], "must be 0 or a positive number of seconds"),
]


@pytest.mark.parametrize("argv, words", OUT_OF_RANGE, ids=[f"{a[0]}-{a[-2]}" for a, _ in OUT_OF_RANGE])
def test_option_values_outside_their_range_are_usage_errors(argv, words, capsys):
    with pytest.raises(SystemExit) as exc:
        main(argv)
    assert exc.value.code == 2
    assert words in capsys.readouterr().err


def test_simulating_more_than_the_memory_holds_is_refused(tmp_path, capsys, monkeypatch):
    from latticeread.io import limits

    monkeypatch.setattr(limits, "available_memory", lambda: 1 << 30)
    assert main(["simulate", str(tmp_path / "x.tif"), "--size", "4096", "4096", "--shots", "50"]) == 2
    assert "simulating 100 frames of 4096x4096 pixels needs about 25.0 GiB of memory but only 1.0 GiB" in \
        capsys.readouterr().err
    assert not (tmp_path / "x.tif").exists()


def test_no_deliberate_error_class_exits_with_the_bug_code():
    from latticeread import errors

    classes = [c for c in vars(errors).values() if isinstance(c, type) and issubclass(c, errors.LatticeReadError)]
    assert errors.LatticeReadError in classes and len(classes) > 5
    assert all(c.exit_code != 1 for c in classes)


def test_warnings_are_one_line_each_and_numerical_noise_is_hidden(tmp_path):
    """A frame of NaN only: the program's warning as one "latticeread CMD: warning:" line, no
    Python source line, no numpy "All-NaN slice" RuntimeWarning; --debug shows the raw warnings."""
    import subprocess
    import sys

    np.save(tmp_path / "nan.npy", np.full((64, 64), np.nan))
    code = "import sys; from latticeread.cli import main; sys.exit(main(sys.argv[1:]))"
    args = [sys.executable, "-c", code, "calibrate", str(tmp_path / "nan.npy"), "-o", str(tmp_path / "cal.json")]
    plain = subprocess.run(args, capture_output=True, text=True, timeout=120)
    assert plain.returncode == 3
    assert "latticeread calibrate: warning: frame 0 of nan.npy has no finite pixel" in plain.stderr
    assert "RuntimeWarning" not in plain.stderr and "LatticeReadWarning" not in plain.stderr
    debug = subprocess.run(args + ["--debug"], capture_output=True, text=True, timeout=120)
    assert "LatticeReadWarning" in debug.stderr
