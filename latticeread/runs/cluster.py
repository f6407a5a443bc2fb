"""Run a batch on a Dask distributed cluster (optional extra ``latticeread[cluster]``).

``run_batch(..., scheduler="local")`` starts a :class:`distributed.LocalCluster` on this
machine; any other ``scheduler`` value is the address of a running Dask scheduler
(``tcp://host:8786``), whose workers must see the input files under the same paths (a
shared file system). The calibration is sent to every worker once; each task receives a
few (file, hash, frame) keys (``shots_per_task``, default 8), reconstructs the frames with
the worker's cached reconstructor (built on the first task, never per frame) and returns
small records. Results stream back as they complete and the main process alone writes them
to the run file, in input order.

Two settings decide the throughput on a small machine (measured with
``bench/bench_batch.py``, 1,000 frames of 512x512 on 2 cores):

* Several shots per task: every Dask task costs the scheduler, the client and the worker
  about a millisecond of CPU each, comparable to a 10 ms shot, on the same cores.
* Dask starts its worker processes with ``MALLOC_TRIM_THRESHOLD_=65536``. Setting it turns
  off glibc's adaptive mmap threshold, so every array above 128 KiB (a 512x512 frame is
  2 MiB) is mapped and unmapped afresh, with page faults on every touch: the same shot
  took 20 ms of worker CPU instead of 14 ms. The LocalCluster started here leaves the
  variable unset; for workers of your own cluster, set
  ``distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_: null`` in their Dask
  configuration.

Dask is imported only when this module is used; without it a :class:`ClusterError` says
how to install it.
"""

from __future__ import annotations

import logging
import os
from collections import deque

from latticeread.errors import CalibrationError, ClusterError
from latticeread.io.run_file import ShotKey, ShotRecord
from latticeread.runs.batch import ShotFailure, calibration_digest, worker_reconstructor

__all__ = ["DaskRunner", "dask_shots_task", "import_distributed"]

log = logging.getLogger(__name__)


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


def dask_shots_task(calibration_json: str, digest: str, keys: list[ShotKey]) -> list[ShotRecord | ShotFailure]:
    """Reconstruct a few shots on a Dask worker (module level so workers can import it).

    Parameters
    ----------
    calibration_json : str
        The calibration JSON text (sent once to every worker and resolved by Dask).
    digest : str
        Its digest; the worker's reconstructor is cached under it.
    keys : list of ShotKey
        File, hash and frame of each shot, in order.

    Returns
    -------
    list of ShotRecord or ShotFailure
        One outcome per key, in the same order (a failing shot does not stop the others).
    """
    reconstruct = worker_reconstructor(calibration_json, digest)
    return [reconstruct(key) for key in keys]


class DaskRunner:
    """Reconstruct shots on a Dask cluster; results stream back with ``as_completed``.

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

    def submit(self, index: int, key: ShotKey) -> None:
        """Queue one shot; it is sent with the next ``shots_per_task`` - 1 shots."""
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
        """The next finished shot as ``(index, outcome)`` (in completion order)."""
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
