"""Fault injection on real runs: kills, Ctrl-C and a full disk during batch, watch and reconstruct.

Each case starts the command line in a second process (``python -m latticeread ...``),
hurts it at a random moment of its writing and then checks what a user would: the exit
code (the README's table: 0 ok, 4 output not written, 130 interrupted), that the results
file opens, and that running the same command again ends with every shot exactly once and
bit-identical to a run that was never disturbed (the reference, made in this process).
A full disk is imitated with a file size limit (``RLIMIT_FSIZE``): the kernel then refuses
writes past the limit just as a full file system refuses them (mounting a small tmpfs
would need root). Kills of ``reconstruct`` while it writes are tests/test_faults_commands.py's.
"""

from __future__ import annotations

import dataclasses
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.io.calibration_file import save_calibration
from latticeread.io.run_file import read_run
from latticeread.runs.batch import run_batch

from test_batch import assert_runs_identical, make_dataset

N_FRAMES = 40


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """One TIFF of 40 frames (4 simulated ones repeated), its calibration and a clean run."""
    root = tmp_path_factory.mktemp("faults")
    cal, paths, _ = make_dataset(root / "data", n_files=1, frames_per_file=4, seed=11)
    tifffile.imwrite(paths[0], np.tile(tifffile.imread(paths[0]), (N_FRAMES // 4, 1, 1)), photometric="minisblack")
    save_calibration(root / "cal.json", cal)
    run_batch([root / "data"], calibration=root / "cal.json", out=root / "reference.h5", workers=0, progress=False)
    return root


def _cli(*args, limit: int = 0) -> list[str]:
    """The command line, optionally under a file size limit (writes past it fail like a full disk)."""
    code = ("import resource, signal, sys\n"
            f"if {limit}:\n"
            "    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)\n"
            f"    resource.setrlimit(resource.RLIMIT_FSIZE, ({limit}, resource.RLIM_INFINITY))\n"
            "from latticeread.cli import main\n"
            f"sys.exit(main({list(args)!r}))\n")
    return [sys.executable, "-c", code]


def _batch_args(data: Path, out: Path, workers: int = 0) -> list[str]:
    return ["batch", str(data / "data"), "-c", str(data / "cal.json"), "-o", str(out), "--workers", str(workers),
            "--no-progress"]


def _shots(path: Path) -> int:
    try:
        return len(read_run(path, matrices=False))
    except Exception:  # noqa: BLE001 - not created yet
        return -1


def _wait_for_shots(proc, out: Path, n: int, timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while _shots(out) < n and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)


def _in_key_order(run):
    """The run with its shots sorted by (file, frame): an interrupted run may store the
    shots that were already back out of input order."""
    order = np.lexsort((run.frame_index, run.source))
    fields = {f.name: getattr(run, f.name) for f in dataclasses.fields(run)}
    for name, value in fields.items():
        if isinstance(value, np.ndarray) and value.shape[:1] == (len(run),):
            fields[name] = value[order]
    fields["warnings"] = tuple(run.warnings[i] for i in order)
    return type(run)(**fields)


def _resume_and_compare(data: Path, out: Path) -> None:
    run_batch([data / "data"], calibration=data / "cal.json", out=out, workers=0, progress=False)
    assert_runs_identical(_in_key_order(read_run(out)), _in_key_order(read_run(data / "reference.h5")))


def test_batch_killed_at_random_moments_resumes_to_the_reference(data, tmp_path):
    rng = np.random.default_rng(3)
    out = tmp_path / "run.h5"
    counts = []
    for _ in range(3):
        proc = subprocess.Popen(_cli(*_batch_args(data, out)), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            _wait_for_shots(proc, out, 0)
            time.sleep(rng.uniform(0.0, 0.8))
        finally:
            proc.kill()
            _, err = proc.communicate()
        run = read_run(out)  # readable after every kill
        assert len(set(run.keys)) == len(run), err
        counts.append(len(run))
    assert counts == sorted(counts)
    assert counts[0] < N_FRAMES, "the first kill came after the batch had finished: nothing was tested"
    _resume_and_compare(data, out)


def test_ctrl_c_during_batch_stops_quickly_with_130_and_resumes(data, tmp_path):
    out = tmp_path / "run.h5"
    proc = subprocess.Popen(_cli(*_batch_args(data, out, workers=2)), stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    _wait_for_shots(proc, out, 1)
    sent = time.monotonic()
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    stopped_after = time.monotonic() - sent
    assert proc.returncode == 130, err
    assert "interrupted" in err
    # The time to stop (target: one second) is a bench number (bench/bench_faults.py), not a test
    # bound; this bound only tells a stop from a run that went on to the end regardless.
    assert stopped_after < 30.0
    assert 1 <= _shots(out) <= N_FRAMES
    _resume_and_compare(data, out)


def test_full_disk_during_batch_exits_4_naming_the_shots_not_written(data, tmp_path):
    # A block reserves its upper bound plus 1 MiB of HDF5 margin, so under a 1 MB limit the
    # first block fails whatever its size (blocks are smaller on a busy machine: a larger limit
    # let a loaded run end without ever reaching it). Stops between blocks at other moments
    # are tests/test_faults_run_file.py's, with blocks of fixed size.
    out = tmp_path / "run.h5"
    proc = subprocess.run(_cli(*_batch_args(data, out), limit=1_000_000), capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 4, proc.stderr
    assert "full" in proc.stderr and f"not written: shot_0.tif frames 0-{N_FRAMES - 1}" in proc.stderr
    assert "Segmentation" not in proc.stderr and "internal error" not in proc.stderr
    assert _shots(out) == 0  # readable
    _resume_and_compare(data, out)


def test_badly_named_file_does_not_drop_the_good_shots(tmp_path):
    cal, paths, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=2, seed=12)
    odd = os.path.join(os.fsencode(tmp_path / "data"), b"odd\xff.tif")  # not valid UTF-8
    with open(odd, "wb") as fh:
        fh.write(paths[0].read_bytes())
    summary = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "run.h5", workers=0, progress=False)
    assert (summary.n_new, summary.n_failed) == (4, 0)
    run = read_run(tmp_path / "run.h5")
    assert sorted(set(run.source)) == sorted({os.fsdecode(odd), str(paths[0])})  # the raw name round-trips
    np.testing.assert_array_equal(run.occupation[run.source == os.fsdecode(odd)],
                                  run.occupation[run.source == str(paths[0])])


def _group_members(pgid: int) -> list[int]:
    found = []
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                stat = Path(f"/proc/{entry}/stat").read_text()
            except OSError:
                continue
            fields = stat[stat.rindex(")") + 2:].split()
            if int(fields[2]) == pgid and fields[0] != "Z":
                found.append(int(entry))
    return found


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="parent-death signal and /proc are Linux-only")
def test_pool_workers_end_with_a_killed_batch(data, tmp_path):
    out = tmp_path / "run.h5"
    proc = subprocess.Popen(_cli(*_batch_args(data, out, workers=2)), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        _wait_for_shots(proc, out, 1)
        assert len(_group_members(proc.pid)) >= 3  # the run, its forkserver and workers
        proc.kill()  # the main process only, as an out-of-memory killer would
        proc.wait()
        deadline = time.monotonic() + 10
        while _group_members(proc.pid) and time.monotonic() < deadline:
            time.sleep(0.05)
        left = _group_members(proc.pid)
    finally:
        if _group_members(proc.pid):
            os.killpg(proc.pid, signal.SIGKILL)  # the process group of the run we started
    assert left == [], "helper processes outlived the killed batch"


def test_local_cluster_serves_nothing_on_the_network(data):
    pytest.importorskip("distributed")
    from latticeread.runs.cluster import DaskRunner

    runner = DaskRunner((data / "cal.json").read_text(), scheduler="local", n_workers=1)
    try:
        scheduler = runner._cluster.scheduler
        addresses = [s.getsockname()[:2] for s in scheduler.http_server._sockets.values()]
        assert addresses and all(host == "127.0.0.1" and port != 8787 for host, port in addresses)
        import urllib.error
        import urllib.request

        for path in ("/status", "/health", "/metrics"):  # no dashboard, no routes at all
            with pytest.raises(urllib.error.HTTPError, match="404"):
                urllib.request.urlopen(f"http://127.0.0.1:{addresses[0][1]}{path}", timeout=10)
    finally:
        runner.close(cancel=True)


def _watch_args(data: Path, out: Path) -> list[str]:
    return ["watch", str(data / "data"), "-c", str(data / "cal.json"), "-o", str(out), "--interval", "0.1",
            "--quiet"]


def test_watch_killed_or_interrupted_keeps_every_shot_once(data, tmp_path):
    out = tmp_path / "live.h5"
    proc = subprocess.Popen(_cli(*_watch_args(data, out)), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        _wait_for_shots(proc, out, 1)
        # watch stores a 40-frame file in about a second: kill within its first tenth
        time.sleep(np.random.default_rng(5).uniform(0.0, 0.05))
    finally:
        proc.kill()
        _, err = proc.communicate()
    killed = read_run(out)
    assert len(set(killed.keys)) == len(killed), err
    assert len(killed) < N_FRAMES, "the kill came after the watch had stored everything: nothing was tested"
    proc = subprocess.Popen(_cli(*_watch_args(data, out)), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True)
    # one shot more than the killed run held (waiting for more than the file holds would idle
    # until the wait's own time-out)
    _wait_for_shots(proc, out, min(len(killed) + 1, N_FRAMES))
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    _resume_and_compare(data, out)


def test_fidelity_reads_the_batch_run_file(data, tmp_path, capsys):
    """The results file of batch is the same layout the fidelity command reads."""
    from latticeread.cli import main

    assert main(["fidelity", str(data / "reference.h5"), "--images-per-shot", "2", "--bootstrap", "0",
                 "--out", str(tmp_path / "report.json")]) == 0
    assert (tmp_path / "report.json").exists()
    assert "not a latticeread occupation file" not in capsys.readouterr().err


def test_full_disk_during_reconstruct_to_hdf5_exits_4_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    # In this process (the subprocess cases above cost seconds each): the disk refuses the space
    # of the first block, as posix_fallocate does on a full file system (ENOSPC).
    import errno

    from latticeread.cli import main

    cal, paths, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=2, seed=13)
    save_calibration(tmp_path / "cal.json", cal)
    out = tmp_path / "out"
    out.mkdir()

    def full(fd, offset, length):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "posix_fallocate", full)
    code = main(["reconstruct", str(paths[0]), "-c", str(tmp_path / "cal.json"), "-o", str(out / "sites.h5"),
                 "--quiet"])
    err = capsys.readouterr().err
    assert code == 4, err
    assert "is full" in err and "internal error" not in err
    assert list(out.iterdir()) == []  # no output, no temporary file, no lock file


def test_full_disk_during_watch_exits_4_naming_the_frames_and_the_watch_resumes(tmp_path, monkeypatch, capsys):
    import errno

    from latticeread.cli import main

    cal, paths, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=2, seed=14)
    save_calibration(tmp_path / "cal.json", cal)
    args = ["watch", str(tmp_path / "data"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "live.h5"),
            "--max-files", "1", "--settle", "0", "--interval", "0.05", "--quiet"]

    def full(fd, offset, length):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "posix_fallocate", full)
    code = main(args)
    err = capsys.readouterr().err
    assert code == 4, err
    assert "is full" in err and "not written: shot_0.tif frames 0-1" in err and "internal error" not in err
    assert _shots(tmp_path / "live.h5") == 0  # readable
    monkeypatch.undo()
    assert main(args) == 0  # space again: the same command stores every frame once
    run = read_run(tmp_path / "live.h5")
    assert sorted(run.frame_index.tolist()) == [0, 1] and len(run.failures) == 0
