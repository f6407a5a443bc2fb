"""Run a batch on a Dask distributed cluster (optional extra ``latticeread[cluster]``).

``run_batch(..., scheduler="local")`` starts a :class:`distributed.LocalCluster` on this
machine; any other ``scheduler`` value is the address of a running Dask scheduler
(``tcp://host:8786``), whose workers must see the input files under the same paths (a
shared file system). The executor itself, and what decides its throughput, is
:class:`latticeread.analysis.executor.DaskExecutor` (one executor layer for the window and
batch runs); this module keeps the names batch scripts import.
"""

from __future__ import annotations

from latticeread.analysis.executor import DaskExecutor, dask_shots_task, import_distributed

DaskRunner = DaskExecutor

__all__ = ["DaskRunner", "DaskExecutor", "dask_shots_task", "import_distributed"]
