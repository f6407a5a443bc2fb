"""Live watch: detecting completed frame files (FolderWatcher) and the watch loop.

"Complete" is our own rule (size and time unchanged between two polls and for the settle
time, and the file opens and its last frame reads); the reference for valid/truncated TIFF is tifffile itself
(common practice, no source).
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.errors import FrameFileError
from latticeread.runs.watch import FolderWatcher, validate_frame_file


def _tiff_bytes(n_frames: int = 1, shape=(16, 16), seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    buf = io.BytesIO()
    tifffile.imwrite(buf, rng.integers(100, 1000, size=(n_frames, *shape), dtype=np.uint16),
                     photometric="minisblack")
    return buf.getvalue()


def _touch(path, data: bytes, *, mtime_ns: int | None = None):
    path.write_bytes(data)
    if mtime_ns is not None:
        os.utime(path, ns=(mtime_ns, mtime_ns))


def test_file_is_reported_only_when_complete(tmp_path):
    data = _tiff_bytes(3)
    shot = tmp_path / "shot_001.tif"
    w = FolderWatcher(tmp_path, settle=0)
    _touch(shot, data[: len(data) // 2], mtime_ns=10**18)  # the camera is half-way through
    assert w.poll() == []                      # first sight
    assert w.poll() == []                      # size stable but the TIFF is truncated
    assert w.pending == [shot.resolve()]
    _touch(shot, data, mtime_ns=10**18 + 1)  # finished
    assert w.poll() == []                      # changed since last poll: wait one more
    events = w.poll()
    assert [(e.path.name, e.status) for e in events] == [("shot_001.tif", "ready")]
    assert w.poll() == []                      # reported once
    assert w.pending == []


def test_growing_file_is_not_reported(tmp_path):
    data = _tiff_bytes(2)
    shot = tmp_path / "s.tif"
    w = FolderWatcher(tmp_path, settle=0)
    for k, end in enumerate((100, 400, 700, len(data))):
        _touch(shot, data[:end], mtime_ns=10**18 + k)
        assert w.poll() == []
    assert [e.status for e in w.poll()] == ["ready"]


def test_corrupt_and_empty_files_are_reported_broken_once(tmp_path):
    (tmp_path / "junk.tif").write_bytes(b"this is not a tiff" * 10)
    (tmp_path / "empty.tif").write_bytes(b"")
    w = FolderWatcher(tmp_path, give_up_polls=3, settle=0)
    seen = []
    for _ in range(6):
        seen += w.poll()
    assert sorted((e.path.name, e.status) for e in seen) == [("empty.tif", "broken"), ("junk.tif", "broken")]
    reasons = {e.path.name: e.reason for e in seen}
    assert reasons["empty.tif"] == "empty.tif is empty"
    assert reasons["junk.tif"]  # the reader's message, whatever it is, is passed on


def test_hidden_excluded_and_other_files_are_ignored(tmp_path):
    data = _tiff_bytes()
    (tmp_path / ".writing.tif").write_bytes(data)
    (tmp_path / "notes.txt").write_text("hello")
    (tmp_path / "live.h5").write_bytes(b"run file")
    (tmp_path / "a.tif").write_bytes(data)
    w = FolderWatcher(tmp_path, exclude=[tmp_path / "live.h5"], settle=0)
    events = w.poll() + w.poll()
    assert [e.path.name for e in events] == ["a.tif"]


def test_new_only_skips_existing_files(tmp_path):
    data = _tiff_bytes()
    (tmp_path / "old.tif").write_bytes(data)
    w = FolderWatcher(tmp_path, include_existing=False, settle=0)
    assert w.poll() == []
    (tmp_path / "new.tif").write_bytes(data)
    events = w.poll() + w.poll() + w.poll()
    assert [e.path.name for e in events] == ["new.tif"]


def test_rewritten_file_is_reported_again(tmp_path):
    shot = tmp_path / "s.tif"
    _touch(shot, _tiff_bytes(seed=1), mtime_ns=10**18)
    w = FolderWatcher(tmp_path, settle=0)
    assert [e.status for e in w.poll() + w.poll()] == ["ready"]
    _touch(shot, _tiff_bytes(seed=2), mtime_ns=10**18 + 5)
    assert [e.status for e in w.poll() + w.poll()] == ["ready"]


def test_events_come_in_natural_order(tmp_path):
    data = _tiff_bytes()
    for name in ("shot_10.tif", "shot_2.tif", "shot_1.tif"):
        (tmp_path / name).write_bytes(data)
    w = FolderWatcher(tmp_path, settle=0)
    w.poll()
    assert [e.path.name for e in w.poll()] == ["shot_1.tif", "shot_2.tif", "shot_10.tif"]


def test_watching_a_missing_folder(tmp_path):
    with pytest.raises(FrameFileError, match="not a folder"):
        FolderWatcher(tmp_path / "nope")


def test_validate_frame_file_counts_frames(tmp_path):
    (tmp_path / "s.tif").write_bytes(_tiff_bytes(4))
    assert validate_frame_file(tmp_path / "s.tif") == 4


# --- the watch loop with the real pipeline ------------------------------------------------------

def test_watch_reconstructs_new_files_as_they_arrive(tmp_path):
    from latticeread.io.run_file import read_run
    from latticeread.runs.watch import watch_folder

    from test_batch import make_dataset

    src = tmp_path / "made"
    cal, paths, _ = make_dataset(src, n_files=3, frames_per_file=1, seed=11)
    live = tmp_path / "camera"
    live.mkdir()
    (live / "shot_0.tif").write_bytes(paths[0].read_bytes())  # there before the watch starts
    arrivals = [paths[1].read_bytes(), paths[2].read_bytes()]
    state = {"polls": 0}

    def camera(_seconds):  # the "camera" writes between polls: half a file, then the rest
        state["polls"] += 1
        if state["polls"] == 2:
            data = arrivals.pop(0)
            (live / "shot_1.tif").write_bytes(data[: len(data) // 2])
            state["rest"] = data
        elif state["polls"] == 4:
            (live / "shot_1.tif").write_bytes(state["rest"])
        elif state["polls"] == 6:
            (live / "shot_2.tif").write_bytes(arrivals.pop(0))
        elif state["polls"] > 60:
            raise AssertionError("the watch did not stop")

    lines = []
    summary = watch_folder(live, calibration=cal, out=live / "live.h5", max_files=3, on_shot=lambda o, s:
                           lines.append(s.describe(o)), sleep=camera, settle=0)
    run = read_run(live / "live.h5")
    assert [Path(s).name for s in run.source] == ["shot_0.tif", "shot_1.tif", "shot_2.tif"]
    assert len(run.failures) == 0  # the half-written file was waited for, not failed
    assert summary.n_new == 3 and len(lines) == 3
    assert "mean" in lines[-1] and "over 3 frames" in lines[-1]
    # the watch gives the same bits as a batch run of the same files
    from latticeread.runs.batch import run_batch

    from test_batch import assert_runs_identical

    run_batch([live / f"shot_{k}.tif" for k in range(3)], calibration=cal, out=tmp_path / "batch.h5", workers=0,
              progress=False)
    assert_runs_identical(run, read_run(tmp_path / "batch.h5"))


def test_watch_records_broken_files_and_stops_cleanly_on_ctrl_c(tmp_path):
    from latticeread.io.run_file import read_run
    from latticeread.runs.watch import watch_folder

    from test_batch import make_dataset

    cal, _, _ = make_dataset(tmp_path / "made", n_files=1, frames_per_file=1, seed=12)
    live = tmp_path / "camera"
    live.mkdir()
    (live / "junk.tif").write_bytes(b"II*\x00" + b"\x00" * 40)  # unchanged and never readable
    polls = []

    def ctrl_c_after_a_while(_seconds):
        polls.append(1)
        if len(polls) == 15:
            raise KeyboardInterrupt

    summary = watch_folder(live, calibration=cal, out=tmp_path / "live.h5", sleep=ctrl_c_after_a_while,
                           settle=0)
    assert any("interrupted" in w for w in summary.warnings)
    run = read_run(tmp_path / "live.h5")
    assert len(run) == 0 and len(run.failures) == 1
    assert run.failures.frame_index.tolist() == [-1]


def test_watch_command_line(tmp_path, capsys):
    from latticeread.cli import main
    from latticeread.io.calibration_file import save_calibration

    from test_batch import make_dataset

    cal, _, _ = make_dataset(tmp_path, n_files=2, frames_per_file=1, seed=13)
    save_calibration(tmp_path / "cal.json", cal)
    code = main(["watch", str(tmp_path), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "live.h5"),
                 "--max-files", "2", "--interval", "0.01"])
    out = capsys.readouterr().out
    assert code == 0
    assert "shot_0.tif[0]" in out and "shot_1.tif[0]" in out and "2 frames" in out
    code = main(["watch", str(tmp_path), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "live.h5"),
                 "--max-files", "2", "--interval", "0.01", "--quiet"])
    out = capsys.readouterr().out
    assert code == 0 and "0 frames written" in out and "2 already done" in out  # resumed, nothing twice


def test_watch_rejects_a_non_positive_interval(tmp_path, capsys):
    from latticeread.cli import main

    with pytest.raises(SystemExit) as exit_info:
        main(["watch", str(tmp_path), "-c", "cal.json", "-o", "live.h5", "--interval", "0"])
    assert exit_info.value.code == 2
    assert "must be a positive number" in capsys.readouterr().err


def test_live_run_steps_keep_files_beyond_max_files_for_later(tmp_path):
    from latticeread.runs.watch import LiveRun

    from test_batch import make_dataset

    cal, _, _ = make_dataset(tmp_path / "cam", n_files=2, frames_per_file=1, seed=14)
    with LiveRun(tmp_path / "cam", calibration=cal, out=tmp_path / "live.h5", settle=0) as live:
        assert live.step() == []                              # first sight of both files
        first = live.step(max_files=1)                        # both complete; only one handled
        assert [Path(o.key.source).name for o in first] == ["shot_0.tif"]
        second = live.step()                                  # the other was kept, not lost
        assert [Path(o.key.source).name for o in second] == ["shot_1.tif"]
        assert live.stats.n_shots == 2 and np.isfinite(live.stats.mean_filling)
    assert live.summary().n_shots_total == 2
