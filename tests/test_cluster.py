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


def test_shots_travel_in_tasks_of_several_and_each_comes_back_once(tmp_path):
    """Tasks of 4 shots, a partial last task, a corrupt file inside a task: every shot once, as serial."""
    import numpy as np

    from latticeread.io.calibration_file import calibration_to_json
    from latticeread.runs.batch import SerialRunner, _as_calibration, find_input_files, plan_shots
    from latticeread.runs.cluster import DaskRunner

    cal, _, _ = make_dataset(tmp_path / "data", n_files=5, frames_per_file=2, seed=11)
    truncated_tiff(tmp_path / "data" / "shot_2b.tif")
    cal_json = calibration_to_json(_as_calibration(cal))
    plan = plan_shots(find_input_files([tmp_path / "data"]), count_frames=lambda path: 2)
    assert len(plan.tasks) == 12  # the truncated file's two frames are planned and fail in the worker
    serial = SerialRunner(cal_json)
    expected = {}
    for i, key in enumerate(plan.tasks):
        serial.submit(i, key)
        expected[i] = serial.next_done()[1]
    serial.close()

    runner = DaskRunner(cal_json, scheduler="local", n_workers=2, shots_per_task=4)
    try:
        got = {}
        for i, key in enumerate(plan.tasks[:10]):  # two full tasks, then 2 shots waiting
            runner.submit(i, key)
        for _ in range(9):
            index, outcome = runner.next_done()
            assert index not in got
            got[index] = outcome
        for i in (10, 11):  # joins the 2 waiting shots
            runner.submit(i, plan.tasks[i])
        while len(got) < 12:
            index, outcome = runner.next_done()  # sends the partial task when nothing else is on its way
            assert index not in got
            got[index] = outcome
    finally:
        runner.close()
    assert sorted(got) == list(range(12))
    for i, outcome in expected.items():
        assert type(got[i]) is type(outcome)
        if hasattr(outcome, "occupation"):
            assert np.asarray(got[i].amplitude).tobytes() == np.asarray(outcome.amplitude).tobytes()
        else:
            assert got[i].reason == outcome.reason


def test_local_cluster_workers_do_not_inherit_the_malloc_trim_threshold():
    """Dask's default MALLOC_TRIM_THRESHOLD_ makes every large array a fresh mmap (bench_batch.py)."""
    from latticeread.runs.cluster import DaskRunner

    runner = DaskRunner("{}", scheduler="local", n_workers=1)
    try:
        env = runner._client.run(lambda: __import__("os").environ.get("MALLOC_TRIM_THRESHOLD_"))
    finally:
        runner.close()
    assert list(env.values()) == [None]
