"""What the user does in the window and what it answers: dialogs in the window's own terms,
undo steps that match user actions, folders remembered, help, plot export of the plot only.

Ground truth: the bundled square demo (sample_data/, made by latticeread.core.simulate, 12
frames in pairs) with its calibration.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtGui, QtWidgets  # noqa: E402

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from gui_windows import shown_window  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_square.tif"


@pytest.fixture()
def window(qtbot, tmp_path):
    w = shown_window(qtbot, tmp_path)
    return w


@pytest.fixture()
def demo(window, qtbot):
    assert window.open_path(SAMPLE), window.last_error
    qtbot.waitUntil(lambda: window.session.result(0) is not None, timeout=20000)
    window.flush()
    return window


def _boxes(window):
    return [b for b in window.findChildren(QtWidgets.QMessageBox) if b.isVisible()]


def test_fidelity_without_repeated_images_names_the_step_and_the_setting(demo):
    assert demo.session.settings["images_per_shot"] == 1
    demo.actions_by_name["fidelity"].setEnabled(True)
    demo.estimate_fidelity()
    box = _boxes(demo)[-1]
    assert box.windowTitle().startswith("Estimate fidelity")
    assert "Edit > Analysis settings > Images per shot" in box.text()
    assert "Cannot reconstruct" not in box.windowTitle()


def test_library_messages_speak_of_the_window_not_of_command_line_options(qtbot):
    from latticeread.core.psf import gaussian_psf
    from latticeread.core.psf_width import WIDTH_FIT_WARNING
    from latticeread.gui.panels import PSFPanel

    make_app()
    panel = PSFPanel()
    qtbot.addWidget(panel)
    warning = WIDTH_FIT_WARNING.format(kind="gaussian", fwhm=2.5)
    assert "--psf" in warning  # the shared message names command-line options...
    psf = gaussian_psf(fwhm=2.5)
    panel.set_psf(psf.__class__(kind=psf.kind, fwhm=psf.fwhm, radius=psf.radius,
                                params={**psf.params, "warnings": [warning]}))
    shown = panel.warnings_label.text()
    assert "--psf" not in shown  # ...the window shows where the same choice is made in the window
    assert "Edit > Analysis settings: PSF when calibrating" in shown


def test_one_drag_is_one_undo_step_even_with_a_pause(demo, qtbot):
    s = demo.session
    hp = demo.histogram_panel
    before = s.calibration.threshold
    start = s.threshold
    demo._undo_group_timer.setInterval(20)  # the grouping timer of other edits, made short
    hp.thresholdDragged.emit(start + 10.0)
    qtbot.wait(200)  # the user holds the mouse still, longer than the timer
    hp.thresholdDragged.emit(start + 40.0)
    hp.thresholdCommitted.emit(start + 50.0)
    assert s.calibration.threshold == pytest.approx(start + 50.0)
    demo.actions_by_name["undo"].trigger()
    assert s.calibration.threshold == before, "one Ctrl+Z must undo the whole drag"


def test_file_dialogs_start_in_the_folder_chosen_last(window, tmp_path, monkeypatch):
    seen = []
    chosen = tmp_path / "results" / "sites.csv"
    chosen.parent.mkdir()

    def fake_save(parent, title, start, filters, **_options):
        seen.append(("save", title, start))
        return str(chosen), filters

    def fake_open(parent, title, start, filters):
        seen.append(("open", title, start))
        return "", filters

    monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName", staticmethod(fake_save))
    monkeypatch.setattr(QtWidgets.QFileDialog, "getOpenFileName", staticmethod(fake_open))
    assert window.ask_save_file("Export the per-site table (CSV)", "x.csv", "CSV (*.csv)") == str(chosen)
    window.ask_open_file("Load calibration", "JSON (*.json)")
    assert seen[-1][0] == "open" and Path(seen[-1][2]) == chosen.parent
    # and after a restart of the program
    again = MainWindow(settings=window.app_settings, synchronous=True, offer_restore=False, autosave_interval_s=0)
    again.ask_open_file("Open frames", "TIFF (*.tif)")
    again.deleteLater()
    assert Path(seen[-1][2]) == chosen.parent


def test_help_lists_every_shortcut_and_opens_the_guide(window):
    dlg = window.show_shortcuts()
    text = dlg.findChild(QtWidgets.QTextBrowser).toPlainText()
    for name, act in window.actions_by_name.items():
        for key in act.shortcuts():
            assert key.toString(QtGui.QKeySequence.NativeText) in text, name
    assert "Reconstruct all frames" in text and "mouse wheel" in text
    guide = window.show_guide()
    assert "A short tour" in guide.findChild(QtWidgets.QTextBrowser).toPlainText()
    help_menu = [m for m in window.menuBar().findChildren(QtWidgets.QMenu) if m.title() == "&Help"][0]
    assert window.actions_by_name["shortcuts"] in help_menu.actions()
    assert window.actions_by_name["guide"] in help_menu.actions()


def test_plot_export_holds_the_plot_only_in_the_chosen_size(demo, tmp_path):
    import xml.etree.ElementTree as ET

    hp = demo.histogram_panel
    assert demo.export_plot("histogram", tmp_path / "hist.png", size=(1004, 753)), demo.last_error
    image = QtGui.QImage(str(tmp_path / "hist.png"))
    assert (image.width(), image.height()) == (1004, 753)
    # the on-screen plot is back to its size
    assert hp.plot_widget.plotItem.sceneBoundingRect().width() <= hp.plot_widget.width() + 1
    assert demo.export_plot("histogram", tmp_path / "hist.svg"), demo.last_error
    svg = (tmp_path / "hist.svg").read_text()
    ET.fromstring(svg)
    assert "site amplitude" in svg  # the axis label is part of the plot
    assert hp.method_combo.currentText() not in svg  # the method box is not
    assert "log counts" not in svg
    assert not demo.export_plot("histogram", tmp_path / "tiny.png", size=(10, 10))
    assert "50 to 20000 pixels" in demo.last_error
    for key in demo._plot_targets():
        assert demo.export_plot(key, tmp_path / f"{key}.png"), (key, demo.last_error)
        assert not QtGui.QImage(str(tmp_path / f"{key}.png")).isNull()
    assert np.all([(tmp_path / f"{k}.png").stat().st_size > 1000 for k in demo._plot_targets()])
