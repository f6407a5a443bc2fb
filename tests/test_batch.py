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
                 prefix: str = "shot", images_per_shot: int = 1):
    """Write simulated TIFF files and return (calibration, paths, truth).

    The calibration is the simulation's own geometry, PSF and camera with a fixed threshold,
    so the test does not depend on the calibrate step.
    """
    kw = demo_scenario("square", frame_shape=SHAPE)
    kw.pop("pixel_size_nm")
    kw["region"] = ("rectangle", 16, 16)
    frames, truth = simulate_frames(**kw, n_shots=n_files * frames_per_file // images_per_shot,
                                    images_per_shot=images_per_shot, phase_jitter=0.2, rng=seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k in range(n_files):
        path = folder / f"{prefix}_{k}.tif"
        tifffile.imwrite(path, frames[k * frames_per_file:(k + 1) * frames_per_file], photometric="minisblack")
        paths.append(path)
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = [int(rows.min()), int(rows.max()), int(cols.min()), int(cols.max())]
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=SHAPE,
                      threshold=THRESHOLD, notes={"index_bounds": bounds})
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


# --- the run (needs the pipeline) -------------------------------------------------------------

def assert_runs_identical(a, b):
    """Every stored array equal byte for byte (only the wall-clock write times may differ)."""
    assert len(a) == len(b)
    for name in ("source", "file_hash", "frame_index", "occupation", "amplitude", "p_occupied", "x", "y",
                 "flags", "offset", "a1", "a2", "threshold", "n_sites", "n_occupied", "filling",
                 "peak_to_background", "lattice_residual", "frame_digest"):
        va, vb = np.asarray(getattr(a, name)), np.asarray(getattr(b, name))
        assert va.dtype == vb.dtype and va.shape == vb.shape, name
        if va.dtype.kind in "fiub":
            assert va.tobytes() == vb.tobytes(), name
        else:
            assert va.tolist() == vb.tolist(), name
    assert a.warnings == b.warnings
    for name in ("source", "file_hash", "frame_index", "error", "reason", "resolved"):
        assert np.asarray(getattr(a.failures, name)).tolist() == np.asarray(getattr(b.failures, name)).tolist()


def test_run_stores_what_the_pipeline_gives_and_records_failures(tmp_path):
    from latticeread.core.pipeline import Reconstructor
    from latticeread.runs.batch import run_batch

    cal, paths, truth = make_dataset(tmp_path / "data", n_files=2, frames_per_file=2, seed=1)
    truncated_tiff(tmp_path / "data" / "shot_0a.tif")
    np.save(tmp_path / "data" / "small.npy",  # wrong frame size
            np.random.default_rng(0).integers(200, 300, (64, 64)).astype(np.uint16))
    summary = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "run.h5", workers=0,
                        progress=False)
    assert (summary.n_files, summary.n_new, summary.n_failed) == (4, 4, 2)
    run = read_run(tmp_path / "run.h5")
    # input order: shot_0 (2 frames), shot_0a (failed), shot_1 (2 frames), small (failed)
    assert [Path(s).name for s in run.source] == ["shot_0.tif", "shot_0.tif", "shot_1.tif", "shot_1.tif"]
    assert run.frame_index.tolist() == [0, 1, 0, 1]
    assert run.file_hash[0] == hash_file(paths[0])
    reasons = dict(zip([Path(s).name for s in run.failures.source], run.failures.reason))
    assert "truncated" in reasons["shot_0a.tif"]
    assert "64x64" in reasons["small.npy"] and "128x128" in reasons["small.npy"]
    assert run.failures.frame_index.tolist() == [-1, 0]  # whole file unreadable / frame 0 rejected
    # Reference 1: the Reconstructor called directly gives the same numbers.
    rec = Reconstructor(cal)
    frames = np.concatenate([tifffile.imread(p) for p in paths])
    for k, image in enumerate(frames):
        direct = rec(image, frame_index=k % 2)
        sites = direct.sites
        np.testing.assert_array_equal(sites.from_matrix(run.occupation[k]), direct.occupied)
        np.testing.assert_allclose(sites.from_matrix(run.amplitude[k]), direct.amplitudes, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(run.offset[k], direct.geometry.offset, rtol=0, atol=1e-9)
        assert run.threshold[k] == pytest.approx(direct.threshold)
    # Reference 2: the forward model's truth (initial occupation of each frame).
    truth_occ = truth.occupation_matrices(final=False)
    assert run.occupation.shape == truth_occ.shape
    agree = np.mean(run.occupation == truth_occ)
    assert agree > 0.97, f"only {agree:.3f} of sites agree with the simulated truth"
    # ... and each shot's stored lattice phase is the simulated (jittered) one.
    np.testing.assert_allclose(run.offset, [g.offset for g in truth.geometries], rtol=0, atol=0.05)
    assert summary.mean_filling == pytest.approx(np.mean(run.filling))
    assert 0.3 < summary.mean_filling < 0.6  # simulated filling 0.45
    assert tuple(run.calibration["reconstruction"]["index_bounds"]) == cal.options.index_bounds


def test_resume_adds_only_new_shots_and_does_not_retry_failures(tmp_path):
    from latticeread.runs.batch import run_batch

    cal, paths, _ = make_dataset(tmp_path / "data", n_files=2, frames_per_file=1, seed=2)
    truncated_tiff(tmp_path / "data" / "bad.tif")
    out = tmp_path / "run.h5"
    first = run_batch([tmp_path / "data"], calibration=cal, out=out, workers=0, progress=False)
    assert (first.n_new, first.n_failed) == (2, 1)
    make_dataset(tmp_path / "data", n_files=1, frames_per_file=1, seed=3, prefix="later")
    second = run_batch([tmp_path / "data"], calibration=cal, out=out, workers=0, progress=False)
    assert (second.n_new, second.n_failed, second.n_skipped_done, second.n_skipped_failed) == (1, 0, 2, 1)
    third = run_batch([tmp_path / "data"], calibration=cal, out=out, workers=0, progress=False,
                      retry_failed=True)
    assert (third.n_new, third.n_failed, third.n_skipped_done) == (0, 1, 3)
    run = read_run(out)
    assert len(run) == 3 and len(set(run.keys)) == 3
    assert len(run.failures) == 1  # the retried failure updated its row, no second row
    # The file gets completed (as a camera would): a new version, read and its old failure resolved.
    tifffile.imwrite(tmp_path / "data" / "bad.tif", tifffile.imread(paths[0]), photometric="minisblack")
    fourth = run_batch([tmp_path / "data"], calibration=cal, out=out, workers=0, progress=False)
    assert (fourth.n_new, fourth.n_failures_total) == (1, 0)


def test_pool_equals_single_process_bit_for_bit(tmp_path):
    from latticeread.runs.batch import run_batch

    cal, _, _ = make_dataset(tmp_path / "data", n_files=3, frames_per_file=2, seed=4)
    run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "a.h5", workers=0, progress=False)
    summary = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "b.h5", workers=2, progress=False,
                        window=3)
    assert summary.workers == "2 worker processes" and summary.n_new == 6
    assert_runs_identical(read_run(tmp_path / "a.h5"), read_run(tmp_path / "b.h5"))


def _n_shots_now(path: Path) -> int:
    try:  # the documented reader, which a live writer never blocks
        return len(read_run(path, matrices=False))
    except FrameFileError:  # not created yet
        return -1


def test_kill_in_the_middle_then_resume_gives_every_shot_once(tmp_path):
    # 100 frames from 4 simulated ones (simulating is the slow part); each index is its own shot.
    # The batch writes blocks of up to 32 shots, so the first commit comes well before the end.
    n_frames = 100
    cal, paths, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=4, seed=5)
    tifffile.imwrite(paths[0], np.tile(tifffile.imread(paths[0]), (n_frames // 4, 1, 1)), photometric="minisblack")
    save_calibration(tmp_path / "cal.json", cal)
    out = tmp_path / "run.h5"
    cmd = [sys.executable, "-m", "latticeread", "batch", str(tmp_path / "data"), "-c", str(tmp_path / "cal.json"),
           "-o", str(out), "--workers", "0", "--no-progress"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while _n_shots_now(out) < 3 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.005)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)  # the process group of the run we started
        proc.wait()
        err = proc.stderr.read().decode()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL, f"the run ended before it was killed: {err}"
    killed = read_run(out)  # readable after SIGKILL
    assert 3 <= len(killed) < n_frames
    assert killed.frame_index.tolist() == list(range(len(killed)))
    from latticeread.runs.batch import run_batch

    resumed = run_batch([tmp_path / "data"], calibration=tmp_path / "cal.json", out=out, workers=0,
                        progress=False)
    assert resumed.n_skipped_done == len(killed) and resumed.n_new == n_frames - len(killed)
    run = read_run(out)
    assert sorted(run.frame_index.tolist()) == list(range(n_frames))  # every shot exactly once
    # and the same numbers as a run that was never interrupted
    run_batch([tmp_path / "data"], calibration=tmp_path / "cal.json", out=tmp_path / "clean.h5", workers=0,
              progress=False)
    assert_runs_identical(run, read_run(tmp_path / "clean.h5"))


def test_batch_command_line(tmp_path, capsys):
    import json

    from latticeread.cli import main

    cal, _, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=2, seed=6)
    save_calibration(tmp_path / "cal.json", cal)
    args = ["batch", str(tmp_path / "data"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "r.h5"),
            "--workers", "0", "--no-progress"]
    assert main(args) == 0
    assert "2 frames written, 0 failed" in capsys.readouterr().out
    assert main([*args, "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["n_new"] == 0 and summary["n_skipped_done"] == 2 and summary["n_shots_total"] == 2
    # every shot of a run failing is exit code 3 (input data problem)
    (tmp_path / "bad").mkdir()
    truncated_tiff(tmp_path / "bad" / "b.tif")
    assert main(["batch", str(tmp_path / "bad"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "r2.h5"),
                 "--no-progress"]) == 3
    assert "truncated" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exit_info:  # usage error: argparse exits with 2
        main([*args, "--workers", "-1"])
    assert exit_info.value.code == 2
    assert "must be 0 (this process) or a positive number" in capsys.readouterr().err


def test_group_shots_keeps_only_complete_shots():
    from types import SimpleNamespace

    from latticeread.runs.batch import group_shots

    occupation = np.arange(7, dtype=np.uint8)[:, None, None] * np.ones((1, 2, 3), np.uint8)
    run = SimpleNamespace(  # file a: frames 0-3 (2 shots); file b: frames 1, 2, 3 (frame 0 failed)
        source=np.array(["a", "b", "a", "a", "b", "b", "a"]), frame_index=np.array([0, 1, 1, 2, 2, 3, 3]),
        occupation=occupation)
    occ, rows = group_shots(run, 2)
    assert rows.tolist() == [[0, 2], [3, 6], [4, 5]]  # b's frames 2, 3 form its second shot
    assert occ.shape == (3, 2, 2, 3)
    np.testing.assert_array_equal(occ[:, :, 0, 0], [[0, 2], [3, 6], [4, 5]])


def test_pairs_of_images_give_a_fidelity_estimate(tmp_path):
    from latticeread.core.fidelity import fidelity_from_frames
    from latticeread.runs.batch import run_batch

    cal, _, truth = make_dataset(tmp_path / "data", n_files=2, frames_per_file=4, seed=8, images_per_shot=2)
    summary = run_batch([tmp_path / "data"], calibration=cal, out=tmp_path / "run.h5", workers=0,
                        progress=False, images_per_shot=2, fidelity_bootstrap=0)
    fid = summary.fidelity
    assert fid is not None and fid.n_shots == 4 and fid.n_images == 2
    # Reference: the fidelity module called directly on the shots as simulated (shot-major frames).
    run = read_run(tmp_path / "run.h5")
    assert np.isnan(run.false_positive_rate).all()  # fixed threshold: no per-frame histogram fit
    # misread rates from the pooled amplitudes at the fixed threshold, as every front end does
    direct = fidelity_from_frames(run.occupation.reshape(4, 2, *run.occupation.shape[1:]),
                                  amplitudes=run.amplitude, thresholds=run.threshold, camera=cal.camera,
                                  geometry=cal.geometry, n_bootstrap=0)
    assert fid.settings["misread"] == direct.settings["misread"]
    assert fid.loss.value == pytest.approx(direct.loss.value)
    assert fid.hop.value == pytest.approx(direct.hop.value)
    assert "fidelity      loss" in summary.format()
    # The estimate rests on the atoms of the first images (frames 0, 2, 4, 6), which are the
    # simulated atoms up to misreads.
    assert fid.loss_counted.n_atoms == int(np.sum(run.occupation[0::2] == 1))
    truth_atoms = int(np.sum(truth.initial_occupation[0::2]))
    assert abs(fid.loss_counted.n_atoms - truth_atoms) <= 0.03 * truth_atoms


@pytest.mark.parametrize("workers", [0, 1])
def test_unusable_calibration_stops_the_run_with_its_reason(tmp_path, workers):
    from latticeread.errors import CalibrationError
    from latticeread.runs.batch import run_batch

    cal, _, _ = make_dataset(tmp_path / "data", n_files=1, frames_per_file=2, seed=9)
    with pytest.raises(CalibrationError, match="unknown amplitude method 'bogus'"):
        run_batch([tmp_path / "data"], calibration=cal.replace(amplitude_method="bogus"), out=tmp_path / "r.h5",
                  workers=workers, progress=False)
    run = read_run(tmp_path / "r.h5")
    assert len(run) == 0 and len(run.failures) == 0  # not recorded as a failure of every shot
