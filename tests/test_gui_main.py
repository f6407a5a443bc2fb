"""The main window, offscreen: open data, estimate the lattice, drag the threshold, export,
save and reopen a session, broken files, shortcuts, background work, autosave.

Ground truth: frames from the project's forward model (latticeread.core.simulate) and the
bundled demo stack with its truth file (sample_data/, made by the same model).
"""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")

import pyqtgraph as pg  # noqa: E402
from PySide6 import QtCore, QtGui, QtWidgets  # noqa: E402

from latticeread.core.calibration import Calibration  # noqa: E402
from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.geometry import LatticeGeometry  # noqa: E402
from latticeread.core.psf import gaussian_psf  # noqa: E402
from latticeread.gui.app import display_problem, make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_square.tif"
GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)


@pytest.fixture(scope="module")
def sim_tif(tmp_path_factory):
    import tifffile

    from latticeread.core.simulate import simulate_frames

    frames, truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA,
                                    region=("disk", 9), filling=0.4, photons_per_atom=800.0, n_shots=3,
                                    images_per_shot=2, rng=3)
    path = tmp_path_factory.mktemp("frames") / "shots.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    return path, frames, truth


@pytest.fixture()
def no_rate_limit():
    old = pg.getConfigOption("mouseRateLimit")
    pg.setConfigOption("mouseRateLimit", 0)
    yield
    pg.setConfigOption("mouseRateLimit", old)


def _make_window(qtbot, tmp_path, **kwargs) -> MainWindow:
    make_app()
    kwargs.setdefault("synchronous", True)
    kwargs.setdefault("offer_restore", False)
    kwargs.setdefault("autosave_interval_s", 0)
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), **kwargs)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


@pytest.fixture()
def window(qtbot, tmp_path):
    return _make_window(qtbot, tmp_path)


def _calibrated(window, sim_tif, *, reconstruct=True):
    path = sim_tif[0]
    assert window.open_path(path), window.last_error
    window.session.set_calibration(Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE))
    if reconstruct:
        window.reconstruct_all()
    window.flush()
    return window.session


def _message_boxes(window):
    return [b for b in window.findChildren(QtWidgets.QMessageBox) if b.isVisible()]


def test_open_sample_data_and_estimate_geometry(window):
    """The lattice vectors re-estimated in the window match the forward model's truth
    stored beside the demo stack (sample_data/demo_square.truth.h5)."""
    import h5py

    from latticeread.core.psf import airy_psf
    from latticeread.core.simulate import demo_camera

    assert window.open_path(SAMPLE), window.last_error
    window.flush()
    s = window.session
    assert s.n_frames == 12
    assert "12 frame(s)" in window.status_label.text()
    assert window.image_pane.image_item.image.shape == (256, 256)
    with h5py.File(ROOT / "sample_data" / "demo_square.truth.h5") as f:
        true_geometry = LatticeGeometry.from_dict(json.loads(f.attrs["truth_json"])["geometry"])
    rough = LatticeGeometry(a1=np.array(true_geometry.a1) * 1.02, a2=np.array(true_geometry.a2) * 1.02,
                            offset=(128.0, 128.0))
    s.set_calibration(Calibration(geometry=rough, psf=airy_psf(wavelength_nm=589, numerical_aperture=0.7,
                                                                 pixel_size_nm=160), camera=demo_camera(),
                                  frame_shape=(256, 256)))
    window.estimate_geometry()
    window.flush()
    assert window.last_error is None
    got = s.calibration.geometry
    # compare the lattices, not a particular choice of basis: both vectors of the estimate
    # must be lattice vectors of the truth with integer indices
    frac = np.linalg.solve(true_geometry.basis, got.basis)
    np.testing.assert_allclose(frac, np.round(frac), atol=0.01)
    assert abs(abs(np.linalg.det(np.round(frac))) - 1) < 1e-9
    assert "estimated" in window.status_label.text()
    x, _y = window.image_pane.grid_item.getData()
    assert x is not None and len(x) > 0


def _drag_threshold(window, qtbot, start: float, stop: float) -> None:
    """Raw mouse events on the histogram's threshold line (QTest.mouseMove does not carry the held button)."""
    panel = window.histogram_panel
    window.docks["histogram_panel"].raise_()
    view = panel.plot_widget
    vb = view.getPlotItem().getViewBox()
    vb.setXRange(min(start, stop) - 200, max(start, stop) + 200, padding=0)
    qtbot.wait(60)
    y_mid = float(np.mean(vb.viewRange()[1]))

    def at(x):
        return QtCore.QPointF(view.mapFromScene(vb.mapViewToScene(QtCore.QPointF(x, y_mid))))

    def send(kind, pos, button, buttons):
        event = QtGui.QMouseEvent(kind, pos, view.viewport().mapToGlobal(pos), button, buttons,
                                  QtCore.Qt.KeyboardModifier.NoModifier)
        QtWidgets.QApplication.sendEvent(view.viewport(), event)

    left, none = QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.MouseButton.NoButton
    send(QtCore.QEvent.Type.MouseMove, at(start), none, none)
    send(QtCore.QEvent.Type.MouseButtonPress, at(start), left, left)
    for x in np.linspace(start, stop, 11)[1:]:
        send(QtCore.QEvent.Type.MouseMove, at(x), none, left)
    send(QtCore.QEvent.Type.MouseButtonRelease, at(stop), left, none)


def test_threshold_drag_updates_histogram_and_occupation(window, sim_tif, qtbot, no_rate_limit):
    s = _calibrated(window, sim_tif)
    assert s.done.all()
    hp = window.histogram_panel
    before_counts = hp.counts_label.text()
    before_summary = window.occupation_view.summary.text()
    t0 = s.threshold
    n0 = s.counts()["occupied"]
    assert f"occupied {s.pooled_counts()['occupied']}" in before_counts
    target = 790.0  # inside the occupied peak (800 photons per atom): many atoms become "empty"
    _drag_threshold(window, qtbot, t0, target)
    window.flush()
    assert s.calibration.threshold == pytest.approx(target, abs=15.0)
    n1 = s.counts()["occupied"]
    assert n1 < n0
    assert hp.counts_label.text() != before_counts
    assert f"occupied {s.pooled_counts()['occupied']}" in hp.counts_label.text()
    assert window.occupation_view.summary.text() != before_summary
    assert f"{n1} atoms" in window.occupation_view.summary.text()
    # the site markers follow: occupied markers = occupied sites of this frame minus uncertain ones
    res = s.result()
    unc = (res.p_occupied >= 0.1) & (res.p_occupied <= 0.9)
    shown = window.image_pane.marker_counts["occupied"]
    assert shown == int(np.count_nonzero(res.occupied.astype(bool) & ~unc))
    # one drag = one undo step, back to the automatic threshold
    window.actions_by_name["undo"].trigger()
    window.flush()
    assert s.calibration.threshold is None and s.counts()["occupied"] == n0


def test_export_tables_and_plots(window, sim_tif, tmp_path):
    from latticeread.io import read_occupation_hdf5, read_sites_csv

    s = _calibrated(window, sim_tif)
    assert window.export("csv", tmp_path / "sites.csv"), window.last_error
    assert window.export("h5", tmp_path / "occ.h5"), window.last_error
    assert window.export("cal", tmp_path / "cal.json"), window.last_error
    table = read_sites_csv(tmp_path / "sites.csv")
    res = s.result(2)
    sel = table["frame"] == 2
    np.testing.assert_array_equal(table["occupied"][sel], res.occupied)
    np.testing.assert_array_equal(table["row"][sel], res.sites.rows)
    occ = read_occupation_hdf5(tmp_path / "occ.h5")
    np.testing.assert_array_equal(np.asarray(occ.occupation), s.occupation_stack())
    from latticeread.io import load_calibration

    assert load_calibration(tmp_path / "cal.json") == s.calibration
    for key in ("image", "occupation", "histogram"):
        assert window.export_plot(key, tmp_path / f"{key}.png"), window.last_error
        assert window.export_plot(key, tmp_path / f"{key}.svg"), window.last_error
        assert not QtGui.QImage(str(tmp_path / f"{key}.png")).isNull()
        root = ET.parse(tmp_path / f"{key}.svg").getroot()
        assert root.tag.endswith("svg")
        assert len(list(root.iter())) > 10


def test_export_never_overwrites_the_input_frames(window, sim_tif):
    _calibrated(window, sim_tif)
    before = sim_tif[0].read_bytes()
    assert not window.export("csv", sim_tif[0])
    assert "refusing to overwrite" in window.last_error
    assert not window.export_plot("image", sim_tif[0])
    assert sim_tif[0].read_bytes() == before


def test_read_only_folder_gives_a_clear_dialog(window, sim_tif, tmp_path, monkeypatch):
    import latticeread.io.atomic as atomic

    _calibrated(window, sim_tif)
    real_open = os.open

    def refuse(path, flags, *args):
        if str(path).startswith(str(tmp_path / "locked")):
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_open(path, flags, *args)

    (tmp_path / "locked").mkdir()
    monkeypatch.setattr(atomic.os, "open", refuse)
    assert not window.export("csv", tmp_path / "locked" / "sites.csv")
    boxes = _message_boxes(window)
    assert boxes and "read-only" in boxes[-1].text()
    assert boxes[-1].windowTitle() == "Cannot write the file"
    assert not any((tmp_path / "locked").iterdir())
    boxes[-1].close()
    window.step_frame(+1)  # the window stays usable
    assert window.session.index == 1


def test_save_and_reopen_session(window, sim_tif, tmp_path, qtbot):
    s = _calibrated(window, sim_tif)
    s.set_threshold(300.0)
    window.set_frame_index(3)
    assert window.save_session(tmp_path / "run.json"), window.last_error
    assert "*" not in window.windowTitle()
    other = _make_window(qtbot, tmp_path / "second")
    assert other.open_session(tmp_path / "run.json"), other.last_error
    other.flush()
    t = other.session
    assert t.calibration == s.calibration and t.index == 3
    np.testing.assert_array_equal(t.result(3).occupied, s.result(3).occupied)
    assert other.image_pane.slider.value() == 3
    assert "shots.tif" in other.windowTitle()


def test_broken_file_shows_error_and_window_stays_usable(window, sim_tif, tmp_path):
    good = sim_tif[0].read_bytes()
    broken = tmp_path / "broken.tif"
    broken.write_bytes(good[: len(good) // 3])
    assert not window.open_path(broken)
    boxes = _message_boxes(window)
    assert boxes, "no error dialog"
    assert "broken.tif" in boxes[-1].text()
    assert "broken.tif" in window.status_label.text()
    boxes[-1].close()
    assert window.open_path(sim_tif[0]), window.last_error
    window.flush()
    assert window.session.n_frames == 6


def test_keyboard_shortcuts(window, sim_tif, qtbot):
    _calibrated(window, sim_tif, reconstruct=False)
    window.activateWindow()
    window.image_pane.graphics.setFocus()
    qtbot.keyClick(window.image_pane.graphics, QtCore.Qt.Key_Right)
    assert window.session.index == 1
    qtbot.keyClick(window.image_pane.graphics, QtCore.Qt.Key_PageDown)
    assert window.session.index == 2
    qtbot.keyClick(window.image_pane.graphics, QtCore.Qt.Key_Left)
    assert window.session.index == 1
    assert window.image_pane.grid_check.isChecked()
    qtbot.keyClick(window.image_pane.graphics, QtCore.Qt.Key_G)
    assert not window.image_pane.grid_check.isChecked()
    assert not window.image_pane.grid_item.isVisible()
    keys = {a.shortcut().toString() for a in window.actions()}
    assert {"Ctrl+E", "Ctrl+R", "Ctrl+O", "Ctrl+S"} <= keys


def test_tooltips_on_every_control_of_the_window(window, sim_tif):
    _calibrated(window, sim_tif, reconstruct=False)
    controls = (QtWidgets.QAbstractButton, QtWidgets.QComboBox, QtWidgets.QAbstractSpinBox,
                QtWidgets.QAbstractSlider, QtWidgets.QLineEdit, QtWidgets.QProgressBar)
    mine = [window.image_pane, window.occupation_view, window.statusBar()]
    mine += window.findChildren(QtWidgets.QToolBar)
    missing = []
    for root in mine:
        for w in root.findChildren(QtWidgets.QWidget):
            if isinstance(w, QtWidgets.QScrollBar) or isinstance(w.parent(), QtWidgets.QAbstractSpinBox):
                continue  # scroll bars of the plot views and the spin boxes' inner editors
            if isinstance(w, controls):
                tip = w.toolTip()
                if isinstance(w, QtWidgets.QToolButton) and w.defaultAction() is not None:
                    tip = w.defaultAction().toolTip()
                if not tip.strip():
                    missing.append(f"{type(w).__name__} {w.objectName()} {getattr(w, 'text', lambda: '')()}")
    assert not missing, missing
    menus = [a for m in window.menuBar().findChildren(QtWidgets.QMenu) for a in m.actions()
             if not a.isSeparator() and a.menu() is None and a.isEnabled()]
    assert menus and all(a.toolTip().strip() and a.toolTip() != a.text().replace("&", "") or a.statusTip()
                         for a in menus)


def test_drop_a_file_opens_it(window, sim_tif):
    mime = QtCore.QMimeData()
    mime.setUrls([QtCore.QUrl.fromLocalFile(str(sim_tif[0]))])
    pos = QtCore.QPointF(100, 100)
    enter = QtGui.QDragEnterEvent(QtCore.QPoint(100, 100), QtCore.Qt.CopyAction, mime, QtCore.Qt.LeftButton,
                                  QtCore.Qt.NoModifier)
    window.dragEnterEvent(enter)
    assert enter.isAccepted()
    drop = QtGui.QDropEvent(pos, QtCore.Qt.CopyAction, mime, QtCore.Qt.LeftButton, QtCore.Qt.NoModifier)
    window.dropEvent(drop)
    assert window.session.n_frames == 6
    assert window.app_settings.recent_files()[0] == str(sim_tif[0].resolve())


def test_background_reconstruction_progress_and_cancel(qtbot, tmp_path, sim_tif):
    w = _make_window(qtbot, tmp_path, synchronous=False)
    s = _calibrated(w, sim_tif, reconstruct=False)
    qtbot.waitUntil(lambda: not w.workers.busy, timeout=20000)  # the shown frame
    w.reconstruct_all()
    assert w.progress.isVisible() or s.done.all()
    qtbot.waitUntil(lambda: s.done.all() and not w.workers.busy, timeout=30000)
    assert not w.progress.isVisible() and not w.cancel_button.isVisible()
    assert s.threshold_result is not None
    assert "all 6 frames reconstructed" in w.status_label.text()
    # stale work: a geometry change while a stack runs drops the running job's output
    s.set_geometry(GEOMETRY.with_offset((48.3, 47.7)))
    w.reconstruct_all()
    w.cancel_work()
    qtbot.waitUntil(lambda: not w.workers.busy, timeout=30000)
    assert "cancelled" in w.status_label.text()
    assert s.done.sum() < 6 or s.done.all()  # partial results are kept, never corrupted
    for i in np.flatnonzero(s.done):
        assert s.result(int(i)).geometry.a1 == GEOMETRY.a1


def test_worker_pool_drops_stale_results(qtbot):
    from latticeread.gui.workers import WorkerPool

    make_app()
    pool = WorkerPool()
    got = []
    import threading

    gate = threading.Event()

    def slow(should_stop):
        gate.wait(5)
        return "old"

    pool.submit("k", slow, on_result=got.append)
    pool.submit("k", lambda should_stop: "new", on_result=got.append)
    gate.set()
    qtbot.waitUntil(lambda: not pool.busy, timeout=5000)
    pool.wait()
    qtbot.wait(20)
    assert got == ["new"]


def test_autosave_and_restore_offer(qtbot, tmp_path, sim_tif):
    w = _make_window(qtbot, tmp_path)
    s = _calibrated(w, sim_tif)
    s.set_threshold(333.0)
    w.autosave()
    auto = w.app_settings.autosave_path()
    assert auto.exists() and auto.with_suffix(".h5").exists()
    # a crash: the window is never closed; the next start offers the autosaved session
    second = _make_window(qtbot, tmp_path, offer_restore=True)
    qtbot.waitUntil(lambda: bool(second.findChildren(QtWidgets.QMessageBox, "latticeread_question")), timeout=10000)
    box = second.findChildren(QtWidgets.QMessageBox, "latticeread_question")[-1]
    box.button(QtWidgets.QMessageBox.Yes).click()
    qtbot.waitUntil(lambda: second.session.calibration is not None, timeout=5000)
    assert second.session.calibration.threshold == 333.0
    np.testing.assert_array_equal(second.session.amplitudes(0), s.amplitudes(0))


def test_clean_close_removes_autosave_and_remembers_settings(qtbot, tmp_path, sim_tif):
    w = _make_window(qtbot, tmp_path)
    _calibrated(w, sim_tif, reconstruct=False)
    w.session.save(tmp_path / "saved.json")
    w.image_pane.set_grid_visible(False)
    w.autosave_path = w.app_settings.autosave_path()
    w.autosave_path.parent.mkdir(parents=True, exist_ok=True)
    w.autosave_path.write_text("{}")
    w.close()
    assert not w.autosave_path.exists()
    again = _make_window(qtbot, tmp_path)
    assert not again.image_pane.grid_check.isChecked()
    assert again.app_settings.recent_files()[0] == str(sim_tif[0].resolve())


def test_unsaved_work_is_kept_on_close(qtbot, tmp_path, sim_tif):
    w = _make_window(qtbot, tmp_path)
    _calibrated(w, sim_tif, reconstruct=False)
    assert w.session.modified
    w.close()
    assert w.app_settings.autosave_path().exists()


def test_about_box_has_the_safety_note(window):
    window.actions_by_name["about"].trigger()
    box = window.findChildren(QtWidgets.QMessageBox, "latticeread_about")[-1]
    assert "does not control any hardware" in box.text()


def test_no_display_is_detected():
    assert "no display found" in display_problem({}, "linux")
    assert display_problem({"DISPLAY": ":0"}, "linux") is None
    assert display_problem({"QT_QPA_PLATFORM": "offscreen"}, "linux") is None
    assert display_problem({}, "win32") is None


def test_command_without_display_prints_a_clear_message():
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    out = subprocess.run([sys.executable, "-m", "latticeread"], env=env, capture_output=True, text=True, timeout=60)
    assert out.returncode == 1
    assert "no display found" in out.stderr
    assert "xcb" not in out.stderr


def test_deferred_panels_are_built_after_show(qtbot, tmp_path, sim_tif):
    w = _make_window(qtbot, tmp_path, defer_panels=True)
    qtbot.waitUntil(lambda: hasattr(w.histogram_panel, "set_amplitudes"), timeout=5000)
    s = _calibrated(w, sim_tif)
    assert w.histogram_panel.counts_label.text().startswith(f"occupied {s.pooled_counts()['occupied']}")
    assert w.dock_content("histogram_panel") is w.histogram_panel


def test_analysis_settings_dialog_updates_the_session(window, sim_tif):
    from latticeread.gui.dialogs import AnalysisSettingsDialog

    _calibrated(window, sim_tif, reconstruct=False)
    window.actions_by_name["settings"].trigger()
    dlg = window.findChildren(AnalysisSettingsDialog)[-1]
    controls = [w for w in dlg.findChildren(QtWidgets.QWidget)
                if isinstance(w, (QtWidgets.QAbstractSpinBox, QtWidgets.QComboBox, QtWidgets.QPushButton))]
    assert controls and all(w.toolTip().strip() for w in controls)
    dlg.images_per_shot.setValue(2)
    dlg.camera_boxes["counts_per_electron"][1].setValue(1.0)  # twice the counts per photon
    dlg.accept()
    s = window.session
    assert s.settings["images_per_shot"] == 2
    assert s.calibration.camera.counts_per_electron == 1.0
    assert s.calibration.threshold is None  # photons changed: the threshold is chosen again


def test_calibrate_from_frames_in_the_window(window, sim_tif):
    """Analysis > Calibrate: geometry from the frames matches the forward model's lattice."""
    assert window.open_path(sim_tif[0])
    window.flush()  # actions are enabled by the redraw that follows loading
    s = window.session
    # ideal Airy PSF with the simulated width (3 px): 0.514 lambda/NA / pixel = 3 (Born & Wolf)
    s.update_settings(camera=CAMERA.to_dict(), psf_source="airy", wavelength_nm=767.0, numerical_aperture=0.75,
                      pixel_size_nm=0.514 * 767.0 / 0.75 / 3.0)
    window.actions_by_name["calibrate"].trigger()
    window.flush()
    assert window.last_error is None and s.calibration is not None
    assert "calibration done" in window.status_label.text()
    frac = np.linalg.solve(GEOMETRY.basis, s.calibration.geometry.basis)
    np.testing.assert_allclose(frac, np.round(frac), atol=0.01)
    assert s.calibration.psf.kind == "airy" and s.calibration.psf.fwhm == pytest.approx(3.0, rel=0.01)
    assert s.calibration.threshold is not None
    window.reconstruct_all()
    window.flush()
    assert s.done.all() and window.occupation_view.summary.text().startswith("frame 0:")


def test_per_frame_thresholds_show_the_current_frames_own_fit(window, tmp_path):
    """A calibration asking for a threshold per frame: the status says so, the histogram's line
    sits at the current frame's own fit and says whose fit it is, and follows the frame."""
    import tifffile

    from latticeread.core.simulate import simulate_frames

    parts = [simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 8),
                             filling=0.4, photons_per_atom=photons, n_shots=1, images_per_shot=2, rng=seed)[0]
             for photons, seed in ((60.0, 1), (200.0, 2))]
    path = tmp_path / "two_brightnesses.tif"
    tifffile.imwrite(path, np.concatenate(parts).astype(np.float32), photometric="minisblack")
    assert window.open_path(path), window.last_error
    s = window.session
    s.set_calibration(Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE,
                                  threshold_scope="per_frame"))
    assert "thresholds are fitted per frame" in window.status_label.text()
    window.reconstruct_all()
    window.flush()
    line = window.histogram_panel.threshold_line
    assert line.label.toPlainText().endswith("frame 0's own fit")
    assert line.value() == pytest.approx(s.frame_thresholds()[0], abs=1e-9)
    s.set_index(2)
    window.flush()
    assert line.label.toPlainText().endswith("frame 2's own fit")
    assert line.value() == pytest.approx(s.frame_thresholds()[2], abs=1e-9)
    assert s.frame_thresholds()[2] > 1.5 * s.frame_thresholds()[0]
    window.grab().save(str(tmp_path / "per_frame.png"))
    window.histogram_panel.grab().save(str(tmp_path / "per_frame_histogram.png"))
    s.set_threshold(70.0)
    window.flush()
    assert line.label.toPlainText() == "threshold 70.0"  # one fixed threshold for every frame
