"""Stopping a run at once: Ctrl-C abandons the shots in flight instead of waiting for them.

A worker can be seconds into its first shot (building its analyser on a busy machine) when
Ctrl-C comes; waiting for it made an interrupted batch end up to 4 s after the signal. The
shots in flight are thrown away anyway (never written), so the workers are terminated.
Reference for the pool's behaviour: the Python documentation of
concurrent.futures.ProcessPoolExecutor (shutdown waits for running calls).

A Ctrl-C that lands in a ``__del__`` method or a weakref callback raises its KeyboardInterrupt
there, and Python drops it ("Exception ignored in", the Python documentation of
``object.__del__``); the run still stops, because the handler also remembers the request
and the run loop looks at it between shots.
"""

from __future__ import annotations

import multiprocessing
import time
from collections import deque
from concurrent.futures import ProcessPoolExecutor

import pytest

from latticeread.analysis.executor import PoolExecutor


def _pool_with(task_seconds: float):
    ex = PoolExecutor.__new__(PoolExecutor)  # the real close(), around a pool running a long call
    ex._pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"))
    future = ex._pool.submit(time.sleep, task_seconds)
    ex._futures, ex._ready = {future: (0, None)}, deque()
    while not ex._pool._processes:
        time.sleep(0.01)
    return ex, future, list(ex._pool._processes.values())


def test_cancel_ends_the_workers_without_waiting_for_the_running_call():
    ex, future, processes = _pool_with(20.0)
    while future.running() is False:  # the call has started in the worker
        time.sleep(0.01)
    started = time.monotonic()
    ex.close(cancel=True)
    # the workers were terminated: they are gone at once, though the kernel may take a moment to
    # reap them on a busy machine (allowed: 10 s, half the 20 s call a waiting close would sit out)
    while any(p.is_alive() for p in processes) and time.monotonic() - started < 10:
        time.sleep(0.05)
    assert not any(p.is_alive() for p in processes)
    # a close that waited would have let the 20 s call finish normally
    assert not future.done() or future.exception(timeout=5) is not None
    assert ex.pending == 0


def test_without_pending_calls_the_pool_ends_normally():
    ex, future, processes = _pool_with(0.0)
    future.result(timeout=30)
    ex._futures.clear()  # handed back
    ex.close(cancel=True)
    assert future.exception() is None and not any(p.is_alive() for p in processes)


class _SendsCtrlCWhenCollected:
    """An object whose clean-up (a ``__del__``, as in h5py or the pool's weakref callbacks) is
    where Ctrl-C lands: Python drops the KeyboardInterrupt raised there ("Exception ignored in")."""

    def __del__(self):
        import os
        import signal

        os.kill(os.getpid(), signal.SIGINT)
        for _ in range(1000):  # the handler runs here, inside __del__
            pass


@pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")
def test_a_ctrl_c_swallowed_inside_a_clean_up_still_stops_the_batch(tmp_path, monkeypatch):
    import latticeread.analysis.executor as executor
    from latticeread.io.run_file import read_run
    from latticeread.runs.batch import run_batch

    from test_batch import make_dataset

    cal, _, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=4, seed=11)
    real_run_task = executor.run_task
    calls = []

    def run_task(analyser, task):
        calls.append(task)
        if len(calls) == 2:
            _SendsCtrlCWhenCollected()  # collected at once: the Ctrl-C is raised and dropped in __del__
        return real_run_task(analyser, task)

    monkeypatch.setattr(executor, "run_task", run_task)
    with pytest.raises(KeyboardInterrupt):
        run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "run.h5", workers=0, progress=False)
    assert len(calls) < 4, "the run went on to the end after Ctrl-C"
    monkeypatch.undo()
    assert len(read_run(tmp_path / "run.h5")) <= 2  # readable; the shots done before the stop at most
    run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "run.h5", workers=0, progress=False)
    run = read_run(tmp_path / "run.h5")
    assert sorted(run.frame_index.tolist()) == list(range(4))  # resumed: every frame once
