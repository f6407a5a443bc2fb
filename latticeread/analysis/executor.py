"""Where frames are reconstructed: this process, a pool of worker processes, or a Dask cluster.

One layer serves the window's session and batch runs. Every executor takes tasks with
:meth:`submit` ``(index, task)`` and hands back ``(index, outcome)`` with :meth:`next_done`
(in completion order), and is closed with :meth:`close`. A task is either a
:class:`~latticeread.io.run_file.ShotKey` (a frame of a file; the outcome is a ShotRecord
or ShotFailure) or an :class:`ImageTask` (frames in memory; the outcome is a list of
amplitude rows, :meth:`FrameAnalyser.extract`).

Every worker builds its :class:`~latticeread.analysis.service.FrameAnalyser` once per
calibration (cached under the digest of the calibration's JSON) and runs BLAS on one thread
(:class:`PoolExecutor` also sets the BLAS environment variables before it starts workers), so
a shot gives bit-identical amplitudes whichever executor ran it.

Dask (:class:`DaskExecutor`, optional extra ``latticeread[cluster]``): two settings decide the
throughput on a small machine (measured with ``bench/bench_batch.py``, 1,000 frames of
512x512 on 2 cores):

* Several shots per task: every Dask task costs the scheduler, the client and the worker
  about a millisecond of CPU each, comparable to a 10 ms shot, on the same cores.
* Dask starts its worker processes with ``MALLOC_TRIM_THRESHOLD_=65536``. Setting it turns
  off glibc's adaptive mmap threshold, so every array above 128 KiB (a 512x512 frame is
  2 MiB) is mapped and unmapped afresh, with page faults on every touch: the same shot
  took 20 ms of worker CPU instead of 14 ms. The LocalCluster started here leaves the
  variable unset; for workers of your own cluster, set
  ``distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_: null`` in their Dask
  configuration.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import multiprocessing
import os
import signal
from collections import deque
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass

import numpy as np

from latticeread.analysis.service import FrameAnalyser, ShotFailure
from latticeread.errors import CalibrationError, ClusterError, ReconstructionError

__all__ = ["ImageTask", "SerialExecutor", "PoolExecutor", "DaskExecutor", "make_executor", "calibration_digest",
           "worker_analyser", "import_distributed", "dask_shots_task"]

log = logging.getLogger(__name__)

_BLAS_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


@dataclass(frozen=True)
class ImageTask:
    """Frames in memory to reconstruct (amplitudes only; the caller classifies).

    Attributes
    ----------
    indices : tuple of int
        Frame indices in the caller's stack.
    images : (n, H, W) ndarray
        The frames in counts.
    name : str
        Stack name for error messages.
    """

    indices: tuple
    images: np.ndarray
    name: str = "the stack"


def calibration_digest(calibration_json: str) -> str:
    """Short hex digest identifying a calibration text (worker caches are keyed by it)."""
    return hashlib.blake2b(calibration_json.encode("utf-8"), digest_size=16).hexdigest()


# Per-process cache of worker analysers. It is only filled inside worker processes (pool
# initializer, Dask tasks) and by SerialExecutor: building the factorisation once per
# process is the point.
_WORKER_CACHE: dict[str, FrameAnalyser] = {}
_WORKER_INIT_ERROR: dict[str, str] = {}


def worker_analyser(calibration_json: str | None, digest: str) -> FrameAnalyser:
    """The worker process's analyser for a calibration, built on first use.

    Raises
    ------
    CalibrationError
        The analyser cannot be built from this calibration (the same message in every
        worker; the run stops instead of failing every shot).
    """
    rec = _WORKER_CACHE.get(digest)
    if rec is None:
        if digest in _WORKER_INIT_ERROR:
            raise CalibrationError(_WORKER_INIT_ERROR[digest])
        if calibration_json is None:
            raise ReconstructionError("this worker process was started without a calibration")
        for old in _WORKER_CACHE.values():
            old.close()
        _WORKER_CACHE.clear()
        try:
            rec = _WORKER_CACHE[digest] = FrameAnalyser(calibration_json)
        except Exception as exc:  # noqa: BLE001 - reported to the main process by every task
            _WORKER_INIT_ERROR[digest] = f"the calibration cannot be used for reconstruction: {exc}"
            raise CalibrationError(_WORKER_INIT_ERROR[digest]) from exc
    return rec


def run_task(analyser: FrameAnalyser, task):
    """One task's outcome: a ShotRecord/ShotFailure for a ShotKey, amplitude rows for an ImageTask."""
    if isinstance(task, ImageTask):
        return [analyser.extract(i, image, where=f"frame {i} of {task.name}")
                for i, image in zip(task.indices, task.images)]
    return analyser(task)


def _init_pool_worker(calibration_json: str, digest: str, niceness: int) -> None:
    # Ctrl-C in the terminal reaches the whole process group; the main process alone
    # handles it (cancels pending shots, waits for running ones, closes the run file).
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # A worker never outlives the run, even when the run is killed with SIGKILL.
    from latticeread.runs.stopping import die_with_parent

    die_with_parent()
    if niceness:
        with contextlib.suppress(AttributeError, OSError):  # not available on every platform
            os.nice(int(niceness))
    try:
        worker_analyser(calibration_json, digest)
    except CalibrationError:
        pass  # remembered; every task raises it so the main process stops with the reason


def _pool_task(digest: str, task):
    return run_task(worker_analyser(None, digest), task)


class SerialExecutor:
    """Run the tasks in this process, one after the other (when asked for the next result)."""

    description = "this process"

    def __init__(self, calibration_json: str):
        self._analyser = FrameAnalyser(calibration_json)
        self._queue: deque = deque()
        self.n_workers = 1

    def submit(self, index: int, task) -> None:
        self._queue.append((index, task))

    def next_done(self):
        from latticeread.runs.stopping import raise_if_interrupted

        raise_if_interrupted()
        index, task = self._queue.popleft()
        return index, run_task(self._analyser, task)

    def close(self, *, cancel: bool = False) -> None:
        self._queue.clear()
        self._analyser.close()


@contextlib.contextmanager
def _single_thread_blas():
    """Worker processes get one BLAS thread each (N workers on N cores; same arithmetic as Dask)."""
    saved = {k: os.environ.get(k) for k in _BLAS_ENV}
    os.environ.update({k: "1" for k in _BLAS_ENV})
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


class PoolExecutor:
    """Run the tasks in a pool of worker processes on this machine.

    Each worker builds its analyser once, in the pool initializer, and then receives only
    tasks (file keys, or frames for the session).

    Parameters
    ----------
    calibration_json : str
    workers : int
        Worker processes.
    niceness : int
        Added to the workers' scheduling niceness (the window uses 10 so that its own
        thread stays responsive).
    """

    def __init__(self, calibration_json: str, *, workers: int, niceness: int = 0):
        self.n_workers = int(workers)
        self.description = f"{self.n_workers} worker processes"
        digest = calibration_digest(calibration_json)
        methods = multiprocessing.get_all_start_methods()
        ctx = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
        with _single_thread_blas():
            if ctx.get_start_method() == "forkserver":
                ctx.set_forkserver_preload(["latticeread.runs.forkserver_child", "latticeread.analysis.executor"])
                from multiprocessing import forkserver

                forkserver.ensure_running()
            self._pool = ProcessPoolExecutor(max_workers=self.n_workers, mp_context=ctx,
                                             initializer=_init_pool_worker,
                                             initargs=(calibration_json, digest, int(niceness)))
        self._digest = digest
        self._futures: dict[Future, tuple] = {}
        self._ready: deque = deque()

    def submit(self, index: int, task) -> None:
        with _single_thread_blas():  # spawn platforms start workers lazily
            future = self._pool.submit(_pool_task, self._digest, task)
        self._futures[future] = (index, task)

    @property
    def pending(self) -> int:
        """Tasks submitted and not yet handed back."""
        return len(self._futures) + len(self._ready)

    def next_done(self, timeout: float | None = None):
        """The next finished task as ``(index, outcome)``; None when ``timeout`` seconds passed first.

        A remembered Ctrl-C (:mod:`latticeread.runs.stopping`) is raised between polls.
        """
        import time

        from latticeread.runs.stopping import POLL_SECONDS, raise_if_interrupted

        end = None if timeout is None else time.monotonic() + timeout
        while not self._ready:
            raise_if_interrupted()
            step = POLL_SECONDS if end is None else max(0.0, min(POLL_SECONDS, end - time.monotonic()))
            done, _ = wait(list(self._futures), timeout=step, return_when=FIRST_COMPLETED)
            if not done and end is not None and time.monotonic() >= end:
                return None
            for future in done:
                self._ready.append((future, *self._futures.pop(future)))
        future, index, _ = self._ready.popleft()
        try:
            return index, future.result()
        except BrokenProcessPool as exc:
            raise ReconstructionError(
                "a worker process died (out of memory, or a crash in a file reader); every shot written so far "
                "is kept: run the same command again to continue") from exc

    def close(self, *, cancel: bool = False) -> None:
        """Shut the pool down; with ``cancel``, abandon the tasks not handed back yet.

        Abandoned tasks that are running are not waited for: their results would be thrown
        away, and a worker may be seconds into its first shot (building its analyser) when
        Ctrl-C comes. The workers are terminated instead (they only read input files), so an
        interrupted run ends at once. Without pending tasks the pool ends normally.
        """
        if not (cancel and self._futures):
            self._pool.shutdown(wait=True, cancel_futures=cancel)
            return
        processes = list((getattr(self._pool, "_processes", None) or {}).values())
        self._pool.shutdown(wait=False, cancel_futures=True)
        for process in processes:
            with contextlib.suppress(OSError, ValueError, AttributeError):
                process.terminate()
        for process in processes:
            with contextlib.suppress(OSError, ValueError, AttributeError, AssertionError):
                process.join(timeout=2.0)
        self._futures.clear()
        self._ready.clear()


def import_distributed():
    """Import :mod:`distributed`, or explain how to install it.

    Raises
    ------
    ClusterError
        Dask distributed is not installed.
    """
    try:
        import distributed
    except ImportError as exc:
        raise ClusterError("--scheduler needs Dask distributed, which is not installed; install it with "
                           "pip install 'latticeread[cluster]'") from exc
    return distributed


def dask_shots_task(calibration_json: str, digest: str, keys: list) -> list:
    """Run a few tasks on a Dask worker (module level so workers can import it).

    Parameters
    ----------
    calibration_json : str
        The calibration JSON text (sent once to every worker and resolved by Dask).
    digest : str
        Its digest; the worker's analyser is cached under it.
    keys : list of ShotKey (or ImageTask)
        The tasks, in order.

    Returns
    -------
    list
        One outcome per task, in the same order (a failing shot does not stop the others).
    """
    analyser = worker_analyser(calibration_json, digest)
    return [run_task(analyser, key) for key in keys]


class DaskExecutor:
    """Run tasks on a Dask cluster; results stream back with ``as_completed``.

    Parameters
    ----------
    calibration_json : str
        The calibration JSON text.
    scheduler : str
        ``"local"`` (start a LocalCluster on this machine) or a scheduler address.
    n_workers : int, optional
        Worker processes of the LocalCluster (default: number of CPUs).
    timeout : float
        Seconds to wait for a remote scheduler.
    shots_per_task : int
        Shots sent to a worker in one task (default 8): fewer, larger tasks keep Dask's
        per-task cost small next to the work.
    """

    def __init__(self, calibration_json: str, *, scheduler: str, n_workers: int | None = None,
                 timeout: float = 20.0, shots_per_task: int = 8):
        distributed = import_distributed()
        import dask

        self._distributed = distributed
        self._cluster = None
        self.shots_per_task = max(1, int(shots_per_task))
        if scheduler == "local":
            n = int(n_workers or os.cpu_count() or 1)
            # See the module docstring: Dask's trim threshold costs about a third of the throughput.
            # The scheduler starts an HTTP server even with dashboard_address=None (on the
            # default port 8787, all interfaces); bind it to an ephemeral loopback port with
            # no routes and no dashboard instead, so a batch serves nothing on the network.
            with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                                  "distributed.scheduler.http.routes": []}):
                self._cluster = distributed.LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None,
                    scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"})
            self._client = distributed.Client(self._cluster)
            self.description = f"a Dask LocalCluster of {n} worker processes"
        else:
            try:
                self._client = distributed.Client(scheduler, timeout=timeout)
            except (OSError, TimeoutError, ValueError) as exc:
                raise ClusterError(f"cannot reach the Dask scheduler at {scheduler!r}: {exc}") from exc
            self.description = f"the Dask cluster at {scheduler}"
        try:
            workers = self._client.scheduler_info()["workers"]
            if not workers:
                self._client.wait_for_workers(1, timeout=timeout)
                workers = self._client.scheduler_info()["workers"]
            self.n_workers = max(1, sum(int(w.get("nthreads", 1)) for w in workers.values()))
            self._digest = calibration_digest(calibration_json)
            self._calibration = self._client.scatter(calibration_json, broadcast=True)
        except (OSError, TimeoutError) as exc:
            self.close()
            raise ClusterError(f"the Dask scheduler {scheduler!r} has no usable workers: {exc}") from exc
        self._as_completed = distributed.as_completed()
        self._pending: dict = {}  # future key -> (indices, keys, future)
        self._unsent: list = []  # (index, key) not yet in a task
        self._ready: deque = deque()  # (index, outcome) come back, not yet handed out

    def submit(self, index: int, key) -> None:
        """Queue one task; it is sent with the next ``shots_per_task`` - 1 tasks."""
        self._unsent.append((index, key))
        if len(self._unsent) >= self.shots_per_task:
            self._send()

    def _send(self) -> None:
        if not self._unsent:
            return
        indices = [index for index, _ in self._unsent]
        keys = [key for _, key in self._unsent]
        self._unsent = []
        future = self._client.submit(dask_shots_task, self._calibration, self._digest, keys, pure=False)
        self._pending[future.key] = (indices, keys, future)
        self._as_completed.add(future)

    def next_done(self):
        """The next finished task as ``(index, outcome)`` (in completion order)."""
        while not self._ready:
            if not self._pending:
                self._send()  # a partial task: nothing else is on its way
            future = next(self._as_completed)
            indices, keys, _ = self._pending.pop(future.key)
            self._ready.extend(zip(indices, self._outcomes(future, keys)))
            future.release()
        return self._ready.popleft()

    def _outcomes(self, future, keys: list) -> list:
        try:
            outcomes = future.result()
        except CalibrationError:
            raise  # the same in every worker: stop the run with the reason
        except self._distributed.KilledWorker:
            return [ShotFailure(key, "KilledWorker", f"a Dask worker died while reconstructing frame "
                                f"{key.frame_index} of {os.path.basename(key.source)} or a shot sent with it "
                                f"(out of memory?)") for key in keys]
        except Exception as exc:  # noqa: BLE001 - the task itself catches errors; this is transport
            return [ShotFailure(key, type(exc).__name__, f"the Dask task failed: {exc}") for key in keys]
        if len(outcomes) != len(keys):
            return [ShotFailure(key, "ClusterError", f"a Dask worker returned {len(outcomes)} results for "
                                f"{len(keys)} shots") for key in keys]
        return outcomes

    def close(self, *, cancel: bool = False) -> None:
        client = getattr(self, "_client", None)
        try:
            if client is not None:
                if cancel and getattr(self, "_pending", None):
                    client.cancel([future for _, _, future in self._pending.values()])
                    self._pending.clear()
                self._unsent = []
                client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()


def make_executor(calibration_json: str, *, workers: int | None = None, scheduler: str | None = None,
                  niceness: int = 0):
    """The executor for ``workers`` local processes (0 = this process) or a Dask ``scheduler``."""
    if scheduler:
        return DaskExecutor(calibration_json, scheduler=scheduler)
    n = (os.cpu_count() or 1) if workers is None else int(workers)
    if n < 0:
        raise ValueError(f"--workers must be 0 (this process) or a positive number, got {n}")
    if n == 0:
        return SerialExecutor(calibration_json)
    return PoolExecutor(calibration_json, workers=n, niceness=niceness)


# the names runs.batch and runs.cluster used before this layer existed
SerialRunner, PoolRunner, DaskRunner = SerialExecutor, PoolExecutor, DaskExecutor
