"""An input that grows after part of it was stored: every frame once, none lost.

A camera that appends frames to one TIFF and pauses longer than the watch's settle time is
taken at the pause (the file is unchanged and readable then); when it grows, the new version
is a new input (other content hash). Its first frames are the ones already stored: they are
recognised by a digest of their pixels at the same position in the same file and not stored
again; only the new frames are. The same holds for ``batch`` run again on a file that grew
between the runs. Frames are the batch tests' tiny simulated ones (128 x 128 pixels).
Reference for the digest: BLAKE2b (RFC 7693) as implemented by Python's hashlib.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.io.run_file import read_run
from latticeread.runs.batch import run_batch

from test_batch import make_dataset


@pytest.fixture(scope="module")
def frames(tmp_path_factory):
    """Six simulated frames (distinct exposures) and the calibration that reads them."""
    cal, paths, _ = make_dataset(tmp_path_factory.mktemp("grown"), n_files=1, frames_per_file=6, seed=31)
    return cal, tifffile.imread(paths[0])


def _append(path: Path, stack) -> None:
    for frame in stack:
        tifffile.imwrite(path, frame, append=True, photometric="minisblack", metadata=None)


def _digest(frame) -> str:
    """BLAKE2b-128 of the pixel type, the frame size and the raw pixel bytes."""
    frame = np.ascontiguousarray(frame)
    h = hashlib.blake2b(f"{frame.dtype.str} {frame.shape[0]}x{frame.shape[1]}\n".encode(), digest_size=16)
    h.update(frame.tobytes())
    return h.hexdigest()


def _each_frame_once(run, stack) -> None:
    assert sorted(run.frame_index.tolist()) == list(range(len(stack)))
    # every stored row carries the digest of the pixels it was made from
    assert [_digest(stack[i]) for i in run.frame_index] == run.frame_digest.tolist()


def _watch_a_camera(frames, tmp_path, change):
    """Watch a camera folder whose ``shot.tif`` holds frames 0-2; ``change(shot)`` runs at the 4th poll.

    The 4th poll comes long after the first version was taken (settle 0.02 s), so the watch has
    stored it before the file changes. Returns the summary, the run file read back and the polls.
    """
    import time

    from latticeread.runs.watch import watch_folder

    cal, stack = frames
    camera = tmp_path / "camera"
    camera.mkdir()
    shot = camera / "shot.tif"
    _append(shot, stack[:3])
    polls = {"n": 0}

    def camera_changes_the_file(_seconds):
        polls["n"] += 1
        if polls["n"] == 4:
            change(shot)
        elif polls["n"] > 200:
            raise AssertionError("the watch did not take the changed file")
        time.sleep(0.03)

    summary = watch_folder(camera, calibration=cal, out=tmp_path / "live.h5", max_files=2, settle=0.02,
                           interval=0.03, sleep=camera_changes_the_file)
    assert polls["n"] >= 4  # the camera did change the file after the first version was stored
    return summary, read_run(tmp_path / "live.h5")


def test_watch_stores_each_frame_of_a_pausing_appending_camera_once(frames, tmp_path):
    _, stack = frames
    summary, run = _watch_a_camera(frames, tmp_path, lambda shot: _append(shot, stack[3:]))
    assert len(run) == 6 and len(run.failures) == 0
    _each_frame_once(run, stack)
    assert len(set(run.file_hash.tolist())) == 2  # frames 0-2 from the first version, 3-5 from the grown one
    assert summary.n_new == 6 and summary.n_skipped_same == 3


def test_watch_stores_a_file_replaced_under_the_same_name_with_its_new_pixels(frames, tmp_path):
    # The camera software replaces shot.tif (write elsewhere, rename over it) after the watch
    # stored the first version: the new version is a new input, read from the new file, never
    # from the analyser's open handle of the old one (cached stacks are keyed by content).
    import os

    _, stack = frames

    def replace_the_file(shot):
        incoming = tmp_path / "incoming.tif"
        _append(incoming, stack[3:])
        os.replace(incoming, shot)

    summary, run = _watch_a_camera(frames, tmp_path, replace_the_file)
    assert summary.n_new == 6 and len(run.failures) == 0
    versions = sorted(set(run.file_hash.tolist()), key=run.file_hash.tolist().index)
    assert len(versions) == 2
    for version, pixels in zip(versions, (stack[:3], stack[3:])):
        rows = run.file_hash == version
        assert sorted(run.frame_index[rows].tolist()) == [0, 1, 2]
        # each row carries the digest of the pixels it was reconstructed from: the new file's
        assert [_digest(pixels[i]) for i in run.frame_index[rows]] == run.frame_digest[rows].tolist()


def _batch(cal, data, out):
    return run_batch([data], calibration=cal, out=out, workers=0, progress=False)


def _data_folder(tmp_path, frames_in_shot):
    data = tmp_path / "data"
    data.mkdir()
    _append(data / "shot.tif", frames_in_shot)
    return data


def test_batch_run_again_on_a_file_that_grew_stores_only_the_new_frames(frames, tmp_path):
    cal, stack = frames
    data = _data_folder(tmp_path, stack[:3])
    first = _batch(cal, data, tmp_path / "run.h5")
    assert first.n_new == 3
    _append(data / "shot.tif", stack[3:])
    again = _batch(cal, data, tmp_path / "run.h5")
    assert (again.n_new, again.n_skipped_same, again.n_failed) == (3, 3, 0)
    run = read_run(tmp_path / "run.h5")
    assert len(run) == 6
    _each_frame_once(run, stack)
    third = _batch(cal, data, tmp_path / "run.h5")
    assert third.n_new == 0 and len(read_run(tmp_path / "run.h5")) == 6  # nothing left to do


def test_a_replaced_file_with_new_pixels_is_stored_in_full(frames, tmp_path):
    # The other side of the rule: the same name with other exposures is a new input, all of it.
    cal, stack = frames
    data = _data_folder(tmp_path, stack[:3])
    _batch(cal, data, tmp_path / "run.h5")
    (data / "shot.tif").unlink()
    _append(data / "shot.tif", stack[3:])
    again = _batch(cal, data, tmp_path / "run.h5")
    assert (again.n_new, again.n_skipped_same) == (3, 0)
    run = read_run(tmp_path / "run.h5")
    assert sorted(run.frame_index.tolist()) == [0, 0, 1, 1, 2, 2]
    assert len(set(run.frame_digest.tolist())) == 6


def test_repeated_frames_inside_one_file_are_all_stored(frames, tmp_path):
    # Two positions of one file with equal pixels are two frames (a tiled test stack, a camera
    # that sent the same blank frame twice): only the same position of the same file is one frame.
    cal, stack = frames
    data = _data_folder(tmp_path, [stack[0], stack[0]])
    summary = _batch(cal, data, tmp_path / "run.h5")
    assert summary.n_new == 2 and len(read_run(tmp_path / "run.h5")) == 2


# --- the run-file layer: the guard under every front end, and files of format 4 -------------

def _record(i: int, *, file_hash: str, digest: str, source: str = "/data/shot.tif"):
    from dataclasses import replace

    from test_run_file import _record as make

    return replace(make(i, source=source, file_hash=file_hash), frame_digest=digest)


def test_the_writer_never_stores_a_frame_it_holds_from_an_earlier_version(tmp_path):
    from test_run_file import CAL

    from latticeread.io.run_file import RunWriter

    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        assert w.append_many([_record(i, file_hash="aa" * 16, digest=f"{i:032x}") for i in range(2)]) == 2
    with RunWriter(path, calibration_json=CAL) as w:  # resumed: the digests are read back
        grown = [_record(i, file_hash="bb" * 16, digest=f"{i:032x}") for i in range(3)]
        assert w.append_many(grown) == 1  # only frame 2 is new
        assert {k.frame_index for k in w.done if k.file_hash == "bb" * 16} == {0, 1, 2}
        # the same pixels at another position, or in another file, are other frames
        assert w.append(_record(3, file_hash="bb" * 16, digest=f"{0:032x}"))
        assert w.append(_record(0, file_hash="cc" * 16, digest=f"{0:032x}", source="/data/copy.tif"))
    run = read_run(path)
    assert sorted(zip(run.source, run.frame_index, run.frame_digest)) == sorted(
        [("/data/shot.tif", i, f"{i:032x}") for i in range(3)] + [("/data/shot.tif", 3, f"{0:032x}"),
                                                                  ("/data/copy.tif", 0, f"{0:032x}")])


def _as_format_4(path) -> None:
    """Turn a run file into one of format 4: no frame digests."""
    import h5py

    with h5py.File(path, "r+") as f:
        del f["frames/frame_digest"]
        f.attrs["format_version"] = 4


def test_a_format_4_file_reads_and_resumes_with_unknown_digests(tmp_path, caplog):
    from test_run_file import CAL

    from latticeread.io.results import read_results
    from latticeread.io.run_file import RUN_FORMAT_VERSION, RunWriter
    from latticeread.runs.batch import plan_shots

    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append_many([_record(i, file_hash="aa" * 16, digest=f"{i:032x}") for i in range(2)])
    _as_format_4(path)
    old = read_run(path)
    assert len(old) == 2 and old.frame_digest.tolist() == ["", ""]
    arrays, settings = read_results(path)
    assert settings["format_version"] == 4 and arrays["frame_digest"].tolist() == ["", ""]
    frames = tmp_path / "shot.tif"
    _append(frames, np.zeros((3, 4, 4), np.uint16) + np.arange(3)[:, None, None].astype(np.uint16))
    with RunWriter(path, calibration_json=CAL) as w:  # converted to the current format
        stored = w.stored_digests
        assert stored == {("/data/shot.tif", 0): {""}, ("/data/shot.tif", 1): {""}}
        # a grown file over rows whose pixels were never recorded: stored again, with a warning
        stored = {(str(frames), i): {""} for i in range(2)}
        plan = plan_shots([frames], done=w.done, stored=stored)
        assert [k.frame_index for k in plan.tasks] == [0, 1, 2] and plan.same == []
        assert "did not record frame pixels" in caplog.text
        assert w.append(_record(0, file_hash="bb" * 16, digest=f"{0:032x}"))  # unknown is not "the same"
    run = read_run(path)
    assert run.frame_digest.tolist() == ["", "", f"{0:032x}"]
    # rows from before format 6 have no offset error or method: NaN and empty, not zeros
    assert np.isnan(run.offset_sigma[:2]).all() and run.offset_method.tolist()[:2] == ["", ""]
    import h5py

    with h5py.File(path, "r") as f:
        assert f.attrs["format_version"] == RUN_FORMAT_VERSION >= 5  # converted; digests from format 5 on


def test_the_readers_of_run_files_take_format_5_and_format_4(frames, tmp_path):
    # read_results is checked above; here the fidelity command's reader (its whole analysis on a
    # run file is tests/test_faults_batch.py's, at seconds per run) and the observables command.
    import argparse
    import shutil

    from latticeread.cli import main
    from latticeread.commands import fidelity
    from latticeread.io.observables_file import read_occupation_input

    cal, stack = frames
    _batch(cal, _data_folder(tmp_path, stack), tmp_path / "run5.h5")
    shutil.copy(tmp_path / "run5.h5", tmp_path / "run4.h5")
    _as_format_4(tmp_path / "run4.h5")
    read = {}
    for name in ("run5.h5", "run4.h5"):
        path = tmp_path / name
        assert fidelity._results_kind(path) == "run"
        read[name] = fidelity._run_file(path, argparse.Namespace(images_per_shot=2))
        assert len(read_occupation_input(path).occupation) == 6
        assert main(["observables", str(path), "--out", str(tmp_path / f"{name}.obs.h5"), "--bootstrap", "10",
                     "-q"]) == 0
    for new, old in zip(read["run5.h5"][:3], read["run4.h5"][:3]):
        np.testing.assert_array_equal(new, old)
    assert read["run5.h5"][0].shape[:2] == (3, 2)  # 3 shots of 2 images
