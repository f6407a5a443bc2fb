"""Fault injection on the results file itself: kills, a full disk, two writers, a live reader.

Each case runs a real second process that writes a run file through
:class:`latticeread.io.run_file.RunWriter` (blocks of synthetic shots whose content follows
from the shot index), then damages it from outside: SIGKILL at a random moment, a file
size limit (``RLIMIT_FSIZE``, which makes the kernel refuse writes past a size exactly as a
full disk refuses them; a real small tmpfs needs root, so the suite does not mount one), a
second writer, a reader following the file while it grows. The check is always the same:
the file opens, holds every committed shot exactly once with its exact content, and a later
writer resumes it. Reference for "consistent at every instant": the HDF5 single-writer /
multiple-reader design (HDF5 documentation, "SWMR"); for exit codes, the README table.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from latticeread.errors import ExportError
from latticeread.io.atomic import DiskFullError, clean_stale_temps, reserve_space, temp_name
from latticeread.io.run_file import RunWriter, ShotKey, ShotRecord, read_run
from latticeread.io.run_lock import lock_path_for

CAL = json.dumps({"format": "latticeread-calibration", "frame_shape": [64, 64], "notes": {}})
SHAPE = (20, 24)

# The writer process: blocks of BLOCK shots, shot i built by record(i); prints "committed N"
# after each block so the parent knows how far it got.
WRITER = textwrap.dedent('''
    import json, os, signal, sys, resource
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_faults_run_file import record, CAL
    from latticeread.errors import ExportError
    from latticeread.io.run_file import RunWriter
    path, start, stop, block, limit = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]), int(sys.argv[5])
    if limit:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a refused write returns EFBIG instead of killing
    try:
        with RunWriter(path, calibration_json=CAL) as w:
            if limit:
                resource.setrlimit(resource.RLIMIT_FSIZE, (os.path.getsize(path) + limit, resource.RLIM_INFINITY))
            print("open", flush=True)
            for first in range(start, stop, block):
                w.append_many([record(i) for i in range(first, min(stop, first + block))])
                print("committed", w.n_shots, flush=True)
    except ExportError as exc:
        print("error", type(exc).__name__, exc, flush=True)
        sys.exit(exc.exit_code)
''')


def record(i: int) -> ShotRecord:
    """Shot ``i``: every value follows from ``i``, so a reader can check content exactly."""
    rng = np.random.default_rng(i)
    occ = rng.integers(0, 2, size=SHAPE).astype(np.uint8)
    occ[0, :3] = 255
    amp = rng.normal(500.0, 300.0, size=SHAPE)
    return ShotRecord(key=ShotKey(f"/data/shot_{i // 10}.tif", "ab" * 16, i % 10), occupation=occ, amplitude=amp,
                      p_occupied=rng.random(SHAPE), x=rng.random(SHAPE) * 64, y=rng.random(SHAPE) * 64,
                      flags=rng.integers(0, 8, size=SHAPE).astype(np.uint8), offset=(float(i), 0.5),
                      a1=(4.0, 0.0), a2=(0.0, 4.0), threshold=100.0 + i, warnings=(f"note {i}",) if i % 3 else ())


def _index(run) -> list[int]:
    return [10 * int(s.split("_")[1].split(".")[0]) + int(f) for s, f in zip(run.source, run.frame_index)]


def check_exact(path, n_expected: int | None = None) -> list[int]:
    """The run file opens and holds shots 0..n-1 once each, bit-exact; return their indices."""
    run = read_run(path)
    idx = _index(run)
    assert sorted(idx) == list(range(len(idx))), "a shot is missing or duplicated"
    if n_expected is not None:
        assert len(idx) == n_expected
    for row, i in enumerate(idx):
        want = record(i)
        for name in ("occupation", "amplitude", "p_occupied", "x", "y", "flags"):
            np.testing.assert_array_equal(getattr(run, name)[row], getattr(want, name))
        assert run.threshold[row] == want.threshold and run.warnings[row] == want.warnings
    return idx


def writer(path, start: int, stop: int, *, block: int = 4, limit: int = 0, **popen) -> subprocess.Popen:
    script = WRITER.format(tests=os.path.dirname(__file__))
    return subprocess.Popen([sys.executable, "-c", script, str(path), str(start), str(stop), str(block), str(limit)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **popen)


def _wait_for(proc, word: str, timeout: float = 60.0) -> str:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line:
            break
        if line.startswith(word):
            return line
    raise AssertionError(f"writer never printed {word!r}: {proc.stderr.read()}")


def test_sigkill_at_random_moments_loses_no_committed_shot(tmp_path):
    rng = np.random.default_rng(7)
    path = tmp_path / "run.h5"
    n_kills = 4
    committed_before_kill = []
    for _ in range(n_kills):
        proc = writer(path, 0, 100_000, block=3)
        try:
            last = int(_wait_for(proc, "committed").split()[1])
            time.sleep(rng.uniform(0.0, 0.15))  # the kill lands anywhere in a later block
        finally:
            proc.kill()
            proc.wait()
            proc.stdout.close()
            proc.stderr.close()
        assert proc.returncode == -signal.SIGKILL
        idx = check_exact(path)  # readable right after the kill, every shot once
        assert len(idx) >= last
        committed_before_kill.append(len(idx))
        # the next writer resumes from the committed count (the loop starts at 0 and skips them)
        assert lock_path_for(path).exists()  # a dead writer's lock is left behind...
    with RunWriter(path, calibration_json=CAL) as w:  # ...and taken over
        n = w.n_shots
        assert w.append_many([record(i) for i in range(n, n + 2)]) == 2
    check_exact(path, n + 2)
    assert committed_before_kill == sorted(committed_before_kill)
    assert not lock_path_for(path).exists()


def test_a_full_disk_stops_between_blocks_and_the_run_resumes(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append_many([record(i) for i in range(4)])
    # about three blocks of 4 shots fit under the limit (6 matrices of 20 x 24 sites per shot)
    proc = writer(path, 0, 200, block=4, limit=3_000_000)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 4, (out, err)  # output problem, as the README's table says
    assert "error DiskFullError" in out and "full" in out
    assert "Segmentation" not in err
    n = len(check_exact(path))
    assert 4 <= n < 200
    proc = writer(path, 0, 200, block=4)  # space again: the same command continues
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    check_exact(path, 200)


def test_no_space_for_a_block_writes_nothing(tmp_path, monkeypatch):
    path = tmp_path / "run.h5"
    w = RunWriter(path, calibration_json=CAL)
    w.append(record(0))

    def full(fd, offset, length):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "posix_fallocate", full)
    with pytest.raises(DiskFullError, match="is full"):
        w.append_many([record(1), record(2)])
    with pytest.raises(DiskFullError, match="is full"):
        w.record_failure(ShotKey("/data/x.tif", "", -1), error="FrameFileError", reason="bad")
    monkeypatch.undo()
    assert w.append(record(1))
    w.close()
    check_exact(path, 2)
    assert len(read_run(path).failures) == 0


def test_reserve_space_holds_blocks_and_reports_a_full_disk(tmp_path, monkeypatch):
    path = tmp_path / "f.bin"
    path.write_bytes(b"x")
    reserve_space(path, 4096)
    assert path.stat().st_size == 4096 and path.read_bytes()[:1] == b"x"
    monkeypatch.delattr(os, "posix_fallocate")  # systems without it: compared with free space
    with pytest.raises(DiskFullError, match="is full"):
        reserve_space(path, 1 << 62)


def test_second_writer_is_refused_while_the_first_lives(tmp_path):
    path = tmp_path / "run.h5"
    first = RunWriter(path, calibration_json=CAL)
    try:
        with pytest.raises(ExportError, match=f"being written by process {os.getpid()}"):
            RunWriter(path, calibration_json=CAL)
    finally:
        first.close()
    RunWriter(path, calibration_json=CAL).close()  # free again once the first closed


def test_a_refused_writer_names_a_holder_that_has_not_yet_written_its_pid(tmp_path):
    # The holder takes the lock, then writes its pid: a writer started at the same instant can
    # look in between and find the file empty, or holding the pid of a dead earlier writer.
    import fcntl
    import threading

    path = tmp_path / "run.h5"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    lock = lock_path_for(path)
    for before in ("", f"{dead.stdout.strip()} somehost\n"):
        lock.write_text(before)
        fd = os.open(lock, os.O_RDWR)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            names = threading.Timer(0.1, lambda: os.pwrite(fd, f"{os.getpid()} thishost\n".encode(), 0))
            names.start()
            with pytest.raises(ExportError, match=f"being written by process {os.getpid()} "):
                RunWriter(path, calibration_json=CAL)
            names.join()
        finally:
            os.close(fd)
        lock.unlink()


def test_two_processes_start_together_on_a_new_file(tmp_path):
    path = tmp_path / "run.h5"
    procs = [writer(path, 0, 40, block=4) for _ in range(2)]
    results = [p.communicate(timeout=60) for p in procs]
    codes = sorted(p.returncode for p in procs)
    # Either one waited out the other (both 0, the second found every shot done) or the
    # second was refused (4); never two writers at once.
    assert codes in ([0, 0], [0, 4]), results
    if codes == [0, 4]:
        assert any("being written by" in out for out, _ in results)
    check_exact(path, 40)


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path):
    path = tmp_path / "run.h5"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    lock_path_for(path).write_text(f"{dead.stdout.strip()} somehost\n")
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(record(0))
        assert lock_path_for(path).read_text().split()[0] == str(os.getpid())
    check_exact(path, 1)


def test_a_reader_follows_a_live_writer(tmp_path):
    path = tmp_path / "run.h5"
    proc = writer(path, 0, 60, block=2)
    seen = []
    try:
        _wait_for(proc, "open")
        while proc.poll() is None:
            seen.append(len(check_exact(path)))  # never blocked, never a half-written shot
    finally:
        out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert seen == sorted(seen) and len(set(seen)) >= 3  # it watched the file grow
    check_exact(path, 60)


def test_run_files_get_the_umask_mode(tmp_path):
    old = os.umask(0o022)
    try:
        RunWriter(tmp_path / "run.h5", calibration_json=CAL).close()
    finally:
        os.umask(old)
    assert (tmp_path / "run.h5").stat().st_mode & 0o777 == 0o644


def test_temp_files_of_killed_runs_are_removed_by_the_next_run(tmp_path):
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(proc.stdout)
    left = tmp_path / f".out.csv.{dead_pid}-0123abcd.tmp"
    left.write_bytes(b"half")
    mine = temp_name(tmp_path / "other.csv")
    mine.write_bytes(b"in progress")
    left_lock = tmp_path / f".{left.name}.lock"  # the writer lock of an HDF5 output's temporary file
    left_lock.write_text(f"{dead_pid} somehost\n")
    mine_lock = tmp_path / f".{mine.name}.lock"
    mine_lock.write_text(f"{os.getpid()} somehost\n")
    other_file = tmp_path / ".notes.tmp"
    other_file.write_text("not ours")
    assert sorted(clean_stale_temps(tmp_path)) == sorted([left, left_lock])
    assert mine.exists() and mine_lock.exists() and other_file.exists()
    left.write_bytes(b"half")
    RunWriter(tmp_path / "run.h5", calibration_json=CAL).close()  # a run cleans its folder at start-up
    assert not left.exists()


def test_every_commit_reaches_the_disk_rows_first_then_the_counter(tmp_path, monkeypatch):
    # A power cut is not simulated; what is checked is the order that makes one harmless:
    # fsync of the rows while the counter still excludes them, then fsync of the counter.
    # (POSIX fsync: data reach the storage device before it returns; common practice, no source.)
    import h5py

    import latticeread.io.run_file as run_file

    path = tmp_path / "run.h5"
    seen = []
    real_fsync = os.fsync

    def fsync(fd):
        with h5py.File(path, "r", swmr=True, locking=False) as f:
            seen.append((int(f["committed"][0]), int(f["frames/frame_index"].shape[0])))
        real_fsync(fd)

    with RunWriter(path, calibration_json=CAL) as w:
        monkeypatch.setattr(os, "fsync", fsync)
        w.append_many([record(i) for i in range(3)])
        assert seen == [(0, 3), (3, 3)]
        w.append_many([record(i) for i in range(3, 5)])
        w.record_failure(ShotKey("/data/bad.tif", "cd" * 16, 0), error="FrameFileError", reason="truncated")
        assert seen[2:] == [(3, 5), (5, 5), (5, 5), (5, 5)]
    monkeypatch.setattr(run_file, "SYNC_TO_DISK", False)
    seen.clear()
    with RunWriter(path, calibration_json=CAL) as w:
        w.append_many([record(5)])
    assert seen == [] and len(read_run(path, matrices=False).keys) == 6


def test_ctrl_c_during_a_commit_is_held_until_the_block_is_committed(tmp_path, monkeypatch):
    # Ctrl-C arrives after the rows of a block are flushed and before the counter that makes
    # them count: the commit finishes first, then the KeyboardInterrupt comes. Python's own
    # Ctrl-C handler for the test: a pytest-xdist worker process ignores SIGINT (its
    # controller stops it), and a process that ignores Ctrl-C rightly gets no KeyboardInterrupt.
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        _ctrl_c_during_a_commit(tmp_path, monkeypatch)
    finally:
        signal.signal(signal.SIGINT, previous)


def _ctrl_c_during_a_commit(tmp_path, monkeypatch):
    path = tmp_path / "run.h5"
    real_fsync = os.fsync
    sent = []

    def fsync_then_ctrl_c(fd):
        real_fsync(fd)
        if not sent:
            sent.append(True)
            os.kill(os.getpid(), signal.SIGINT)

    with RunWriter(path, calibration_json=CAL) as w:
        w.append_many([record(i) for i in range(2)])
        monkeypatch.setattr(os, "fsync", fsync_then_ctrl_c)
        with pytest.raises(KeyboardInterrupt):
            w.append_many([record(i) for i in range(2, 5)])
        monkeypatch.undo()
        assert sent and w.n_shots == 5
    check_exact(path, 5)
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler
