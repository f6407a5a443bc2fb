"""Live watch: detecting completed frame files (FolderWatcher) and the watch loop.

"Complete" is our own rule (size and time unchanged between two polls and the file opens
and its last frame reads); the reference for valid/truncated TIFF is tifffile itself
(common practice, no source).
"""

from __future__ import annotations

import io
import os

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
    w = FolderWatcher(tmp_path)
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
    w = FolderWatcher(tmp_path)
    for k, end in enumerate((100, 400, 700, len(data))):
        _touch(shot, data[:end], mtime_ns=10**18 + k)
        assert w.poll() == []
    assert [e.status for e in w.poll()] == ["ready"]


def test_corrupt_and_empty_files_are_reported_broken_once(tmp_path):
    (tmp_path / "junk.tif").write_bytes(b"this is not a tiff" * 10)
    (tmp_path / "empty.tif").write_bytes(b"")
    w = FolderWatcher(tmp_path, give_up_polls=3)
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
    w = FolderWatcher(tmp_path, exclude=[tmp_path / "live.h5"])
    events = w.poll() + w.poll()
    assert [e.path.name for e in events] == ["a.tif"]


def test_new_only_skips_existing_files(tmp_path):
    data = _tiff_bytes()
    (tmp_path / "old.tif").write_bytes(data)
    w = FolderWatcher(tmp_path, include_existing=False)
    assert w.poll() == []
    (tmp_path / "new.tif").write_bytes(data)
    events = w.poll() + w.poll() + w.poll()
    assert [e.path.name for e in events] == ["new.tif"]


def test_rewritten_file_is_reported_again(tmp_path):
    shot = tmp_path / "s.tif"
    _touch(shot, _tiff_bytes(seed=1), mtime_ns=10**18)
    w = FolderWatcher(tmp_path)
    assert [e.status for e in w.poll() + w.poll()] == ["ready"]
    _touch(shot, _tiff_bytes(seed=2), mtime_ns=10**18 + 5)
    assert [e.status for e in w.poll() + w.poll()] == ["ready"]


def test_events_come_in_natural_order(tmp_path):
    data = _tiff_bytes()
    for name in ("shot_10.tif", "shot_2.tif", "shot_1.tif"):
        (tmp_path / name).write_bytes(data)
    w = FolderWatcher(tmp_path)
    w.poll()
    assert [e.path.name for e in w.poll()] == ["shot_1.tif", "shot_2.tif", "shot_10.tif"]


def test_watching_a_missing_folder(tmp_path):
    with pytest.raises(FrameFileError, match="not a folder"):
        FolderWatcher(tmp_path / "nope")


def test_validate_frame_file_counts_frames(tmp_path):
    (tmp_path / "s.tif").write_bytes(_tiff_bytes(4))
    assert validate_frame_file(tmp_path / "s.tif") == 4
