"""The window fits common lab screens: 1366x768 laptops and up.

Screen sizes: 1366x768, 1600x900 and 1920x1080 are the common laptop and desktop panel
resolutions (common practice, no source). The window's minimum size must fit the smallest,
and at that size no panel may need a horizontal scroll bar (vertical scrolling is allowed).
"""

from __future__ import annotations

from pathlib import Path

import pytest

pytest.importorskip("pytestqt")

from PySide6 import QtWidgets  # noqa: E402

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_square.tif"


def _window(qtbot, tmp_path, size=None) -> MainWindow:
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    if size is not None:
        w.resize(*size)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_minimum_size_fits_a_1366x768_screen(qtbot, tmp_path):
    w = _window(qtbot, tmp_path)
    assert w.open_path(SAMPLE), w.last_error
    w.flush()
    hint = w.minimumSizeHint()
    assert hint.width() <= 1366 and hint.height() <= 768, f"minimum size {hint.width()}x{hint.height()}"
    assert w.minimumSize().width() <= 1366 and w.minimumSize().height() <= 768


def test_at_1366x768_the_size_is_honoured_and_no_panel_scrolls_sideways(qtbot, tmp_path):
    w = _window(qtbot, tmp_path, size=(1366, 768))
    assert w.open_path(SAMPLE), w.last_error
    qtbot.waitUntil(lambda: w.session.result(0) is not None, timeout=20000)
    w.flush()
    qtbot.wait(50)
    assert (w.width(), w.height()) == (1366, 768)
    assert w.centralWidget().width() >= 500  # the image keeps most of the room
    for key in ("geometry_panel", "histogram_panel"):
        area = w.docks[key].widget()
        assert isinstance(area, QtWidgets.QScrollArea)
        assert w.docks[key].isVisible()
        assert area.widget().width() <= area.viewport().width(), f"{key} scrolls sideways"
        assert not area.horizontalScrollBar().isVisible(), f"{key} has a horizontal scroll bar"


def test_layout_is_remembered_per_screen_size(qtbot, tmp_path, monkeypatch):
    settings = AppSettings(tmp_path / "layout.ini")
    make_app()
    w = MainWindow(settings=settings, synchronous=True, offer_restore=False, autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    w.docks["histogram_panel"].hide()
    settings.save_window(w)
    key = AppSettings.screen_key(w)
    assert settings.value(f"window/{key}/state") is not None
    # the same screen size gets the saved layout back
    again = MainWindow(settings=settings, synchronous=True, offer_restore=False, autosave_interval_s=0)
    qtbot.addWidget(again)
    assert again._layout_restored
    assert not again.docks["histogram_panel"].isVisibleTo(again)
    # a screen of another size starts with the default layout, fitted to that screen
    monkeypatch.setattr(AppSettings, "screen_key", staticmethod(lambda window: "1366x768"))
    other = MainWindow(settings=settings, synchronous=True, offer_restore=False, autosave_interval_s=0)
    qtbot.addWidget(other)
    assert not other._layout_restored
    assert other.docks["histogram_panel"].isVisibleTo(other)


def test_at_1366x768_the_fidelity_table_shows_every_column_whole(qtbot, tmp_path):
    w = _window(qtbot, tmp_path, size=(1366, 768))
    panel = w.fidelity_panel
    # the widest values the table shows: seven rows of estimates with intervals
    report = {name: 0.98765 for name in ("loss", "hop", "read_correctly", "loss_counted", "hop_counted")}
    report.update({f"{name}_ci": (0.91234, 0.99876) for name in report})
    report.update(false_positive_rate=1.2345e-3, false_positive_rate_ci=(1.1e-3, 1.4e-3), false_negative_rate=2e-9,
                  false_negative_rate_ci=(0.0, 3e-9), n_atoms=8922, n_shots=6, n_images=2,
                  warnings=("only 6 shots: the intervals resample blocks of sites, which takes the blocks as "
                            "independent; read them as rough",) * 3)
    panel.set_report(report)
    w.docks["fidelity_panel"].show()
    w.docks["fidelity_panel"].raise_()
    qtbot.wait(50)
    table = panel.table
    assert table.isVisible() and table.columnCount() == 2
    for col in range(table.columnCount()):
        assert table.columnWidth(col) >= table.sizeHintForColumn(col), f"column {col} is cut"
    header = table.verticalHeader()
    titles = [table.verticalHeaderItem(r).text() for r in range(table.rowCount())]
    assert header.width() >= max(header.fontMetrics().horizontalAdvance(t) for t in titles) + 8, "a row title is cut"
    need = table.verticalHeader().width() + table.horizontalHeader().length() + 2 * table.frameWidth()
    assert need <= table.width(), f"the table needs {need} px, has {table.width()}"
    area = w.docks["fidelity_panel"].widget()
    assert area.widget().width() <= area.viewport().width(), "the fidelity panel scrolls sideways"
    assert panel.loss_note_label.isVisible()
    # nothing drawn over anything: the panel has the height its wrapped labels need at its width
    assert panel.height() >= panel.layout().totalMinimumHeightForWidth(panel.width())
    assert panel.loss_note_label.geometry().top() > table.geometry().bottom()
    assert panel.summary_label.geometry().top() > panel.meaning_label.geometry().bottom()
