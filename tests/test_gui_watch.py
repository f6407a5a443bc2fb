"""The window's live watch mode: a new frame file reaches the panel and the image pane.

References outside the project: the frame the controller delivers is compared with what
tifffile reads from the same file; the occupation and lattice offset of the shot are compared
with the simulation truth written beside the demo stack (latticeread's forward model, truth
file read with h5py); the run file is read back with latticeread.io.read_run (h5py).
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

pytest.importorskip("pytestqt")

from latticeread.gui.watch_mode import LiveWatchController, LiveWatchPanel  # noqa: E402
from latticeread.io import load_calibration, read_run  # noqa: E402
from latticeread.io.truth_file import read_truth  # noqa: E402

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"
STACK = SAMPLE / "demo_square.tif"


@pytest.fixture(scope="module")
def demo():
    frames = tifffile.imread(STACK)
    calibration = load_calibration(SAMPLE / "demo_square.calibration.json")
    truth = read_truth(SAMPLE / "demo_square.truth.h5")
    return frames, calibration, truth


def _write_atomically(path: Path, image: np.ndarray) -> None:
    """Write like a camera program should: a hidden temp name, then an atomic rename."""
    tmp = path.with_name("." + path.name + ".part")
    tifffile.imwrite(tmp, image)
    os.replace(tmp, path)


def _controller(qtbot, tmp_path, calibration, request, **kw):
    folder = tmp_path / "camera"
    folder.mkdir()
    out = tmp_path / "run.h5"
    controller = LiveWatchController(folder, calibration=calibration, out=out, **kw)
    request.addfinalizer(controller.stop)  # also when an assertion fails mid-test
    panel = LiveWatchPanel()
    qtbot.addWidget(panel)
    panel.attach(controller)
    frames_seen, errors = [], []
    controller.frameReady.connect(frames_seen.append)
    controller.errorOccurred.connect(errors.append)
    return controller, panel, folder, out, frames_seen, errors


def _started(qtbot, controller):
    controller.start()
    # the run file is created and the reconstructor built on the watch thread first
    qtbot.waitUntil(lambda: controller.timer_active, timeout=20000)


def test_new_file_reaches_panel_and_frame_signal(qtbot, tmp_path, demo, request):
    frames, calibration, truth = demo
    controller, panel, folder, out, frames_seen, errors = _controller(qtbot, tmp_path, calibration, request)
    _started(qtbot, controller)
    qtbot.wait(300)  # a few empty polls: nothing there, nothing reported
    assert panel.shots_label.text() == "0" and not frames_seen and not errors

    delivered_at = []
    controller.statsChanged.connect(lambda _s: delivered_at.append(time.perf_counter()))
    _write_atomically(folder / "shot_0000.tif", frames[0])
    written_at = time.perf_counter()
    # the watch updates the image and the trend plots (latency printed; its 1 s target is a bench
    # number, bench/bench_watch_latency.py: a loaded machine may take longer here)
    qtbot.waitUntil(lambda: panel.shots_label.text() == "1" and len(frames_seen) == 1, timeout=10000)
    latency = delivered_at[0] - written_at
    print(f"\nwatch latency (256x256 frame, 200 ms poll): {latency * 1000:.0f} ms")

    shot = frames_seen[0]
    reference = tifffile.imread(folder / "shot_0000.tif")
    np.testing.assert_array_equal(shot.image, reference)
    assert shot.frame_index == 0 and Path(shot.source).name == "shot_0000.tif"
    xs, ys = panel.filling_curve.getData()
    np.testing.assert_array_equal(xs, [0])  # shots are numbered from 0
    assert ys[0] == pytest.approx(shot.filling)
    ox, oy = panel.offset_x_curve.getData()[1], panel.offset_y_curve.getData()[1]
    assert (ox[0], oy[0]) == pytest.approx(shot.offset)

    # against the simulation truth of frame 0: atom count and lattice phase. Atoms lost during
    # the exposure still scattered light, so the image shows the occupation at its start.
    true_atoms = int(np.count_nonzero(truth["initial_occupation"][0] == 1))
    found = int(np.count_nonzero(shot.occupation == 1))
    assert abs(found - true_atoms) <= max(3, 0.005 * true_atoms), (found, true_atoms)
    a = np.array([calibration.geometry.a1, calibration.geometry.a2]).T
    frac = np.linalg.solve(a, np.subtract(shot.offset, truth["frame_offset"][0]))
    residual_px = a @ (frac - np.round(frac))
    assert np.hypot(*residual_px) < 0.1

    assert controller.stop()
    assert not controller.timer_active and not controller.is_running
    assert panel.state_label.text() == "stopped" and panel.start_button.isEnabled()
    run = read_run(out)
    assert len(run) == 1
    assert run.filling[0] == pytest.approx(shot.filling)
    np.testing.assert_array_equal(run.occupation[0], shot.occupation)
    assert not errors


def test_broken_file_counts_as_failed_and_watch_goes_on(qtbot, tmp_path, demo, request):
    frames, calibration, _truth = demo
    controller, panel, folder, out, frames_seen, errors = _controller(qtbot, tmp_path, calibration, request,
                                                                      give_up_polls=3)
    failures = []
    controller.shotFailed.connect(failures.append)
    _started(qtbot, controller)
    good = tifffile.imwrite(folder / ".tmp.tif", frames[1]) or (folder / ".tmp.tif").read_bytes()
    (folder / ".tmp.tif").unlink()
    (folder / "broken.tif").write_bytes(good[: len(good) // 3])  # a TIFF cut off mid-frame
    qtbot.waitUntil(lambda: panel.failed_label.text() == "1", timeout=5000)
    assert failures and "broken.tif" in failures[0]
    assert panel.message_label.text().startswith("failed:")
    assert controller.timer_active  # still watching

    _write_atomically(folder / "next.tif", frames[1])
    qtbot.waitUntil(lambda: panel.shots_label.text() == "1", timeout=10000)
    np.testing.assert_array_equal(frames_seen[-1].image, frames[1])
    assert controller.stop()
    run = read_run(out)
    assert len(run) == 1 and len(run.failures) == 1
    assert Path(str(run.failures.source[0])).name == "broken.tif"
    assert not errors


def test_unwritable_run_file_becomes_an_error_signal(qtbot, tmp_path, demo, request):
    _frames, calibration, _truth = demo
    folder = tmp_path / "camera"
    folder.mkdir()
    controller = LiveWatchController(folder, calibration=calibration, out=tmp_path / "missing_dir" / "run.h5")
    request.addfinalizer(controller.stop)
    panel = LiveWatchPanel()
    qtbot.addWidget(panel)
    panel.attach(controller)
    with qtbot.waitSignal(controller.errorOccurred, timeout=20000) as blocker:
        controller.start()
    assert "run.h5" in blocker.args[0] or "missing_dir" in blocker.args[0]
    qtbot.waitUntil(lambda: not controller.is_running, timeout=10000)
    assert not controller.timer_active
    assert panel.message_label.text().startswith("error:")
    assert panel.start_button.isEnabled() and not panel.stop_button.isEnabled()


def test_every_panel_control_has_a_tooltip(qtbot):
    from PySide6 import QtWidgets

    panel = LiveWatchPanel()
    qtbot.addWidget(panel)
    controls = panel.findChildren(QtWidgets.QAbstractButton) + [panel.filling_plot, panel.offset_plot]
    labels = [w for w in panel.findChildren(QtWidgets.QLabel) if w.text()]
    missing = [w.text() if hasattr(w, "text") else type(w).__name__ for w in controls + labels if not w.toolTip()]
    assert not missing


def _window(qtbot, tmp_path):
    from latticeread.gui.app import make_app
    from latticeread.gui.main_window import MainWindow
    from latticeread.gui.settings import AppSettings

    make_app()
    window = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                        autosave_interval_s=0)
    qtbot.addWidget(window)
    window.show()
    qtbot.waitExposed(window)
    return window


def test_window_watch_needs_a_calibration(qtbot, tmp_path):
    window = _window(qtbot, tmp_path)
    action = window.actions_by_name["watch"]
    assert action.toolTip()
    from PySide6 import QtWidgets

    analysis = [m for m in window.menuBar().findChildren(QtWidgets.QMenu) if m.title() == "&Analysis"][0]
    assert action in analysis.actions()
    action.trigger()  # no calibration: no dialog, a status message
    assert window.status_label.text().startswith("calibrate first")
    assert not window.start_watch(tmp_path, tmp_path / "run.h5")
    assert "watch" not in window.docks


def test_window_shows_each_new_file_in_the_image_pane(qtbot, tmp_path, demo, request):
    frames, _calibration, _truth = demo
    window = _window(qtbot, tmp_path)
    assert window.open_path(STACK), window.last_error  # its calibration loads from the sidecar JSON
    assert window.session.calibration is not None
    window.flush()
    folder = tmp_path / "camera"
    folder.mkdir()
    out = tmp_path / "live.h5"
    assert window.start_watch(folder, out)
    request.addfinalizer(window.stop_watch)
    panel, controller = window.watch_panel, window.watch_controller
    assert window.docks["watch"].isVisible()
    qtbot.waitUntil(lambda: controller.timer_active, timeout=20000)

    for n, index in enumerate((5, 2), start=1):
        _write_atomically(folder / f"live_{n:03d}.tif", frames[index])
        qtbot.waitUntil(lambda n=n: panel.shots_label.text() == str(n), timeout=10000)
        qtbot.waitUntil(lambda i=index: window.image_pane._image is not None
                        and np.array_equal(window.image_pane._image, frames[i]), timeout=10000)
        # live frames are numbered from 0, like the frames of a stack
        assert window.status_label.text().startswith(f"live frame {n - 1} ")
        assert f"live_{n:03d}.tif[0]" in window.status_label.text()
        # site markers of the live shot: its occupied sites, at its lattice phase
        shot = controller.last_shot
        assert window.image_pane.marker_counts["occupied"] == int(np.count_nonzero(shot.occupation == 1))
    xs = panel.filling_curve.getData()[0]
    assert list(xs) == [0, 1]
    # the grid follows the phase of the newest shot
    assert window.image_pane._geometry.offset == pytest.approx(controller.last_shot.offset)
    # frame stepping goes through the shots of the watch
    assert window.image_pane.count_label.text() == "of 2"
    window.actions_by_name["prev"].trigger()
    assert np.array_equal(window.image_pane._image, frames[5])
    assert window.image_pane.spin.value() == 0
    window.actions_by_name["next"].trigger()
    assert np.array_equal(window.image_pane._image, frames[2])

    window.close()  # closing the window stops the watch and closes the run file
    assert not controller.is_running and not controller.timer_active
    assert len(read_run(out)) == 2
