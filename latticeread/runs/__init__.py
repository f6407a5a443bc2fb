"""Runs at scale: a whole data set into one resumable run file, a live folder watch, a Dask cluster.

* :mod:`latticeread.runs.batch` -- find input files, plan shots, reconstruct them in a
  process pool (or in this process) and append them to the run file in input order.
* :mod:`latticeread.runs.watch` -- :class:`FolderWatcher`, a poll-based detector of newly
  completed frame files (no Qt), :class:`LiveRun` (one poll + reconstruction + append per
  ``step()``; the GUI drives it from a timer or worker) and :func:`watch_folder`.
* :mod:`latticeread.runs.cluster` -- the same batch on a Dask distributed cluster (optional
  extra ``latticeread[cluster]``).

The run file itself is :mod:`latticeread.io.run_file`.
"""

from latticeread.runs.batch import BatchSummary, find_input_files, hash_file, run_batch
from latticeread.runs.watch import FolderWatcher, LiveRun, RunningStats, WatchEvent, watch_folder

__all__ = ["BatchSummary", "find_input_files", "hash_file", "run_batch", "FolderWatcher", "LiveRun",
           "RunningStats", "WatchEvent", "watch_folder"]
