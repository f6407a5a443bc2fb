"""The Dask path: a LocalCluster of 2 worker processes must give the single-process run bit for bit.

Reference: the single-process run (workers=0, the Reconstructor called in this process);
equality is checked on the raw bytes of every stored array (only the wall-clock
``written_at`` columns differ).
"""

from __future__ import annotations

import sys

import pytest

from latticeread.errors import ClusterError
from latticeread.io.run_file import read_run
from latticeread.runs.batch import run_batch

from test_batch import assert_runs_identical, make_dataset, truncated_tiff

pytest.importorskip("distributed")  # optional extra; installed in the test environment


def test_local_cluster_equals_single_process_bit_for_bit(tmp_path):
    cal, _, _ = make_dataset(tmp_path / "data", n_files=3, frames_per_file=2, seed=7)
    truncated_tiff(tmp_path / "data" / "shot_1b.tif")  # a failure must be recorded alike
    ref = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "serial.h5", workers=0, progress=False)
    got = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "dask.h5", scheduler="local",
                    workers=2, progress=False)
    assert ref.n_new == got.n_new == 6 and ref.n_failed == got.n_failed == 1
    assert "LocalCluster of 2" in got.workers
    assert_runs_identical(read_run(tmp_path / "serial.h5"), read_run(tmp_path / "dask.h5"))


def test_missing_dask_is_explained(monkeypatch):
    from latticeread.runs.cluster import import_distributed

    monkeypatch.setitem(sys.modules, "distributed", None)  # makes "import distributed" fail
    with pytest.raises(ClusterError, match=r"pip install 'latticeread\[cluster\]'"):
        import_distributed()


def test_unreachable_scheduler(tmp_path):
    from latticeread.runs.cluster import DaskRunner

    with pytest.raises(ClusterError, match="cannot reach the Dask scheduler"):
        DaskRunner("{}", scheduler="tcp://127.0.0.1:9", timeout=0.5)
