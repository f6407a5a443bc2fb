"""One range check for every threshold a user sets: the window's box and line, the session,
``reconstruct --threshold`` and the calibration file all refuse NaN, infinite, negative and
absurd values (above 1e7 photons) with the same message.

The range is our own rule (common practice, no source): amplitudes of empty sites scatter
around 0 after background subtraction, so a negative threshold reads almost every empty
site as an atom.
"""

from __future__ import annotations

import pytest

from latticeread.core.classify import MAX_THRESHOLD_PHOTONS, check_threshold
from latticeread.errors import CalibrationError

RANGE = r"it must be a finite number between 0 and 1e\+07"


@pytest.mark.parametrize("value", [float("nan"), float("inf"), -float("inf"), -1e9, -0.5, 1.0000001e7, "2e7"])
def test_values_outside_the_range_are_refused(value):
    with pytest.raises(CalibrationError, match=RANGE):
        check_threshold(value)


@pytest.mark.parametrize("value", [0, 0.0, 12.5, "300", MAX_THRESHOLD_PHOTONS])
def test_values_inside_the_range_come_back_as_floats(value):
    assert check_threshold(value) == float(value)


def test_a_value_that_is_not_a_number_is_named():
    with pytest.raises(CalibrationError, match=r"the threshold must be a number of counts, got 'abc'"):
        check_threshold("abc", unit="counts")


def test_the_file_limits_and_the_command_line_use_the_same_check():
    from latticeread.commands.reconstruct import threshold_photons
    from latticeread.io import limits

    assert limits.check_threshold is check_threshold
    assert limits.MAX_THRESHOLD_PHOTONS == MAX_THRESHOLD_PHOTONS
    import argparse

    with pytest.raises(argparse.ArgumentTypeError, match=RANGE):
        threshold_photons("-1e9")


# --- the window ------------------------------------------------------------------------------

@pytest.fixture()
def panel(qtbot):
    pytest.importorskip("pytestqt")
    from latticeread.gui.app import make_app
    from latticeread.gui.panels.histogram_panel import HistogramPanel

    make_app()
    p = HistogramPanel()
    qtbot.addWidget(p)
    p.set_threshold(400.0)
    return p


@pytest.mark.parametrize("typed", [-1e9, -3.0, 2e7])
def test_a_typed_threshold_outside_the_range_is_refused_and_the_box_goes_back(panel, typed):
    committed, refused = [], []
    panel.thresholdCommitted.connect(committed.append)
    panel.thresholdRefused.connect(refused.append)
    panel.threshold_box.setValue(typed)
    assert committed == []
    assert len(refused) == 1 and "finite number between 0 and 1e+07" in refused[0]
    assert panel.threshold_box.value() == 400.0
    assert panel.threshold_line.value() == 400.0
    panel.threshold_box.setValue(350.0)  # a good value still goes through
    assert committed == [350.0]


def test_a_line_released_below_zero_goes_back_to_the_last_value(panel):
    dragged, committed, refused = [], [], []
    panel.thresholdDragged.connect(dragged.append)
    panel.thresholdCommitted.connect(committed.append)
    panel.thresholdRefused.connect(refused.append)
    line = panel.threshold_line
    for x in (300.0, 100.0, -50.0):  # the user drags through 0 to a negative value
        line.setValue(x)
    line.sigPositionChangeFinished.emit(line)
    assert dragged == [300.0, 100.0]  # the negative position was never applied
    assert committed == [] and len(refused) == 1
    assert line.value() == 100.0 and panel.threshold_box.value() == 100.0


def test_the_window_says_why_and_keeps_the_calibration(qtbot, tmp_path):
    pytest.importorskip("pytestqt")
    from pathlib import Path

    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    sample = Path(__file__).resolve().parents[1] / "sample_data"
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    assert w.open_path(sample / "demo_square.tif"), w.last_error
    assert w.load_calibration(sample / "demo_square.calibration.json"), w.last_error
    before = w.session.calibration
    w.histogram_panel.threshold_box.setValue(-1e9)
    assert w.session.calibration == before
    assert "threshold" in w.last_error and "between 0 and 1e+07" in w.last_error


@pytest.mark.parametrize("value", ["-1e9", "-inf", "-nan", "nan", "-3", "2e7"])
def test_reconstruct_refuses_the_value_given_as_a_separate_word(tmp_path, capsys, value):
    # "--threshold -1e9": argparse alone took -1e9 for an option ("expected one argument")
    from latticeread.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["reconstruct", str(tmp_path / "f.tif"), "-o", str(tmp_path / "s.csv"), "--threshold", value])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "argument --threshold: the threshold is" in err and "between 0 and 1e+07" in err
