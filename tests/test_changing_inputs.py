"""Inputs that change under the program: a file replaced under the same name, a camera that
appends frames to one TIFF. Each is a new input or an incomplete one, never stale pixels."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.io.run_file import ShotKey
from latticeread.runs.batch import ShotFailure, ShotReconstructor, hash_file
from latticeread.runs.watch import FolderWatcher, validate_frame_file

from test_batch import make_dataset


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    folder = tmp_path_factory.mktemp("changing")
    return make_dataset(folder, n_files=2, frames_per_file=1, seed=21)


def _key(path: Path, frame: int = 0) -> ShotKey:
    return ShotKey(str(path), hash_file(path), frame)


def test_a_file_replaced_under_the_same_name_is_read_again(dataset, tmp_path):
    cal, paths, _ = dataset
    shot = tmp_path / "shot.tif"
    shot.write_bytes(paths[0].read_bytes())
    rec = ShotReconstructor(cal)
    first = rec(_key(shot))
    tmp = tmp_path / ".incoming.tif"
    tmp.write_bytes(paths[1].read_bytes())
    os.replace(tmp, shot)  # the camera software replaces the file
    second = rec(_key(shot))
    fresh = ShotReconstructor(cal)(_key(paths[1]))
    rec.close()
    assert not isinstance(second, ShotFailure)
    assert second.key.file_hash != first.key.file_hash
    np.testing.assert_array_equal(second.amplitude, fresh.amplitude)
    assert not np.array_equal(second.amplitude, first.amplitude)


def test_a_file_rewritten_in_place_is_read_again(dataset, tmp_path):
    cal, paths, _ = dataset
    shot = tmp_path / "shot.tif"
    shot.write_bytes(paths[0].read_bytes())
    rec = ShotReconstructor(cal)
    rec(_key(shot))
    shot.write_bytes(paths[1].read_bytes())  # same size, same inode, new content
    os.utime(shot, ns=(shot.stat().st_mtime_ns + 10**9,) * 2)
    again = rec(_key(shot))
    rec.close()
    np.testing.assert_array_equal(again.amplitude, ShotReconstructor(cal)(_key(paths[1])).amplitude)


def test_a_file_that_changed_since_it_was_listed_is_a_failure_not_a_result(dataset, tmp_path):
    cal, paths, _ = dataset
    shot = tmp_path / "shot.tif"
    shot.write_bytes(paths[0].read_bytes())
    listed = _key(shot)
    shot.write_bytes(paths[1].read_bytes())
    outcome = ShotReconstructor(cal)(listed)
    assert isinstance(outcome, ShotFailure)
    assert "changed after it was listed" in outcome.reason


# --- an appending camera ---------------------------------------------------------------------

class _Clock:
    def __init__(self):
        self.now = 2.0e9  # seconds on the wall clock, shared with the files' times

    def __call__(self):
        return self.now


def _append_frame(path: Path, frame: np.ndarray, clock: _Clock) -> None:
    tifffile.imwrite(path, frame, append=True, photometric="minisblack", metadata=None)
    os.utime(path, ns=(int(clock.now * 1e9),) * 2)


def test_a_file_that_grows_frame_by_frame_is_taken_once_when_complete(tmp_path):
    frames = np.random.default_rng(5).integers(100, 1000, size=(8, 16, 16), dtype=np.uint16)
    clock = _Clock()
    shot = tmp_path / "shot.tif"
    watcher = FolderWatcher(tmp_path, settle=1.0, clock=clock)
    events = []
    for k in range(8):  # one frame every 0.6 s; the watcher looks every 0.2 s
        _append_frame(shot, frames[k], clock)
        for _ in range(3):
            events += watcher.poll()
            clock.now += 0.2
    assert events == []  # readable between frames, but never unchanged for the settle time
    for _ in range(6):
        events += watcher.poll()
        clock.now += 0.2
    assert [(e.path.name, e.status) for e in events] == [("shot.tif", "ready")]
    assert validate_frame_file(shot) == 8


def test_without_a_settle_time_a_pausing_writer_is_taken_too_early(tmp_path):
    # the behaviour the settle time prevents: the same writer, taken at its first pause
    frames = np.random.default_rng(5).integers(100, 1000, size=(3, 16, 16), dtype=np.uint16)
    clock = _Clock()
    watcher = FolderWatcher(tmp_path, settle=0, clock=clock)
    _append_frame(tmp_path / "shot.tif", frames[0], clock)
    events = watcher.poll() + watcher.poll()
    assert [e.status for e in events] == ["ready"]


def test_a_future_modification_time_waits_from_when_the_change_was_seen(tmp_path):
    clock = _Clock()
    frame = np.arange(256, dtype=np.uint16).reshape(16, 16)
    shot = tmp_path / "shot.tif"
    tifffile.imwrite(shot, frame, photometric="minisblack")
    os.utime(shot, ns=(int((clock.now + 3600) * 1e9),) * 2)  # a share whose clock runs an hour ahead
    watcher = FolderWatcher(tmp_path, settle=1.0, clock=clock)
    events = []
    for _ in range(4):
        events += watcher.poll()
        clock.now += 0.2
    assert events == []
    for _ in range(3):
        events += watcher.poll()
        clock.now += 0.2
    assert [e.status for e in events] == ["ready"]


def test_settle_time_must_not_be_negative(tmp_path):
    with pytest.raises(ValueError, match="settle time must be 0 or more seconds"):
        FolderWatcher(tmp_path, settle=-1)


def test_watch_takes_an_appending_camera_file_once_with_every_frame(dataset, tmp_path):
    from latticeread.io.run_file import read_run
    from latticeread.runs.watch import watch_folder

    cal, paths, _ = dataset
    frames = np.concatenate([tifffile.imread(p)[None] if tifffile.imread(p).ndim == 2 else tifffile.imread(p)
                             for p in paths] * 2)  # 4 frames
    camera = tmp_path / "camera"
    camera.mkdir()
    shot = camera / "shot.tif"
    written = {"n": 0, "polls": 0}

    def camera_between_polls(_seconds):
        import time

        written["polls"] += 1
        if written["polls"] % 3 == 1 and written["n"] < len(frames):  # a frame every 3 polls
            tifffile.imwrite(shot, frames[written["n"]], append=True, photometric="minisblack", metadata=None)
            written["n"] += 1
        time.sleep(0.05)

    summary = watch_folder(camera, calibration=cal, out=tmp_path / "live.h5", max_files=1, settle=1.0,
                           sleep=camera_between_polls)
    run = read_run(tmp_path / "live.h5")
    assert written["n"] == len(frames)
    assert summary.n_new == len(frames) and len(run.failures) == 0
    assert sorted(run.frame_index.tolist()) == list(range(len(frames)))


def test_the_command_line_and_the_window_share_one_settle_default():
    from latticeread.cli import build_parser
    from latticeread.commands import watch as command
    from latticeread.runs import watch

    assert command.DEFAULT_SETTLE_SECONDS == watch.DEFAULT_SETTLE_SECONDS
    args = build_parser().parse_args(["watch", "folder", "-c", "c.json", "-o", "l.h5"])
    assert args.settle == watch.DEFAULT_SETTLE_SECONDS


# --- a file replaced or truncated under the same name: once per distinct content -------------

def _tiff(frames) -> bytes:
    import io

    buf = io.BytesIO()
    tifffile.imwrite(buf, np.asarray(frames), photometric="minisblack", metadata=None)
    return buf.getvalue()


def _poll(watcher, clock, n):
    events = []
    for _ in range(n):
        events += watcher.poll()
        clock.now += 0.2
    return [(e.path.name, e.status) for e in events]


def test_a_replacement_with_the_same_size_and_time_is_still_a_new_input(tmp_path):
    # the camera computer copies the finished file over the old one keeping its time
    # (cp -p, rsync -t): size and modification time are those of the version already taken
    rng = np.random.default_rng(8)
    first, second = (_tiff(rng.integers(100, 1000, size=(2, 16, 16), dtype=np.uint16)) for _ in range(2))
    assert len(first) == len(second) and first != second
    clock = _Clock()
    shot = tmp_path / "shot.tif"
    shot.write_bytes(first)
    stamp = int((clock.now - 10) * 1e9)
    os.utime(shot, ns=(stamp, stamp))
    watcher = FolderWatcher(tmp_path, settle=1.0, clock=clock)
    assert _poll(watcher, clock, 3) == [("shot.tif", "ready")]
    incoming = tmp_path / ".shot.tif.part"
    incoming.write_bytes(second)
    os.utime(incoming, ns=(stamp, stamp))
    os.replace(incoming, shot)
    assert (shot.stat().st_size, shot.stat().st_mtime_ns) == (len(first), stamp)
    assert _poll(watcher, clock, 3) == [("shot.tif", "ready")]


def test_a_camera_that_restarts_and_writes_the_same_frames_again_is_not_taken_twice(tmp_path):
    frames = np.random.default_rng(9).integers(100, 1000, size=(3, 16, 16), dtype=np.uint16)
    clock = _Clock()
    shot = tmp_path / "shot.tif"
    watcher = FolderWatcher(tmp_path, settle=1.0, clock=clock)
    for k in range(3):
        _append_frame(shot, frames[k], clock)
        _poll(watcher, clock, 1)
    assert _poll(watcher, clock, 8) == [("shot.tif", "ready")]
    shot.write_bytes(b"")  # the acquisition restarts: the file is truncated ...
    os.utime(shot, ns=(int(clock.now * 1e9),) * 2)
    assert _poll(watcher, clock, 2) == []
    for k in range(3):  # ... and the same frames are written again (the first into the empty file)
        tifffile.imwrite(shot, frames[k], append=k > 0, photometric="minisblack", metadata=None)
        os.utime(shot, ns=(int(clock.now * 1e9),) * 2)
        _poll(watcher, clock, 1)
    assert _poll(watcher, clock, 8) == []  # the same content: nothing new to take
    for k in range(2):  # the next acquisition: new frames in the same file
        _append_frame(shot, frames[k] + 1, clock)
    assert _poll(watcher, clock, 8) == [("shot.tif", "ready")]


def test_content_seen_before_under_the_name_is_not_taken_again(tmp_path):
    rng = np.random.default_rng(10)
    a, b = (_tiff(rng.integers(100, 1000, size=(1, 16, 16), dtype=np.uint16)) for _ in range(2))
    clock = _Clock()
    shot = tmp_path / "shot.tif"
    watcher = FolderWatcher(tmp_path, settle=0.5, clock=clock)
    taken = []
    for content in (a, b, a, b, b):
        shot.write_bytes(content)
        os.utime(shot, ns=(int(clock.now * 1e9),) * 2)
        taken += _poll(watcher, clock, 5)
    assert taken == [("shot.tif", "ready")] * 2
