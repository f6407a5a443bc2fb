"""Opening a second stack in the same window: its own calibration, camera and display levels.

Ground truth: the bundled demo stacks (sample_data/, made by latticeread.core.simulate) and the
calibration files beside them (written by ``latticeread calibrate``). The triangular demo is an
sCMOS stack of 97-180 counts, the folded demo an EMCCD stack of 188-1544 counts on a square
lattice: analysing one with the other's calibration gives wrong photons and wrong sites.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtWidgets  # noqa: E402

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402
from latticeread.io import load_calibration  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
TRIANGULAR = ROOT / "sample_data" / "demo_triangular.tif"
FOLDED = ROOT / "sample_data" / "demo_folded.tif"


@pytest.fixture()
def window(qtbot, tmp_path):
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def _choice_box(window):
    boxes = [b for b in window.findChildren(QtWidgets.QMessageBox, "calibration_choice") if b.isVisible()]
    return boxes[0] if boxes else None


def _press(box, key: str) -> None:
    for button in box.buttons():
        if button.property("choice") == key:
            button.click()
            return
    raise AssertionError(f"no button {key!r} in the question")


def test_second_stack_loads_its_own_calibration_camera_and_levels(window, qtbot):
    assert window.open_path(TRIANGULAR), window.last_error
    s = window.session
    assert s.calibration.camera.kind == "scmos"
    # the user confirms the sCMOS camera in Analysis settings (it is kept there as typed)
    s.update_settings(camera=s.camera_model().to_dict())
    window.flush()
    low, high = window.image_pane.lut.getLevels()
    assert high < 300  # levels of the sCMOS frames (97-180 counts)

    assert window.open_path(FOLDED), window.last_error
    window.flush()
    expected = load_calibration(FOLDED.with_name("demo_folded.calibration.json"))
    cal = s.calibration
    assert cal.geometry == expected.geometry, "the folded stack is analysed with the triangular lattice"
    assert cal.camera == expected.camera and cal.camera.kind == "emccd"
    assert s.camera_model() == expected.camera, "the camera typed for the previous stack still wins"
    assert s.calibration_origin.kind == "file"
    assert Path(s.calibration_origin.path).name == "demo_folded.calibration.json"
    assert "demo_folded.calibration.json" in window.calibration_label.text()
    assert not s.can_undo, "undo would go back to the previous stack's lattice"
    # display levels follow the new frames (188-1544 counts), not the sCMOS ones
    low, high = window.image_pane.lut.getLevels()
    frame = np.asarray(s.frame(0), dtype=float)
    assert high > 1000 and low >= frame.min() - 1
    assert _choice_box(window) is None  # nothing to ask: the stack has its own calibration


def test_second_stack_without_a_calibration_asks_and_can_calibrate_anew(window, qtbot, tmp_path):
    lone = tmp_path / "lone.tif"
    shutil.copy(FOLDED, lone)  # no calibration file beside it
    assert window.open_path(TRIANGULAR), window.last_error
    triangular = window.session.calibration
    assert window.open_path(lone), window.last_error
    s = window.session
    assert s.calibration_from_other_stack
    assert "demo_triangular.tif" in window.calibration_label.text()
    assert "(kept)" in window.calibration_label.text()
    qtbot.waitUntil(lambda: _choice_box(window) is not None, timeout=5000)
    box = _choice_box(window)
    assert "lone.tif has no calibration file" in box.text()
    assert "was made for demo_triangular.tif." in box.text()
    _press(box, "calibrate")
    qtbot.waitUntil(lambda: s.calibration is not None and s.calibration_origin.kind == "frames", timeout=60000)
    assert s.calibration.geometry != triangular.geometry
    # calibrated from the folded frames: the square lattice, 90 deg between the vectors
    # (demo scenario in sample_data/README.md; 0.5 deg tolerance, common practice, no source)
    assert np.degrees(s.calibration.geometry.angle_between) == pytest.approx(90.0, abs=0.5)
    assert "calibrated from lone.tif" in window.calibration_label.text()


def test_second_stack_without_a_calibration_can_keep_the_one_in_use(window, qtbot, tmp_path):
    lone = tmp_path / "lone.tif"
    shutil.copy(TRIANGULAR, lone)
    assert window.open_path(TRIANGULAR), window.last_error
    before = window.session.calibration
    assert window.open_path(lone), window.last_error
    qtbot.waitUntil(lambda: _choice_box(window) is not None, timeout=5000)
    _press(_choice_box(window), "keep")
    assert window.session.calibration is before
    assert "made for demo_triangular.tif" in window.calibration_label.text()
