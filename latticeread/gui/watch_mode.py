"""Live watch of a folder from the window: reconstruct each new frame file as it lands.

:class:`LiveWatchController` owns a :class:`latticeread.runs.watch.LiveRun` and advances it
from a timer. Every :meth:`LiveRun.step` (poll the folder, reconstruct the newly complete
files, append them to the run file) runs on ONE dedicated worker thread, so two steps never
overlap and the HDF5 run file is only ever touched from that thread. The results come back
to the GUI thread as Qt signals: the newest frame with its occupation matrix, filling and
lattice offset, a snapshot of the running statistics, and error messages (an exception
never escapes the worker).

:class:`LiveWatchPanel` shows the watched folder, the run file, start/stop buttons, counters
and trend plots of the filling and of the lattice offset (x, y) against the shot number.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from latticeread.gui.axes import IntegerAxis

__all__ = ["LiveShot", "LiveStats", "LiveWatchController", "LiveWatchPanel", "POLL_INTERVAL_MS"]

log = logging.getLogger(__name__)

#: Period of the folder poll (milliseconds). A file is handled on the second poll that sees it
#: unchanged, so a new file shows up 1-2 periods plus the reconstruction time after it is complete.
POLL_INTERVAL_MS = 200
#: Files handled per step at most; a longer backlog is worked off in back-to-back steps so
#: stop() and the window stay responsive.
FILES_PER_STEP = 4


@dataclass(frozen=True)
class LiveShot:
    """The newest reconstructed shot of a watch step, for the image pane and the panel.

    Attributes
    ----------
    source : str
        Frame file (absolute path).
    frame_index : int
        Frame within that file.
    shot_number : int
        Index of the shot in this watch, counted from 0 like frames.
    image : (H, W) ndarray
        The raw frame (counts).
    occupation : (rows, cols) ndarray of uint8
        1 occupied, 0 empty, 255 outside the region (lattice sites).
    filling : float
        Occupied / region sites.
    offset : (float, float)
        Lattice offset ``(x, y)`` of this shot in pixels.
    threshold : float
        Occupancy threshold (photons).
    warnings : tuple of str
        Reasons the shot may mislead.
    """

    source: str
    frame_index: int
    shot_number: int
    image: np.ndarray
    occupation: np.ndarray
    filling: float
    offset: tuple
    threshold: float
    warnings: tuple = ()


@dataclass(frozen=True)
class LiveStats:
    """Snapshot of the running statistics (safe to hand to the GUI thread).

    Attributes
    ----------
    n_shots, n_failed : int
        Shots written / shots or files failed in this watch.
    n_files : int
        Files handled (ready or broken).
    filling : (n_shots,) ndarray of float
        Filling fraction per written shot.
    offsets : (n_shots, 2) ndarray of float
        Lattice offset ``(x, y)`` in pixels per written shot.
    """

    n_shots: int
    n_failed: int
    n_files: int
    filling: np.ndarray
    offsets: np.ndarray

    @property
    def mean_filling(self) -> float:
        values = self.filling[np.isfinite(self.filling)]
        return float(values.mean()) if values.size else float("nan")


def _snapshot(live) -> LiveStats:
    stats = live.stats
    offsets = np.asarray(stats.offsets, dtype=float).reshape(-1, 2)
    return LiveStats(n_shots=stats.n_shots, n_failed=stats.n_failed, n_files=int(live.counts["files"]),
                     filling=np.asarray(stats.filling, dtype=float), offsets=offsets)


class _StepWorker(QtCore.QObject):
    """Lives on the watch thread; owns the LiveRun. Slots are called through queued signals."""

    opened = QtCore.Signal()
    stepped = QtCore.Signal(object, object, object, bool)  # LiveShot|None, LiveStats, [failure text], backlog
    failed = QtCore.Signal(str)
    closed = QtCore.Signal()

    def __init__(self):
        super().__init__()
        self.live = None

    @QtCore.Slot(object)
    def open(self, params: dict) -> None:
        from latticeread.runs.watch import LiveRun

        try:
            self.live = LiveRun(params["folder"], calibration=params["calibration"], out=params["out"],
                                include_existing=params["include_existing"],
                                give_up_polls=params["give_up_polls"])
        except Exception as exc:  # noqa: BLE001 - shown in the window, never uncaught
            self.live = None
            self.failed.emit(_message(exc))
            return
        self.opened.emit()

    @QtCore.Slot()
    def step(self) -> None:
        from latticeread.runs.batch import ShotFailure, _describe_failure

        live = self.live
        if live is None:
            return
        try:
            limit = live.counts["files"] + FILES_PER_STEP
            outcomes = live.step(max_files=limit)
            backlog = live.counts["files"] >= limit
            newest = None
            failures = []
            for outcome in outcomes:
                if isinstance(outcome, ShotFailure):
                    failures.append(_describe_failure(outcome))
                else:
                    newest = outcome
            shot = None
            if newest is not None:
                shot = LiveShot(source=newest.key.source, frame_index=int(newest.key.frame_index),
                                shot_number=live.stats.n_shots - 1, image=_read_frame(newest.key),
                                occupation=np.array(newest.occupation), filling=float(newest.filling),
                                offset=tuple(float(v) for v in newest.offset), threshold=float(newest.threshold),
                                warnings=tuple(newest.warnings))
            self.stepped.emit(shot, _snapshot(live), failures, backlog)
        except Exception as exc:  # noqa: BLE001 - e.g. the disk with the run file is full
            log.warning("watch step failed", exc_info=True)
            self.failed.emit(_message(exc))

    @QtCore.Slot()
    def close(self) -> None:
        live, self.live = self.live, None
        try:
            if live is not None:
                live.close()
        except Exception as exc:  # noqa: BLE001
            self.failed.emit(_message(exc))
        finally:
            self.closed.emit()
            # hand the object back to the GUI thread, which disconnects and deletes it
            app = QtCore.QCoreApplication.instance()
            if app is not None:
                self.moveToThread(app.thread())
            QtCore.QThread.currentThread().quit()


def _read_frame(key) -> np.ndarray:
    """The raw frame of a shot, read again from its (complete) file."""
    from latticeread.io import load_frames

    stack = load_frames(key.source)
    try:
        return np.array(stack[int(key.frame_index)])
    finally:
        stack.close()


def _message(exc: BaseException) -> str:
    from latticeread.errors import LatticeReadError

    if isinstance(exc, LatticeReadError):
        return str(exc)
    return f"{type(exc).__name__}: {exc}"


class LiveWatchController(QtCore.QObject):
    """Watch a folder and reconstruct new frame files off the GUI thread.

    Parameters
    ----------
    folder : str or PathLike
        Folder the camera writes to.
    calibration : Calibration
        Calibration used for every shot.
    out : str or PathLike
        Run file (HDF5) the shots are appended to (created, or resumed).
    interval_ms : int
        Poll period in milliseconds.
    include_existing : bool
        Also reconstruct files already in the folder when the watch starts.
    give_up_polls : int
        Polls after which a file that stays unchanged but unreadable counts as failed.

    Signals
    -------
    frameReady(LiveShot)
        The newest shot of a step (image, occupation matrix, filling, offset).
    statsChanged(LiveStats)
        Running statistics after every step that handled a file.
    shotFailed(str)
        One line per file or shot that could not be reconstructed.
    errorOccurred(str)
        The watch itself failed (cannot create the run file, disk full...); it stops.
    runningChanged(bool)
        Watch started / stopped.
    """

    frameReady = QtCore.Signal(object)
    statsChanged = QtCore.Signal(object)
    shotFailed = QtCore.Signal(str)
    errorOccurred = QtCore.Signal(str)
    runningChanged = QtCore.Signal(bool)

    _request_open = QtCore.Signal(object)
    _request_step = QtCore.Signal()
    _request_close = QtCore.Signal()

    def __init__(self, folder, *, calibration, out, interval_ms: int = POLL_INTERVAL_MS,
                 include_existing: bool = True, give_up_polls: int = 10, parent=None):
        super().__init__(parent)
        self.folder = Path(os.fspath(folder))
        self.out = Path(os.fspath(out))
        self.calibration = calibration
        self.include_existing = bool(include_existing)
        self.give_up_polls = int(give_up_polls)
        self.stats: LiveStats | None = None
        self.last_shot: LiveShot | None = None
        self.last_error: str | None = None
        self._thread: QtCore.QThread | None = None
        self._worker: _StepWorker | None = None
        self._links: list = []
        self._busy = False
        self._running = False
        self._timer = QtCore.QTimer(self)
        self._timer.setInterval(int(interval_ms))
        self._timer.timeout.connect(self._tick)

    # ------------------------------------------------------------------ control
    @property
    def is_running(self) -> bool:
        return self._running

    @property
    def timer_active(self) -> bool:
        return self._timer.isActive()

    def start(self) -> None:
        """Open (or resume) the run file on the watch thread and start polling."""
        if self._running:
            return
        from latticeread.gui.workers import import_core

        import_core()  # scipy & co. imported on the GUI thread, never first on the worker
        import latticeread.runs.watch  # noqa: F401

        self.last_error = None
        self._thread = QtCore.QThread(self)
        self._thread.setObjectName("latticeread-watch")
        self._worker = _StepWorker()
        self._worker.moveToThread(self._thread)
        self._links = [(self._request_open, self._worker.open), (self._request_step, self._worker.step),
                       (self._request_close, self._worker.close)]
        for sig, slot in self._links:
            sig.connect(slot)
        self._worker.opened.connect(self._on_opened)
        self._worker.stepped.connect(self._on_stepped)
        self._worker.failed.connect(self._on_failed)
        self._thread.start()
        self._busy = True  # until the run file is open
        self._running = True
        self.runningChanged.emit(True)
        self._request_open.emit({"folder": self.folder, "calibration": self.calibration, "out": self.out,
                                 "include_existing": self.include_existing,
                                 "give_up_polls": self.give_up_polls})

    def stop(self, *, wait_ms: int = 30000) -> bool:
        """Stop polling, let a running step finish, close the run file.

        Returns
        -------
        bool
            True when the watch thread ended within ``wait_ms`` milliseconds.
        """
        self._timer.stop()
        thread, self._thread = self._thread, None
        if thread is None:
            return True
        self._request_close.emit()  # queued after any pending step; quits the thread
        ok = thread.wait(int(wait_ms))
        if ok:
            thread.deleteLater()
        else:
            log.warning("the watch thread did not finish within %d ms", wait_ms)
        if ok:
            for sig, slot in self._links:
                sig.disconnect(slot)
            self._worker.deleteLater()
        self._links = []
        self._worker = None
        self._busy = False
        if self._running:
            self._running = False
            self.runningChanged.emit(False)
        return bool(ok)

    # ------------------------------------------------------------------ GUI-thread slots
    def _tick(self) -> None:
        if self._busy or self._worker is None:
            return  # one step at a time
        self._busy = True
        self._request_step.emit()

    @QtCore.Slot()
    def _on_opened(self) -> None:
        self._busy = False
        if self._thread is None:
            return  # stopped meanwhile
        self._timer.start()
        self._tick()

    @QtCore.Slot(object, object, object, bool)
    def _on_stepped(self, shot, stats, failures, backlog) -> None:
        self._busy = False
        changed = self.stats is None or stats.n_files != self.stats.n_files
        self.stats = stats
        for line in failures:
            self.shotFailed.emit(line)
        if shot is not None:
            self.last_shot = shot
            self.frameReady.emit(shot)
        if changed:
            self.statsChanged.emit(stats)
        if backlog and self._timer.isActive():
            self._tick()  # more files waiting: next step right away

    @QtCore.Slot(str)
    def _on_failed(self, message: str) -> None:
        self.last_error = message
        self.errorOccurred.emit(message)
        self._busy = False
        if self._thread is not None:
            self.stop()


def _fmt(value: float, spec: str = ".3f") -> str:
    return "-" if value is None or not np.isfinite(value) else format(value, spec)


class LiveWatchPanel(QtWidgets.QWidget):
    """Folder, run file, start/stop, counters and trend plots of a live watch.

    Signals
    -------
    startRequested, stopRequested
        The user pressed the buttons (the panel also drives an attached controller itself).
    """

    startRequested = QtCore.Signal()
    stopRequested = QtCore.Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        self.controller: LiveWatchController | None = None
        self._n_failed_lines = 0
        layout = QtWidgets.QVBoxLayout(self)
        form = QtWidgets.QFormLayout()
        self.folder_label = QtWidgets.QLabel("-")
        self.folder_label.setToolTip("Folder watched for new frame files (TIFF, HDF5, NumPy)")
        self.folder_label.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        self.out_label = QtWidgets.QLabel("-")
        self.out_label.setToolTip("HDF5 run file every reconstructed shot is appended to "
                                  "(resumed if it exists: frames already in it are skipped)")
        self.out_label.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        for label in (self.folder_label, self.out_label):
            label.setWordWrap(True)
        for name, widget in (("Folder", self.folder_label), ("Run file", self.out_label)):
            title = QtWidgets.QLabel(name)
            title.setToolTip(widget.toolTip())
            form.addRow(title, widget)
        layout.addLayout(form)

        buttons = QtWidgets.QHBoxLayout()
        self.start_button = QtWidgets.QPushButton("Start")
        self.start_button.setToolTip("Start watching: each new complete file is reconstructed and appended "
                                     "to the run file")
        self.stop_button = QtWidgets.QPushButton("Stop")
        self.stop_button.setToolTip("Stop watching; the run file is closed and stays readable")
        self.start_button.clicked.connect(self._start_clicked)
        self.stop_button.clicked.connect(self._stop_clicked)
        buttons.addWidget(self.start_button)
        buttons.addWidget(self.stop_button)
        buttons.addStretch(1)
        layout.addLayout(buttons)

        counts = QtWidgets.QGridLayout()
        self.state_label = QtWidgets.QLabel("idle")
        self.state_label.setToolTip("Whether the folder is being watched")
        self.shots_label = QtWidgets.QLabel("0")
        self.shots_label.setToolTip("Frames reconstructed and written in this watch")
        self.failed_label = QtWidgets.QLabel("0")
        self.failed_label.setToolTip("Files or frames that could not be reconstructed (recorded in the run file "
                                     "with the reason)")
        self.filling_label = QtWidgets.QLabel("-")
        self.filling_label.setToolTip("Filling of the newest frame and the mean over this watch "
                                      "(occupied sites / sites in the region)")
        self.offset_label = QtWidgets.QLabel("-")
        self.offset_label.setToolTip("Lattice offset (x, y) of the newest frame in pixels")
        for row, (name, widget) in enumerate((("State", self.state_label), ("Frames done", self.shots_label),
                                              ("Failed", self.failed_label), ("Filling", self.filling_label),
                                              ("Offset", self.offset_label))):
            title = QtWidgets.QLabel(name)
            title.setToolTip(widget.toolTip())
            counts.addWidget(title, row, 0)
            counts.addWidget(widget, row, 1)
        counts.setColumnStretch(1, 1)
        layout.addLayout(counts)

        self.filling_plot = pg.PlotWidget(axisItems={"bottom": IntegerAxis("bottom")})
        self.filling_plot.setToolTip("Filling fraction of every shot of this watch against the shot number")
        self.filling_plot.setLabel("left", "filling")
        self.filling_plot.setLabel("bottom", "shot")
        self.filling_plot.showGrid(x=True, y=True, alpha=0.3)
        self.filling_curve = self.filling_plot.plot([], [], pen=pg.mkPen("#1f77b4", width=1.5), symbol="o",
                                                    symbolSize=5, symbolBrush="#1f77b4", name="filling")
        self.offset_plot = pg.PlotWidget(axisItems={"bottom": IntegerAxis("bottom")})
        self.offset_plot.setToolTip("Lattice offset x and y (pixels) of every shot against the shot number: "
                                    "a drifting phase shows up here")
        self.offset_plot.setLabel("left", "offset (px)")
        self.offset_plot.setLabel("bottom", "shot")
        self.offset_plot.showGrid(x=True, y=True, alpha=0.3)
        self.offset_plot.addLegend(offset=(-5, 5), colCount=2)
        self.offset_x_curve = self.offset_plot.plot([], [], pen=pg.mkPen("#d62728", width=1.5), symbol="o",
                                                    symbolSize=4, symbolBrush="#d62728", name="x")
        self.offset_y_curve = self.offset_plot.plot([], [], pen=pg.mkPen("#2ca02c", width=1.5), symbol="t",
                                                    symbolSize=4, symbolBrush="#2ca02c", name="y")
        for plot in (self.filling_plot, self.offset_plot):
            plot.getAxis("left").enableAutoSIPrefix(False)  # fractions and pixels, never "x0.001"
            plot.setMinimumHeight(140)
            plot.setBackground("w")
            layout.addWidget(plot, 1)

        self.message_label = QtWidgets.QLabel("")
        self.message_label.setToolTip("Last failure or error of the watch")
        self.message_label.setWordWrap(True)
        layout.addWidget(self.message_label)
        self._update_buttons()

    # ------------------------------------------------------------------ binding
    def attach(self, controller: LiveWatchController | None) -> None:
        """Show ``controller`` (the previous one is disconnected, not stopped)."""
        old, self.controller = self.controller, controller
        if old is not None:
            for sig, slot in self._slots(old):
                try:
                    sig.disconnect(slot)
                except (RuntimeError, TypeError):
                    pass
        self.clear()
        if controller is not None:
            self.folder_label.setText(str(controller.folder))
            self.out_label.setText(str(controller.out))
            for sig, slot in self._slots(controller):
                sig.connect(slot)
        self._update_buttons()

    def _slots(self, c: LiveWatchController):
        return ((c.frameReady, self.show_shot), (c.statsChanged, self.show_stats),
                (c.shotFailed, self.show_failure), (c.errorOccurred, self.show_error),
                (c.runningChanged, self._running_changed))

    def clear(self) -> None:
        self.folder_label.setText("-")
        self.out_label.setText("-")
        self.shots_label.setText("0")
        self.failed_label.setText("0")
        self.filling_label.setText("-")
        self.offset_label.setText("-")
        self.message_label.setText("")
        for curve in (self.filling_curve, self.offset_x_curve, self.offset_y_curve):
            curve.setData([], [])

    # ------------------------------------------------------------------ display
    def show_stats(self, stats: LiveStats) -> None:
        self.shots_label.setText(str(stats.n_shots))
        self.failed_label.setText(str(stats.n_failed))
        shots = np.arange(stats.n_shots)  # numbered from 0, like frames
        self.filling_curve.setData(shots, stats.filling)
        if stats.n_shots:
            self.offset_x_curve.setData(shots, stats.offsets[:, 0])
            self.offset_y_curve.setData(shots, stats.offsets[:, 1])
            self.filling_label.setText(f"{_fmt(stats.filling[-1])} (mean {_fmt(stats.mean_filling)})")
            self.offset_label.setText(f"({stats.offsets[-1, 0]:.2f}, {stats.offsets[-1, 1]:.2f}) px")

    def show_shot(self, shot: LiveShot) -> None:
        name = Path(shot.source).name
        text = f"shot {shot.shot_number}: {name}[{shot.frame_index}]"
        if shot.warnings:
            text += f"; warning: {shot.warnings[0]}"
        self.message_label.setText(text)

    def show_failure(self, line: str) -> None:
        self.message_label.setText(f"failed: {line}")

    def show_error(self, message: str) -> None:
        self.message_label.setText(f"error: {message}")

    def _running_changed(self, running: bool) -> None:
        self.state_label.setText("watching" if running else "stopped")
        self._update_buttons()

    def _update_buttons(self) -> None:
        running = self.controller is not None and self.controller.is_running
        self.start_button.setEnabled(self.controller is not None and not running)
        self.stop_button.setEnabled(running)

    def _start_clicked(self) -> None:
        self.startRequested.emit()
        if self.controller is not None and not self.controller.is_running:
            self.controller.start()

    def _stop_clicked(self) -> None:
        self.stopRequested.emit()
        if self.controller is not None:
            self.controller.stop()
