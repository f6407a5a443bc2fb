"""An analysed region gives the same matrices in every front end, and excluded sites are marked.

A small stack (four 96x96 frames of the project's forward model) and a calibration whose
region is a disk with a masked rectangle and two single excluded sites go through the
window's session, ``latticeread reconstruct`` (HDF5 and CSV), ``batch``, ``watch`` and
``latticeread fidelity``. Equality between the routes is the check (common practice, no
source); the site set is checked against the region's own geometry (centres inside the disk,
outside the rectangle), and the fitted amplitudes of the analysed sites must not change
when a region is drawn (every site is still fitted).
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.core import flags as site_flags
from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import gaussian_psf
from latticeread.core.region import RegionShape, SiteRegion
from latticeread.io.calibration_file import load_calibration, save_calibration

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)
REGION = SiteRegion(include=(RegionShape.disk((48, 48), 30),), exclude=(RegionShape.rectangle((50, 30), 12, 10),),
                    excluded_sites=((0, 0), (2, -3)))


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    from latticeread.core.simulate import simulate_frames

    root = tmp_path_factory.mktemp("region")
    frames, _ = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 9),
                                filling=0.4, photons_per_atom=800.0, n_shots=2, images_per_shot=2,
                                loss_probability=0.02, rng=7)
    (root / "camera").mkdir()
    stack = root / "camera" / "stack.tif"
    tifffile.imwrite(stack, frames.astype(np.float32), photometric="minisblack")
    plain = Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE)
    save_calibration(root / "plain.json", plain)
    save_calibration(root / "cal.json", plain.with_options(region=REGION))
    return root, stack, root / "cal.json"


def _expected_excluded():
    s = lattice_sites(GEOMETRY, SHAPE)
    inside = (s.x - 48) ** 2 + (s.y - 48) ** 2 <= 30 ** 2
    box = (s.x >= 50) & (s.x <= 62) & (s.y >= 30) & (s.y <= 40)
    single = ((s.rows == 0) & (s.cols == 0)) | ((s.rows == 2) & (s.cols == -3))
    out = np.zeros(s.matrix_shape, bool)
    out[s.rows - s.row_min, s.cols - s.col_min] = ~inside | box | single
    return out


def _expected_analysed():
    s = lattice_sites(GEOMETRY, SHAPE)
    out = np.zeros(s.matrix_shape, bool)
    out[s.rows - s.row_min, s.cols - s.col_min] = True
    return out & ~_expected_excluded()


def _session(stack, cal_path):
    from latticeread.session import Session

    s = Session()
    s.open_frames(stack)
    s.set_calibration(load_calibration(cal_path), record=False)
    s.reconstruct()
    s.finish_reconstruction()
    return s


@pytest.fixture(scope="module")
def window(data):
    root, stack, cal_path = data
    s = _session(stack, cal_path)
    h5 = root / "window.h5"
    from latticeread.io.export import write_occupation_hdf5

    write_occupation_hdf5(h5, s.results(), calibration=s.calibration)
    with h5py.File(h5, "r") as f:
        return s, f["occupation"][()], f["flags"][()]


def test_the_region_decides_the_site_set_and_excluded_sites_are_marked(window):
    s, occupation, flags = window
    expected = _expected_excluded()
    analysed = _expected_analysed()
    assert expected.sum() > 20 and analysed.sum() > 100
    marked = (flags & site_flags.EXCLUDED) > 0
    np.testing.assert_array_equal(marked[0], expected)
    assert (occupation[:, expected] == 255).all()  # excluded: no result, never "empty"
    assert set(np.unique(occupation[:, analysed])) <= {0, 1}
    assert (occupation[:, ~analysed] == 255).all()
    assert (occupation == 1).sum() > 30


def test_drawing_a_region_does_not_change_the_fit_of_the_analysed_sites(data, window):
    root, stack, _ = data
    s, _, _ = window
    plain = _session(stack, root / "plain.json")
    keep = _expected_analysed()
    a_region = s._sites.to_matrix(s.amplitudes(1), fill=np.nan)
    a_plain = plain._sites.to_matrix(plain.amplitudes(1), fill=np.nan)
    np.testing.assert_array_equal(a_region[keep], a_plain[keep])
    assert np.isnan(a_region[_expected_excluded()]).all()


def _reconstruct(root, stack, cal_path, suffix):
    from latticeread.cli import main

    out = root / f"sites{suffix}"
    assert main(["reconstruct", str(stack), "-c", str(cal_path), "-o", str(out), "--quiet", "--force"]) == 0
    return out


def test_reconstruct_batch_and_watch_give_the_windows_matrices(data, window):
    from latticeread.io.run_file import read_run
    from latticeread.runs.batch import run_batch
    from latticeread.runs.watch import watch_folder

    root, stack, cal_path = data
    _, ref_occ, ref_flags = window
    with h5py.File(_reconstruct(root, stack, cal_path, ".h5"), "r") as f:
        np.testing.assert_array_equal(f["occupation"][()], ref_occ)
        np.testing.assert_array_equal(f["flags"][()], ref_flags)
    run_batch([stack], calibration=cal_path, out=root / "batch.h5", workers=0, progress=False)
    watch_folder(stack.parent, calibration=cal_path, out=root / "live.h5", max_files=1, interval=0.05, timeout=60)
    for name in ("batch.h5", "live.h5"):
        run = read_run(root / name)
        np.testing.assert_array_equal(run.occupation, ref_occ, err_msg=name)
        np.testing.assert_array_equal(run.flags, ref_flags, err_msg=name)


def test_csv_keeps_excluded_sites_as_marked_rows(data, window):
    from latticeread.io.export import read_sites_csv

    root, stack, cal_path = data
    _, ref_occ, _ = window
    table = read_sites_csv(_reconstruct(root, stack, cal_path, ".csv"))
    excluded = (table["flags"] & site_flags.EXCLUDED) > 0
    per_frame = int(_expected_excluded().sum())
    assert excluded.sum() == 4 * per_frame
    assert (table["occupied"][excluded] == 255).all() and np.isnan(table["amplitude"][excluded]).all()
    assert np.isfinite(table["x"][excluded]).all()
    assert set(np.unique(table["occupied"][~excluded])) <= {0, 1}
    assert int((table["occupied"] == 1).sum()) == int((ref_occ == 1).sum())
    side = json.loads((root / "sites.csv.json").read_text())
    assert side["calibration"]["reconstruction"]["region"]["excluded_sites"] == [[0, 0], [2, -3]]


def test_fidelity_command_and_window_agree_with_a_region(data):
    from latticeread.cli import main

    root, stack, cal_path = data
    s = _session(stack, cal_path)
    s.update_settings(images_per_shot=2, bootstrap_resamples=10)
    s.compute_fidelity()
    out = root / "fid.json"
    assert main(["fidelity", str(stack), "--images-per-shot", "2", "--bootstrap", "10", "--seed", "0",
                 "-c", str(cal_path), "-o", str(out), "--force", "--quiet"]) == 0
    data_cmd = json.loads(out.read_text())
    data_cmd.pop("inputs"), data_cmd.pop("calibration_file")
    assert json.dumps(data_cmd, sort_keys=True, default=str) == json.dumps(s.fidelity.to_dict(), sort_keys=True,
                                                                          default=str)


def test_a_region_without_sites_is_refused(data):
    from latticeread.core.pipeline import Reconstructor
    from latticeread.errors import CalibrationError

    cal = load_calibration(data[2]).with_options(region=SiteRegion(include=(RegionShape.disk((500, 500), 5),)))
    with pytest.raises(CalibrationError, match="holds no lattice site of the frame; draw it over the atoms"):
        Reconstructor(cal)
