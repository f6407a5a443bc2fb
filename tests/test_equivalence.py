"""One analysis path: the same stack gives the same occupation matrices in every front end.

A small stack (four 128x128 frames from the project's forward model, one NaN pixel under
the lattice) with a calibration that has no fixed threshold (the default policy: one
threshold from the pooled histogram of the stack) goes through the window's session (in
this thread and in worker processes), ``latticeread reconstruct``, ``batch`` (process pool
and a Dask LocalCluster) and ``watch``. Every route must give bit-identical occupation
matrices, the same threshold, and flag the site under the NaN pixel instead of failing the
frame. Equality is the check (common practice, no source): any second implementation of a
policy shows up as a difference.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.core import flags as site_flags
from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf
from latticeread.io.calibration_file import load_calibration, save_calibration

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(64.2, 63.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (128, 128)
NAN_PIXEL = (1, 64, 64)  # frame, row, col: the middle of the cloud


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from latticeread.core.simulate import simulate_frames

    root = tmp_path_factory.mktemp("equivalence")
    frames, _ = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 10),
                                filling=0.4, photons_per_atom=800.0, n_shots=2, images_per_shot=2,
                                loss_probability=0.02, rng=5)
    frames = frames.astype(np.float32)
    frames[NAN_PIXEL] = np.nan
    (root / "camera").mkdir()
    stack = root / "camera" / "stack.tif"
    tifffile.imwrite(stack, frames, photometric="minisblack")
    cal_path = root / "cal.json"
    save_calibration(cal_path, Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE))
    assert load_calibration(cal_path).threshold_policy.kind == "pooled"  # no fixed threshold
    return root, stack, cal_path


def _session(stack, cal_path, processes: int):
    from latticeread.session import Session

    s = Session()
    s.open_frames(stack)
    s.set_calibration(load_calibration(cal_path), record=False)
    for batch in s.reconstruct_job(batch_size=1, processes=processes)():
        s.store_batch(batch)
    s.finish_reconstruction()
    flags = s._sites.to_matrix(s._flags[NAN_PIXEL[0]], fill=0, dtype=np.uint8)
    return s.occupation_stack(), s.threshold, flags


def _reconstruct(root, stack, cal_path):
    from latticeread.cli import main

    out = root / "sites.h5"
    assert main(["reconstruct", str(stack), "-c", str(cal_path), "-o", str(out), "--quiet", "--force"]) == 0
    with h5py.File(out, "r") as h5:
        occ = h5["occupation"][()]
        flags = h5["flags"][NAN_PIXEL[0]]
    return occ, None, flags


def _run_file(path):
    from latticeread.io.run_file import read_run

    run = read_run(path)
    assert len(run.failures) == 0, "a frame failed instead of flagging its NaN pixel"
    assert [int(i) for i in run.frame_index] == [0, 1, 2, 3]
    thresholds = np.unique(run.threshold)
    assert thresholds.size == 1  # one pooled threshold for the stack
    return run.occupation, float(thresholds[0]), run.flags[NAN_PIXEL[0]]


def _batch(root, stack, cal_path, scheduler=None):
    from latticeread.runs.batch import run_batch

    out = root / f"batch_{scheduler or 'pool'}.h5"
    run_batch([stack], calibration=cal_path, out=out, workers=2, scheduler=scheduler, progress=False)
    return _run_file(out)


def _watch(root, stack, cal_path):
    from latticeread.runs.watch import watch_folder

    out = root / "live.h5"
    watch_folder(stack.parent, calibration=cal_path, out=out, max_files=1, interval=0.05, timeout=60)
    return _run_file(out)


@pytest.fixture(scope="module")
def reference(data):
    root, stack, cal_path = data
    return _session(stack, cal_path, processes=0)


ROUTES = {
    "session in worker processes": lambda root, stack, cal: _session(stack, cal, processes=2),
    "reconstruct": _reconstruct,
    "batch, process pool": _batch,
    "batch, Dask LocalCluster": lambda root, stack, cal: _batch(root, stack, cal, scheduler="local"),
    "watch": _watch,
}


def test_the_session_flags_the_nan_pixel_and_pools_one_threshold(reference):
    occupation, threshold, flags = reference
    assert occupation.shape[0] == 4 and np.isfinite(threshold)
    assert (occupation == 1).sum() > 50  # atoms were found
    assert np.any(flags & site_flags.NONFINITE)  # the site under the NaN pixel is flagged, the frame kept


@pytest.mark.parametrize("route", list(ROUTES))
def test_every_front_end_gives_the_same_occupation_matrices(data, reference, route):
    if route == "batch, Dask LocalCluster":
        pytest.importorskip("distributed")
    root, stack, cal_path = data
    occupation, threshold, flags = ROUTES[route](root, stack, cal_path)
    ref_occ, ref_threshold, ref_flags = reference
    np.testing.assert_array_equal(occupation, ref_occ)
    np.testing.assert_array_equal(flags, ref_flags)
    if threshold is not None:
        assert threshold == ref_threshold


# --- fidelity: the same report from every route (core.fidelity.fidelity_from_frames) -----------

N_BOOT = 20


def _report_text(report) -> str:
    import json

    return json.dumps(report.to_dict() if hasattr(report, "to_dict") else report, sort_keys=True, default=str)


def _fidelity_from_session(root, stack, cal_path):
    from latticeread.session import Session

    s = Session()
    s.open_frames(stack)
    s.update_settings(images_per_shot=2, bootstrap_resamples=N_BOOT)
    s.set_calibration(load_calibration(cal_path), record=False)
    s.reconstruct()
    s.finish_reconstruction()
    s.compute_fidelity()
    return s.fidelity.to_dict()


def _fidelity_from_batch(root, stack, cal_path):
    from latticeread.runs.batch import run_batch

    summary = run_batch([stack], calibration=cal_path, out=root / "batch_fidelity.h5", workers=0, progress=False,
                        images_per_shot=2, fidelity_bootstrap=N_BOOT)
    return summary.fidelity.to_dict()


def _fidelity_command(root, source, cal_path, name):
    import json

    from latticeread.cli import main

    out = root / f"{name}.json"
    args = ["fidelity", str(source), "--images-per-shot", "2", "--bootstrap", str(N_BOOT), "--seed", "0",
            "-c", str(cal_path), "-o", str(out), "--force", "--quiet"]
    assert main(args) == 0
    data = json.loads(out.read_text())
    data.pop("inputs"), data.pop("calibration_file")
    return data


def test_every_route_gives_the_same_fidelity_report(data):
    root, stack, cal_path = data
    session = _fidelity_from_session(root, stack, cal_path)
    routes = {"batch": _fidelity_from_batch(root, stack, cal_path),
              "fidelity command on the frames": _fidelity_command(root, stack, cal_path, "frames")}
    routes["fidelity command on the batch run file"] = _fidelity_command(root, root / "batch_fidelity.h5", cal_path,
                                                                         "run")
    for name, report in routes.items():
        assert _report_text(report) == _report_text(session), f"{name} differs from the window"


# --- the per-frame threshold policy: the window follows it as reconstruct does -------------

PF_GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(32.2, 31.7))
PF_SHAPE = (64, 64)


@pytest.fixture(scope="module")
def per_frame_data(tmp_path_factory):
    """Four 64x64 frames, two dim (60 photons per atom) and two bright (200): a pooled
    threshold falls between the bright frames' peaks and misses the dim frames' atoms,
    so pooling and fitting each frame give different matrices."""
    from latticeread.core.simulate import simulate_frames

    root = tmp_path_factory.mktemp("per_frame")
    parts = [simulate_frames(geometry=PF_GEOMETRY, frame_shape=PF_SHAPE, psf=PSF, camera=CAMERA, region=("disk", 6),
                             filling=0.4, photons_per_atom=photons, n_shots=1, images_per_shot=2, rng=seed)[0]
             for photons, seed in ((60.0, 1), (200.0, 2))]
    stack = root / "stack.tif"
    tifffile.imwrite(stack, np.concatenate(parts).astype(np.float32), photometric="minisblack")
    cal = Calibration(geometry=PF_GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=PF_SHAPE, threshold_scope="per_frame")
    cal_path = root / "cal.json"
    save_calibration(cal_path, cal)
    assert load_calibration(cal_path).threshold_policy.kind == "per_frame"
    return root, stack, cal_path


def _reconstructed_session(stack, calibration):
    from latticeread.session import Session

    s = Session()
    s.open_frames(stack)
    s.set_calibration(calibration, record=False)
    s.reconstruct()
    s.finish_reconstruction()
    return s


def test_the_window_fits_each_frame_as_reconstruct_does(per_frame_data):
    from latticeread.cli import main

    root, stack, cal_path = per_frame_data
    cal = load_calibration(cal_path)
    s = _reconstructed_session(stack, cal)
    out = root / "sites.h5"
    assert main(["reconstruct", str(stack), "-c", str(cal_path), "-o", str(out), "--quiet", "--force"]) == 0
    with h5py.File(out, "r") as h5:
        ref = h5["occupation"][()]
    occ = s.occupation_stack()
    np.testing.assert_array_equal(occ, ref)
    for i in range(4):  # result() and classify_frame() use the same per-frame fit
        np.testing.assert_array_equal(s.result(i).occupation_matrix(fill=255), ref[i])
        np.testing.assert_array_equal(s.classify_frame(i)[0], s.result(i).occupied)
    thresholds = s.frame_thresholds()
    assert thresholds[2] > 1.5 * thresholds[0]  # the bright frames got their own, higher threshold
    inside = ref != 255
    assert s.pooled_counts()["occupied"] == int((ref[inside] == 1).sum())  # counts of the per-frame matrices
    pooled = _reconstructed_session(stack, cal.replace(threshold_scope="pooled")).occupation_stack()
    assert np.count_nonzero(pooled != ref) > 10  # pooling gives other matrices: the comparison can fail


def test_a_dragged_threshold_fixes_one_for_all_frames_and_undo_fits_each_again(per_frame_data):
    root, stack, cal_path = per_frame_data
    s = _reconstructed_session(stack, load_calibration(cal_path))
    per_frame = s.occupation_stack()
    s.set_index(2)
    assert s.per_frame and s.threshold == s.frame_thresholds()[2] == s.threshold_result.threshold
    s.set_threshold(50.0)
    assert not s.per_frame and s.calibration.threshold_policy.kind == "fixed"
    np.testing.assert_array_equal(s.frame_thresholds(), np.full(4, 50.0))
    fixed = s.occupation_stack()
    assert np.count_nonzero(fixed != per_frame) > 0
    assert s.undo() and s.per_frame
    np.testing.assert_array_equal(s.occupation_stack(), per_frame)
    assert s.pooled_counts()["occupied"] == int((per_frame == 1).sum())
    s.set_threshold_method("otsu")  # still each frame's own fit, with the other method
    otsu = s.occupation_stack()
    assert s.per_frame and s.threshold_result.method == "otsu"
    assert s.pooled_counts()["occupied"] == int((otsu == 1).sum())
    s.undo()
    s.update_settings(images_per_shot=2, bootstrap_resamples=N_BOOT)
    s.compute_fidelity()
    assert s.fidelity.settings["misread"]["n_thresholds"] == 4  # one threshold per frame
