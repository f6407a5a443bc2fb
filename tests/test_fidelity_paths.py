"""One fidelity estimate whatever the route: window (session), batch, the fidelity command, run files.

The same frames and calibration (a fixed threshold, so every route classifies the sites
alike) go through the session, ``run_batch`` and ``latticeread fidelity`` (on the frames and
on the batch's run file); the reports must be identical, because all of them call
:func:`latticeread.core.fidelity.fidelity_from_frames` with the same occupations, amplitudes
and thresholds. The demo camera here is an sCMOS camera (normal peaks) to keep the test fast;
the EMCCD default (skewed peaks) is checked in test_misread.py.

Outside check: none needed for an identity between routes; the estimate itself is checked
against the forward model in test_fidelity.py and test_misread.py.
"""

from __future__ import annotations

import json

import numpy as np
import pytest


@pytest.fixture(scope="module")
def paths(tmp_path_factory):
    import tifffile

    from latticeread.core.calibration import Calibration
    from latticeread.core.simulate import demo_camera, demo_scenario, simulate_frames
    from latticeread.io import save_calibration

    folder = tmp_path_factory.mktemp("fidelity_paths")
    kw = demo_scenario("square", frame_shape=(64, 64))
    kw.pop("pixel_size_nm")
    kw.update(camera=demo_camera("scmos"), region=("rectangle", 11, 11), filling=0.3, photons_per_atom=300.0,
              loss_probability=0.05, hop_probability=0.02)
    frames, truth = simulate_frames(**kw, n_shots=6, images_per_shot=2, rng=5)
    (folder / "data").mkdir()
    tifffile.imwrite(folder / "data" / "pairs.tif", frames, photometric="minisblack")
    rows, cols = truth.sites.rows, truth.sites.cols
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=(64, 64),
                      threshold=150.0, notes={"index_bounds": [int(rows.min()), int(rows.max()),
                                                               int(cols.min()), int(cols.max())]})
    save_calibration(folder / "cal.json", cal)
    return folder, frames, cal


def _window(frames, cal):
    from latticeread.session import Session

    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(cal, record=False)
    s.update_settings(images_per_shot=2, bootstrap_resamples=20)
    s.reconstruct()
    s.finish_reconstruction()
    s.compute_fidelity()
    return s.fidelity


def _command(args, out):
    from latticeread.cli import main

    assert main(["fidelity", *map(str, args), "--bootstrap", "20", "--no-progress", "--out", str(out)]) == 0
    return json.loads(out.read_text())


def _same(a: dict, b: dict):
    a, b = dict(a), dict(b)
    for d in (a, b):
        d.pop("inputs", None)
        d.pop("calibration_file", None)
    assert a == b


def test_window_batch_and_command_give_identical_reports(paths, capsys):
    from latticeread.runs.batch import run_batch

    folder, frames, cal = paths
    window = _window(frames, cal)
    summary = run_batch([folder / "data"], calibration=cal, out=folder / "run.h5", workers=0, progress=False,
                        images_per_shot=2, fidelity_bootstrap=20)
    command = _command([folder / "data" / "pairs.tif", "--calibration", folder / "cal.json"], folder / "cmd.json")
    from_run = _command([folder / "run.h5"], folder / "run.json")
    assert window.settings["misread"]["peak_shape"] == "normal"       # sCMOS
    assert window.settings["misread"]["n_frames"] == 12 and window.settings["rates_given"] == []
    assert window.histogram is not None and window.histogram.false_negative_rate > 0
    reference = json.loads(json.dumps(window.to_dict()))
    _same(reference, json.loads(json.dumps(summary.fidelity.to_dict())))
    _same(reference, command)
    _same(reference, from_run)
    assert command["loss"]["high"] > command["loss"]["low"]
    text = summary.format()
    assert "fidelity how  intervals: bootstrap over blocks of 4x4 sites" in text and "normal peaks" in text


def test_the_fidelity_command_reads_a_batch_run_file(paths, capsys):
    """``latticeread fidelity run.h5`` used to refuse the program's own batch output."""
    from latticeread.cli import main
    from latticeread.runs.batch import run_batch

    folder, _, cal = paths
    out = folder / "run2.h5"
    run_batch([folder / "data"], calibration=cal, out=out, workers=0, progress=False)
    assert main(["fidelity", str(out), "--bootstrap", "0", "--no-progress"]) == 0
    printed = capsys.readouterr().out
    assert "Imaging fidelity from 6 shots x 2 images" in printed
    assert "misread rates: pooled histogram fit" in printed
    code = main(["fidelity", str(out), "--images-per-shot", "13", "--no-progress"])
    assert code == 3
    assert "holds 12 frames but no complete shot of 13 consecutive images" in capsys.readouterr().err


def test_a_reopened_session_keeps_its_fidelity_estimate(paths, tmp_path):
    from latticeread.core.fidelity import FidelityReport
    from latticeread.session import Session

    _, frames, cal = paths
    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(cal, record=False)
    s.update_settings(images_per_shot=2, bootstrap_resamples=10)
    s.reconstruct()
    s.finish_reconstruction()
    s.compute_fidelity()
    path = s.save(tmp_path / "session.json")
    again = Session.open(path)
    assert isinstance(again.fidelity, FidelityReport)
    assert again.fidelity.to_dict() == s.fidelity.to_dict()
    np.testing.assert_array_equal(again.occupation_stack(), s.occupation_stack())
