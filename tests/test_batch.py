"""Batch runs: input discovery, planning, the run over a data set, faults and resume.

References: the content hash is BLAKE2b (RFC 7693) as implemented by Python's hashlib; a
batch run must store exactly what the pipeline's Reconstructor gives for each frame when
called directly (the batch layer adds bookkeeping, never numbers); the occupation is also
compared with the forward model's truth (latticeread.core.simulate). Frames are tiny
(128x128, 256 sites) so the whole file runs in seconds.
"""

from __future__ import annotations

import hashlib
import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.core.calibration import Calibration
from latticeread.core.simulate import demo_scenario, simulate_frames
from latticeread.errors import ExportError, FrameFileError
from latticeread.io.calibration_file import save_calibration
from latticeread.io.run_file import ShotKey, read_run
from latticeread.runs.batch import find_input_files, hash_file, plan_shots

SHAPE = (128, 128)
THRESHOLD = 450.0  # photons: half the demo's 900 detected photons per atom


def make_dataset(folder: Path, *, n_files: int = 3, frames_per_file: int = 2, seed: int = 0,
                 prefix: str = "shot"):
    """Write simulated TIFF files and return (calibration, paths, truth).

    The calibration is the simulation's own geometry, PSF and camera with a fixed threshold,
    so the test does not depend on the calibrate step.
    """
    kw = demo_scenario("square", frame_shape=SHAPE)
    kw.pop("pixel_size_nm")
    kw["region"] = ("rectangle", 16, 16)
    frames, truth = simulate_frames(**kw, n_shots=n_files * frames_per_file, phase_jitter=0.2, rng=seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k in range(n_files):
        path = folder / f"{prefix}_{k}.tif"
        tifffile.imwrite(path, frames[k * frames_per_file:(k + 1) * frames_per_file], photometric="minisblack")
        paths.append(path)
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=SHAPE,
                      threshold=THRESHOLD)
    return cal, paths, truth


def truncated_tiff(path: Path, seed: int = 3) -> Path:
    buf = io.BytesIO()
    tifffile.imwrite(buf, np.random.default_rng(seed).integers(0, 500, (2, *SHAPE), dtype=np.uint16),
                     photometric="minisblack")
    path.write_bytes(buf.getvalue()[: len(buf.getvalue()) // 3])
    return path


# --- inputs and planning (no reconstruction) --------------------------------------------------

def test_find_input_files_folders_globs_files(tmp_path):
    for name in ("shot_10.tif", "shot_2.tif", "shot_1.tif", ".hidden.tif", "notes.txt", "run.h5"):
        (tmp_path / name).write_bytes(b"x")
    sub = tmp_path / "day2"
    sub.mkdir()
    (sub / "b.npy").write_bytes(b"x")
    got = find_input_files([tmp_path, str(sub / "*.npy"), tmp_path / "shot_1.tif"],
                           exclude=[tmp_path / "run.h5"])
    names = [p.name for p in got]
    assert names == ["shot_1.tif", "shot_2.tif", "shot_10.tif", "b.npy"]  # natural order, once each
    assert all(p.is_absolute() for p in got)
    # recursive glob
    assert [p.name for p in find_input_files([str(tmp_path / "**" / "*.npy")])] == ["b.npy"]


def test_missing_input(tmp_path):
    with pytest.raises(FrameFileError, match="does not exist"):
        find_input_files([tmp_path / "nope.tif"])


def test_empty_folder(tmp_path):
    with pytest.raises(FrameFileError, match="holds no frame files"):
        find_input_files([tmp_path])


def test_glob_without_match(tmp_path):
    with pytest.raises(FrameFileError, match="no frame file matches"):
        find_input_files([str(tmp_path / "*.tif")])


def test_hash_is_blake2b_of_the_bytes(tmp_path):
    data = os.urandom(3 * (1 << 20) + 17)  # several read blocks
    (tmp_path / "f.bin").write_bytes(data)
    assert hash_file(tmp_path / "f.bin") == hashlib.blake2b(data, digest_size=16).hexdigest()


def test_plan_counts_frames_and_skips_done_and_failed(tmp_path):
    _, paths, _ = make_dataset(tmp_path, n_files=2, frames_per_file=3)
    bad = truncated_tiff(tmp_path / "bad.tif")
    files = [p.resolve() for p in [*paths, bad]]
    plan = plan_shots(files)
    assert len(plan.tasks) == 6 and plan.n_files == 3
    assert [k.frame_index for k in plan.tasks] == [0, 1, 2, 0, 1, 2]
    assert len(plan.failures) == 1
    failure = plan.failures[0]
    assert failure.key.frame_index == -1 and failure.key.source == str(files[2])
    assert failure.error == "FrameFileError"
    h0 = hash_file(files[0])
    done = {ShotKey(str(files[0]), h0, 0)}
    failed = {ShotKey(str(files[0]), h0, 1), failure.key}
    plan = plan_shots(files, done=done, failed=failed)
    assert len(plan.tasks) == 4 and plan.n_done_before == 1 and plan.n_failed_before == 2
    assert plan.failures == []
    plan = plan_shots(files, done=done, failed=failed, retry_failed=True)
    assert len(plan.tasks) == 5 and len(plan.failures) == 1


def test_changed_file_is_a_new_shot(tmp_path):
    _, paths, _ = make_dataset(tmp_path, n_files=1, frames_per_file=1)
    path = paths[0].resolve()
    old = plan_shots([path]).tasks[0]
    tifffile.imwrite(path, np.full((1, *SHAPE), 300, np.uint16), photometric="minisblack")
    new = plan_shots([path], done={old}).tasks
    assert len(new) == 1 and new[0].file_hash != old.file_hash


def test_unwritable_output_stops_before_any_work(tmp_path):
    from latticeread.runs.batch import run_batch

    cal, _, _ = make_dataset(tmp_path, n_files=1, frames_per_file=1)
    with pytest.raises(ExportError, match="not writable"):
        run_batch([tmp_path], calibration=cal, out="/proc/run.h5", workers=0, progress=False)


def test_empty_folder_on_the_command_line(tmp_path, capsys):
    from latticeread.cli import main

    cal, _, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=1)
    save_calibration(tmp_path / "cal.json", cal)
    (tmp_path / "empty").mkdir()
    code = main(["batch", str(tmp_path / "empty"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "r.h5"),
                 "--no-progress"])
    assert code == 3
    assert "holds no frame files" in capsys.readouterr().err
    assert not (tmp_path / "r.h5").exists()
