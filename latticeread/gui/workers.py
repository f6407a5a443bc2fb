"""Run long computations off the GUI thread, one task per key, with cancel.

A task function takes one argument, ``should_stop`` (a callable returning True once the task
was cancelled), and either returns a value or is a generator whose yielded items are passed
to the GUI thread one by one (for progress and partial results). Starting a task under a key
that is still running cancels the older one: its later output is dropped, so a stale request
can never overwrite a newer answer.

Callbacks (``on_yield``, ``on_result``, ``on_error``, ``on_end``) always run on the GUI thread.
With ``WorkerPool(synchronous=True)`` everything runs in the caller's thread (tests).
"""

from __future__ import annotations

import inspect
import logging
import threading
from typing import Callable

from PySide6 import QtCore

__all__ = ["Task", "WorkerPool", "import_core", "CORE_MODULES"]

log = logging.getLogger(__name__)


#: Core modules the background tasks use. They are imported on the GUI thread before the first
#: task starts: importing them (scipy...) in a worker thread while the Qt binding's import
#: hook runs on another thread has crashed the process.
CORE_MODULES = ("latticeread.core.pipeline", "latticeread.core.lattice", "latticeread.core.classify",
                "latticeread.core.psf_estimate", "latticeread.core.fidelity", "latticeread.core.psf",
                "latticeread.io")


def import_core() -> None:
    """Import every core module a background task may need (GUI thread, once)."""
    import gc
    import importlib

    for name in CORE_MODULES:
        importlib.import_module(name)
    if gc.get_freeze_count() == 0:
        # Move the objects alive now (modules, classes, Qt wrappers: hundreds of thousands)
        # out of the collector's reach, once per process: a full collection then no longer
        # walks them, which paused the GUI thread for 60-150 ms at random moments.
        gc.freeze()


class Task(QtCore.QObject):
    """One unit of background work; emits its output on the thread that created it."""

    _yielded = QtCore.Signal(object)
    _returned = QtCore.Signal(object)
    _failed = QtCore.Signal(object)
    ended = QtCore.Signal()

    def __init__(self, key: str, fn: Callable, *, on_yield=None, on_result=None, on_error=None, on_end=None,
                 parent=None):
        super().__init__(parent)
        self.key = key
        self._fn = fn
        self._cancel = threading.Event()
        self._callbacks = {"yield": on_yield, "result": on_result, "error": on_error, "end": on_end}
        self.is_running = False
        self.is_finished = False
        self._yielded.connect(self._deliver_yield)
        self._returned.connect(self._deliver_result)
        self._failed.connect(self._deliver_error)

    # --- control (GUI thread) ------------------------------------------------------
    def cancel(self) -> None:
        """Ask the task to stop; output arriving afterwards is dropped."""
        self._cancel.set()

    @property
    def cancelled(self) -> bool:
        return self._cancel.is_set()

    def should_stop(self) -> bool:
        return self._cancel.is_set()

    # --- body (worker thread) --------------------------------------------------------
    def execute(self) -> None:
        try:
            out = self._fn(self.should_stop)
            if inspect.isgenerator(out):
                for item in out:
                    if self._cancel.is_set():
                        out.close()
                        break
                    self._yielded.emit(item)
                out = None
            self._returned.emit(out)
        except BaseException as exc:  # noqa: BLE001 - reported to the GUI, never lost
            self._failed.emit(exc)

    # --- delivery (GUI thread) --------------------------------------------------------
    @QtCore.Slot(object)
    def _deliver_yield(self, item) -> None:
        cb = self._callbacks["yield"]
        if cb is not None and not self._cancel.is_set():
            cb(item)

    @QtCore.Slot(object)
    def _deliver_result(self, value) -> None:
        cb = self._callbacks["result"]
        try:
            if cb is not None and not self._cancel.is_set():
                cb(value)
        finally:
            self._finish()

    @QtCore.Slot(object)
    def _deliver_error(self, exc) -> None:
        cb = self._callbacks["error"]
        try:
            if self._cancel.is_set():
                log.debug("cancelled task %s ended with %r", self.key, exc)
            elif cb is not None:
                cb(exc)
            else:
                log.error("background task %s failed: %r", self.key, exc)
        finally:
            self._finish()

    def _finish(self) -> None:
        self.is_running = False
        self.is_finished = True
        cb = self._callbacks["end"]
        if cb is not None:
            cb()
        self.ended.emit()


class _Runnable(QtCore.QRunnable):
    def __init__(self, task: Task):
        super().__init__()
        self.task = task
        self.setAutoDelete(True)

    def run(self) -> None:
        self.task.execute()


class WorkerPool(QtCore.QObject):
    """Submit tasks by key; a new task under a running key cancels the old one.

    Parameters
    ----------
    synchronous : bool
        Run every task immediately in the caller's thread (for tests).
    max_threads : int, optional
        Size of the private thread pool (default: 2).
    before_start : callable, optional
        Called once on the submitting (GUI) thread before the first task starts, e.g. to
        import modules there rather than in a worker thread.
    """

    busy_changed = QtCore.Signal(bool)

    def __init__(self, *, synchronous: bool = False, max_threads: int = 2, before_start=None, parent=None):
        super().__init__(parent)
        self.synchronous = synchronous
        self._before_start = before_start
        self._pool = QtCore.QThreadPool(self)
        self._pool.setMaxThreadCount(max(1, int(max_threads)))
        self._tasks: dict[str, Task] = {}

    def submit(self, key: str, fn: Callable, *, on_yield=None, on_result=None, on_error=None,
               on_end=None) -> Task:
        """Start ``fn(should_stop)`` under ``key``; cancels a running task with the same key."""
        if self._before_start is not None:
            hook, self._before_start = self._before_start, None
            hook()
        old = self._tasks.get(key)
        if old is not None and not old.is_finished:
            old.cancel()
        task = Task(key, fn, on_yield=on_yield, on_result=on_result, on_error=on_error, on_end=on_end,
                    parent=self)
        task.ended.connect(lambda t=task: self._task_ended(t))
        self._tasks[key] = task
        task.is_running = True
        self.busy_changed.emit(True)
        if self.synchronous:
            task.execute()  # signals are delivered directly: same thread
        else:
            self._pool.start(_Runnable(task))
        return task

    def _task_ended(self, task: Task) -> None:
        if self._tasks.get(task.key) is task:
            del self._tasks[task.key]
        task.deleteLater()
        if not self.busy:
            self.busy_changed.emit(False)

    @property
    def busy(self) -> bool:
        return any(not t.is_finished for t in self._tasks.values())

    def running(self, key: str) -> Task | None:
        t = self._tasks.get(key)
        return t if t is not None and not t.is_finished else None

    def cancel(self, key: str | None = None) -> None:
        """Cancel the task under ``key`` (or every task)."""
        for k, t in list(self._tasks.items()):
            if key is None or k == key:
                t.cancel()

    def wait(self, msecs: int = 30000) -> bool:
        """Block until the thread pool is idle (tests, shutdown). Delivery still needs the event loop."""
        return self._pool.waitForDone(msecs)

    def shutdown(self) -> None:
        self.cancel()
        self._pool.waitForDone(10000)
