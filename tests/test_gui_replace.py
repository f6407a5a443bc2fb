"""The window asks before it replaces a file, names what the file holds, and never writes over
its own inputs (the open stack, the loaded calibration file).

The questions are answered by replacing :func:`latticeread.gui.replace_guard.ask_replace`
(no real modal box is opened); the file dialogs by replacing
``QFileDialog.getSaveFileName``. Ground truth: the files on disk before and after (common
practice, no source).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtWidgets  # noqa: E402

from latticeread.gui import replace_guard  # noqa: E402
from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_square.tif"
SAMPLE_CAL = ROOT / "sample_data" / "demo_square.calibration.json"


class _Answers:
    """Stands in for the question box: records each question and gives a fixed answer."""

    def __init__(self, answer: bool):
        self.answer = answer
        self.asked: list[tuple[str, str]] = []

    def __call__(self, parent, title, text, on_answer):
        self.asked.append((title, text))
        on_answer(self.answer)


class _SaveDialog:
    """Stands in for QFileDialog.getSaveFileName: returns ``name`` and records the options."""

    def __init__(self, name):
        self.name = str(name)
        self.options = []

    def __call__(self, *args, options=None, **kwargs):
        self.options.append(options)
        return self.name, ""


@pytest.fixture()
def window(qtbot, tmp_path):
    make_app()
    shutil.copy(SAMPLE, tmp_path / "frames.tif")
    shutil.copy(SAMPLE_CAL, tmp_path / "cal.json")
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    assert w.open_path(tmp_path / "frames.tif"), w.last_error
    assert w.load_calibration(tmp_path / "cal.json"), w.last_error
    return w


def _fake_run_file(path: Path, n_shots: int) -> bytes:
    with h5py.File(path, "w") as f:
        f.attrs["format"] = "latticeread-run"
        f.create_dataset("committed", data=np.array([n_shots, 0], np.int64))
    return path.read_bytes()


def _use(monkeypatch, name, answer):
    dialog, answers = _SaveDialog(name), _Answers(answer)
    monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName", dialog)
    monkeypatch.setattr(replace_guard, "ask_replace", answers)
    return dialog, answers


def test_save_session_as_asks_before_replacing_a_run_file_beside_it(window, tmp_path, monkeypatch):
    old = _fake_run_file(tmp_path / "run.h5", 176)
    dialog, answers = _use(monkeypatch, tmp_path / "run.json", answer=False)
    window.actions_by_name["save_session_as"].trigger()
    # Qt's own question is off (it would ask about run.json only, not the run.h5 beside it) ...
    assert all(o & QtWidgets.QFileDialog.Option.DontConfirmOverwrite for o in dialog.options)
    # ... so the window asks, naming the companion file and what it holds
    assert len(answers.asked) == 1
    title, text = answers.asked[0]
    assert "replace" in title.lower()
    assert "run.h5: a run file with 176 frames" in text
    assert (tmp_path / "run.h5").read_bytes() == old and not (tmp_path / "run.json").exists()
    answers.answer = True
    window.actions_by_name["save_session_as"].trigger()
    assert (tmp_path / "run.json").exists()
    with h5py.File(tmp_path / "run.h5", "r") as f:
        assert f.attrs["format"] == "latticeread-session"


def test_a_new_file_is_written_without_a_question(window, tmp_path, monkeypatch):
    _dialog, answers = _use(monkeypatch, tmp_path / "new_cal.json", answer=False)
    window._export_dialog("cal")
    assert answers.asked == [] and (tmp_path / "new_cal.json").exists()


def test_export_calibration_over_an_existing_file_asks_and_cancel_keeps_it(window, tmp_path, monkeypatch):
    other = tmp_path / "other.json"
    other.write_text('{"format": "latticeread-calibration"}')
    _dialog, answers = _use(monkeypatch, other, answer=False)
    window._export_dialog("cal")
    assert "other.json: a calibration" in answers.asked[0][1]
    assert other.read_text() == '{"format": "latticeread-calibration"}'


def test_the_companion_of_a_new_csv_table_is_asked_about(window, tmp_path, monkeypatch):
    (tmp_path / "sites.csv.json").write_text("{}")
    _dialog, answers = _use(monkeypatch, tmp_path / "sites.csv", answer=False)
    window._export_dialog("csv")
    assert len(answers.asked) == 1 and "sites.csv.json" in answers.asked[0][1]
    assert not (tmp_path / "sites.csv").exists()


@pytest.mark.parametrize("target, role", [("cal.json", "calibration file loaded"),
                                          ("frames.tif", "frame stack open")])
def test_no_save_replaces_an_input_of_the_session(window, tmp_path, monkeypatch, target, role):
    before = (tmp_path / target).read_bytes()
    _dialog, answers = _use(monkeypatch, tmp_path / target, answer=True)
    window._export_dialog("cal")
    window._export_plot_dialog("histogram")
    window.actions_by_name["save_session_as"].trigger()  # frames.tif -> frames.json + frames.h5; cal.json itself
    assert answers.asked == []  # refused, not asked
    assert role in window.last_error and "never writes over its own inputs" in window.last_error
    assert (tmp_path / target).read_bytes() == before


def test_plain_save_replaces_its_own_session_files_but_asks_about_a_foreign_one(window, tmp_path, monkeypatch):
    _dialog, answers = _use(monkeypatch, tmp_path / "s.json", answer=True)
    window.actions_by_name["save_session_as"].trigger()
    assert answers.asked == [] and (tmp_path / "s.h5").exists()
    window.actions_by_name["save_session"].trigger()  # its own files: no question
    assert answers.asked == []
    _fake_run_file(tmp_path / "s.h5", 3)  # another program put a run file there meanwhile
    answers.answer = False
    window.actions_by_name["save_session"].trigger()
    assert len(answers.asked) == 1 and "s.h5: a run file with 3 frames" in answers.asked[0][1]


def test_the_question_box_defaults_to_cancel(qtbot):
    make_app()
    parent = QtWidgets.QWidget()
    qtbot.addWidget(parent)
    answers = []
    box = replace_guard.ask_replace(parent, "Save: replace existing file?", "x.h5 exists", answers.append)
    assert box.defaultButton() is box.button(QtWidgets.QMessageBox.Cancel)
    box.defaultButton().click()
    assert answers == [False]
