"""Opening frames with a calibration beside them, and loading a calibration JSON by hand.

Ground truth: the bundled demo stack and its truth file (made by latticeread.core.simulate);
the calibration beside it was written by ``latticeread calibrate`` with the demo optics.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402
from latticeread.io.truth_file import read_truth  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_square.tif"


def _window(qtbot, tmp_path) -> MainWindow:
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_opening_the_demo_loads_its_calibration_and_reconstructs_the_frame(qtbot, tmp_path):
    w = _window(qtbot, tmp_path)
    assert w.open_path(SAMPLE)
    cal = w.session.calibration
    assert cal is not None, "the calibration beside the demo stack was not loaded"
    truth = read_truth(SAMPLE.with_suffix(".truth.h5"))
    true_a = np.array(json.loads(json.dumps(truth["info"]["geometry"]))["a1"])
    spacing_true = float(np.hypot(*true_a))
    assert np.mean(cal.geometry.spacings) == pytest.approx(spacing_true, rel=1e-3)
    qtbot.waitUntil(lambda: w.session.result(0) is not None, timeout=20000)
    result = w.session.result(0)
    # the reconstructed atom count of frame 0 agrees with the truth within 1 %
    assert result.n_atoms == pytest.approx(int((truth["initial_occupation"][0] == 1).sum()), rel=0.01)


def test_calibration_for_another_frame_size_is_refused_with_a_dialog(qtbot, tmp_path, monkeypatch):
    from latticeread.gui import dialogs

    shown = []
    monkeypatch.setattr(dialogs, "show_error", lambda parent, exc, *a, **k: shown.append(str(exc)), raising=False)
    w = _window(qtbot, tmp_path)
    # open the triangular demo without its sidecar, then force the square demo's calibration on it
    frames = tmp_path / "frames.tif"
    shutil.copy(ROOT / "sample_data" / "demo_triangular.tif", frames)
    assert w.open_path(frames)
    assert w.session.calibration is None
    data = json.loads((ROOT / "sample_data" / "demo_square.calibration.json").read_text())
    data["frame_shape"] = [128, 128]
    wrong = tmp_path / "wrong.json"
    wrong.write_text(json.dumps(data))
    assert not w.open_path(wrong)  # a .json that is a calibration goes to load_calibration
    assert w.session.calibration is None
    assert "calibration was made for 128x128" in w.statusBar().currentMessage() + " ".join(shown) + \
        w.status_label.text()
    # the window stays usable: the right calibration loads
    assert w.load_calibration(ROOT / "sample_data" / "demo_triangular.calibration.json")
    assert w.session.calibration is not None
