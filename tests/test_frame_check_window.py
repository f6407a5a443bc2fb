"""The image-model check of each frame reaches the window's session, its exports and the screen.

The numbers must be those the core computes for the same frame
(:meth:`latticeread.core.pipeline.Reconstructor.extract_full`, ``last_check``), whichever way
the session reconstructed it (this thread or worker processes); equality is the check
(common practice, no source). Frames: the bundled square demo (the project's forward model).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.core.pipeline import Reconstructor
from latticeread.io import load_calibration
from latticeread.io.run_file import read_run
from latticeread.session import Session

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


@pytest.fixture(scope="module")
def demo():
    frames = tifffile.imread(SAMPLE / "demo_square.tif")[:3]
    return frames, load_calibration(SAMPLE / "demo_square.calibration.json")


def _core_check(frames, calibration, i):
    rec = Reconstructor(calibration)
    rec.extract_full(frames[i], where=f"frame {i}")
    return rec.last_check


def test_session_keeps_each_frames_check_and_exports_it(demo, tmp_path):
    frames, cal = demo
    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(cal)
    assert s.frame_check(0) is None  # nothing reconstructed yet
    s.reconstruct()
    for i in range(len(frames)):
        want = _core_check(frames, cal, i)
        got = s.frame_check(i)
        assert got is not None and got.to_dict() == want.to_dict()
        assert s.result(i).check is got
    out = tmp_path / "window.h5"
    s.export_occupation_hdf5(out)
    run = read_run(out)
    want0 = _core_check(frames, cal, 0)
    assert run.light_outside[0] == want0.outside_fraction  # was NaN from the window before
    assert np.all(np.isfinite(run.light_outside))


def test_worker_processes_bring_the_same_checks(demo):
    frames, cal = demo
    s = Session()
    s.set_frames(np.concatenate([frames] * 3))  # more than two batches of 2: the pool path
    s.set_calibration(cal)
    for batch in s.reconstruct_job(batch_size=2, processes=1)():
        s.store_batch(batch)
    assert s.done.all()
    assert s.frame_check(4).to_dict() == _core_check(frames, cal, 1).to_dict()


def test_the_window_shows_the_check_under_the_matrix(qtbot, demo, tmp_path):
    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    frames, cal = demo
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "s.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.session.set_frames(frames.copy())
    w.session.set_calibration(cal)
    w.session.reconstruct()
    w.flush()
    text = w.occupation_view.summary.text()
    check = w.session.frame_check(0)
    assert text.startswith("frame 0: ") and check.describe() in text
    assert "outside" in text and "× noise" in text and "explains" in text
    assert "warning above" in w.occupation_view.summary.toolTip()
