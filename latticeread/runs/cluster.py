"""Run a batch on a Dask distributed cluster (optional extra ``latticeread[cluster]``).

``run_batch(..., scheduler="local")`` starts a :class:`distributed.LocalCluster` on this
machine; any other ``scheduler`` value is the address of a running Dask scheduler
(``tcp://host:8786``), whose workers must see the input files under the same paths (a
shared file system). The calibration is sent to every worker once; each task receives a
(file, hash, frame) key, reconstructs the frame with the worker's cached reconstructor
(built on the first task, never per frame) and returns a small record. Results stream back
as they complete and the main process alone writes them to the run file, in input order.

Dask is imported only when this module is used; without it a :class:`ClusterError` says
how to install it.
"""

from __future__ import annotations

import logging
import os

from latticeread.errors import CalibrationError, ClusterError
from latticeread.io.run_file import ShotKey, ShotRecord
from latticeread.runs.batch import ShotFailure, calibration_digest, worker_reconstructor

__all__ = ["DaskRunner", "dask_shot_task", "import_distributed"]

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


def dask_shot_task(calibration_json: str, digest: str, key: ShotKey) -> ShotRecord | ShotFailure:
    """Reconstruct one shot on a Dask worker (module level so workers can import it).

    Parameters
    ----------
    calibration_json : str
        The calibration JSON text (sent once to every worker and resolved by Dask).
    digest : str
        Its digest; the worker's reconstructor is cached under it.
    key : ShotKey
        File, hash and frame to reconstruct.
    """
    return worker_reconstructor(calibration_json, digest)(key)


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
    """

    def __init__(self, calibration_json: str, *, scheduler: str, n_workers: int | None = None,
                 timeout: float = 20.0):
        distributed = import_distributed()
        self._distributed = distributed
        self._cluster = None
        if scheduler == "local":
            n = int(n_workers or os.cpu_count() or 1)
            self._cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                                     dashboard_address=None)
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
        self._pending: dict = {}

    def submit(self, index: int, key: ShotKey) -> None:
        future = self._client.submit(dask_shot_task, self._calibration, self._digest, key, pure=False)
        self._pending[future.key] = (index, key, future)
        self._as_completed.add(future)

    def next_done(self):
        future = next(self._as_completed)
        index, key, _ = self._pending.pop(future.key)
        try:
            outcome = future.result()
        except CalibrationError:
            raise  # the same in every worker: stop the run with the reason
        except self._distributed.KilledWorker:
            outcome = ShotFailure(key, "KilledWorker", f"a Dask worker died while reconstructing frame "
                                  f"{key.frame_index} of {os.path.basename(key.source)} (out of memory?)")
        except Exception as exc:  # noqa: BLE001 - the task itself catches errors; this is transport
            outcome = ShotFailure(key, type(exc).__name__, f"the Dask task failed: {exc}")
        future.release()
        return index, outcome

    def close(self, *, cancel: bool = False) -> None:
        client = getattr(self, "_client", None)
        try:
            if client is not None:
                if cancel and getattr(self, "_pending", None):
                    client.cancel([future for _, _, future in self._pending.values()])
                    self._pending.clear()
                client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()
