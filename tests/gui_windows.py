"""The main window as the GUI tests open it: offscreen, 1366x768, its own settings file."""

from __future__ import annotations

from pathlib import Path

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data" / "demo_square.tif"


def shown_window(qtbot, tmp_path):
    """A shown MainWindow (synchronous work, no restore offer, no autosave) on a laptop-sized screen."""
    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.resize(1366, 768)
    w.show()
    qtbot.waitExposed(w)
    return w


def demo_window(qtbot, tmp_path):
    """:func:`shown_window` with the square demo stack (and its calibration) opened."""
    w = shown_window(qtbot, tmp_path)
    assert w.open_path(SAMPLE), w.last_error
    return w
