"""``latticeread calibrate`` and ``latticeread reconstruct`` end to end on a simulated TIFF stack.

Ground truth: the project's forward model (:mod:`latticeread.core.simulate`). Outside checks:
the CSV is read back with ``numpy.genfromtxt`` (any CSV reader must work: one header line, no
comments), and the HDF5 file with h5py directly.
"""

from __future__ import annotations

import json
import os

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0)
CAMERA = CameraModel(kind="emccd", em_gain=100.0, counts_per_electron=0.1, bias=100.0, read_noise=5.0,
                     quantum_efficiency=0.9)
CAMERA_ARGS = ["--em-gain", "100", "--counts-per-electron", "0.1", "--bias", "100", "--read-noise", "5",
               "--qe", "0.9"]
AIRY_ARGS = ["--psf", "airy", "--wavelength-nm", "767", "--na", "0.75", "--pixel-size-nm", "180"]


@pytest.fixture(scope="module")
def stack(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    s = 1.1 * PSF.fwhm
    geo = LatticeGeometry(a1=(s * np.cos(0.2), s * np.sin(0.2)), a2=(-s * np.sin(0.2), s * np.cos(0.2)),
                          offset=(48.2, 47.7))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(96, 96), psf=PSF, camera=CAMERA, region=("disk", 8),
                                    filling=0.4, photons_per_atom=1200.0, background=1.5, n_shots=5,
                                    phase_jitter=0.4, rng=31)
    path = folder / "run.tif"
    tifffile.imwrite(path, frames)
    cal = folder / "cal.json"
    assert main(["calibrate", str(path), "--out", str(cal), *AIRY_ARGS, *CAMERA_ARGS]) == 0
    return folder, path, cal, truth


def truth_match(x, y, truth, frame):
    """Row index in (x, y) of the reconstructed site nearest each true site (positions in pixels)."""
    g = truth.geometries[frame]
    tx, ty = g.site_positions(truth.sites.rows, truth.sites.cols)
    d = np.hypot(x[:, None] - tx[None], y[:, None] - ty[None])
    nearest = np.argmin(d, axis=0)
    assert d[nearest, np.arange(tx.size)].max() < 0.2
    return nearest


def test_calibration_file(stack):
    _, _, cal, _ = stack
    data = json.loads(cal.read_text())
    assert data["frame_shape"] == [96, 96]
    assert data["psf"]["kind"] == "airy"
    # between the empty peak (0 +- ~30 photons) and the atom peak (1200 photons)
    assert 150 < data["threshold"] < 900


def test_reconstruct_to_csv_matches_truth(stack, capsys):
    folder, path, cal, truth = stack
    out = folder / "sites.csv"
    assert main(["reconstruct", str(path), "--calibration", str(cal), "--out", str(out), "--quiet"]) == 0
    table = np.genfromtxt(out, delimiter=",", names=True)
    assert table.dtype.names == ("frame", "row", "col", "x", "y", "amplitude", "occupied", "p_occupied", "flags")
    errors = 0
    for f in range(truth.n_frames):
        rows = table[table["frame"] == f]
        idx = truth_match(rows["x"], rows["y"], truth, f)
        errors += np.count_nonzero(rows["occupied"][idx] != truth.initial_occupation[f])
    assert errors == 0
    assert "wrote" in capsys.readouterr().out


def test_reconstruct_to_hdf5(stack):
    folder, path, cal, truth = stack
    out = folder / "sites.h5"
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(out), "--quiet"]) == 0
    with h5py.File(out, "r") as h5:
        occ = h5["occupation"][...]
        assert occ.shape[0] == truth.n_frames and occ.dtype == np.uint8
        assert set(np.unique(occ)) <= {0, 1, 255}
        assert h5["amplitude"].shape == occ.shape
        assert "calibration" in h5.attrs and "program_version" in h5.attrs
        n_atoms = (occ == 1).sum(axis=(1, 2))
    assert np.array_equal(n_atoms, truth.initial_occupation.sum(axis=1))


def test_reconstruct_without_calibration(stack):
    folder, path, _, truth = stack
    out = folder / "self.csv"
    assert main(["reconstruct", str(path), "-o", str(out), "--quiet", *AIRY_ARGS, *CAMERA_ARGS]) == 0
    table = np.genfromtxt(out, delimiter=",", names=True)
    errors = 0
    for f in range(truth.n_frames):
        rows = table[table["frame"] == f]
        idx = truth_match(rows["x"], rows["y"], truth, f)
        errors += np.count_nonzero(rows["occupied"][idx] != truth.initial_occupation[f])
    assert errors == 0


def test_calibration_for_another_frame_size(stack, tmp_path, capsys):
    _, _, cal, _ = stack
    other = tmp_path / "small.tif"
    tifffile.imwrite(other, np.zeros((2, 80, 96), np.uint16))
    out = tmp_path / "x.csv"
    assert main(["reconstruct", str(other), "-c", str(cal), "-o", str(out), "--quiet"]) == 5
    assert "calibration" in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root can write into read-only folders")
def test_read_only_output_folder(stack, tmp_path, capsys):
    _, path, cal, _ = stack
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        code = main(["reconstruct", str(path), "-c", str(cal), "-o", str(locked / "s.csv"), "--quiet"])
    finally:
        locked.chmod(0o700)
    assert code == 4
    assert list(locked.iterdir()) == []


def test_output_folder_is_a_file(stack, tmp_path, capsys):
    """An output path whose folder cannot exist: output error (exit 4), nothing written."""
    _, path, cal, _ = stack
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("")
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(blocker / "s.csv"), "--quiet"]) == 4
    assert blocker.read_text() == ""


def test_error_output_suffix(stack, tmp_path, capsys):
    _, path, cal, _ = stack
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(tmp_path / "s.txt")]) == 2
    assert "must end in one of: .csv" in capsys.readouterr().err


def test_error_existing_output(stack, tmp_path, capsys):
    _, path, cal, _ = stack
    out = tmp_path / "s.csv"
    out.write_text("keep me")
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(out)]) == 4
    assert "pass --force" in capsys.readouterr().err
    assert out.read_text() == "keep me"


def test_error_airy_without_wavelength(stack, tmp_path, capsys):
    _, path, _, _ = stack
    assert main(["calibrate", str(path), "--out", str(tmp_path / "c.json"), "--psf", "airy", "--na", "0.75"]) == 5
    assert "--psf airy needs --wavelength-nm, --pixel-size-nm" in capsys.readouterr().err


def test_error_gaussian_without_fwhm(stack, tmp_path, capsys):
    _, path, _, _ = stack
    assert main(["calibrate", str(path), "--out", str(tmp_path / "c.json"), "--psf", "gaussian"]) == 5
    assert "--psf gaussian needs --fwhm" in capsys.readouterr().err


def test_error_calibration_suffix(stack, tmp_path, capsys):
    _, path, _, _ = stack
    assert main(["calibrate", str(path), "--out", str(tmp_path / "c.txt")]) == 2
    assert "must end in one of: .json" in capsys.readouterr().err


def test_error_truncated_tiff(stack, tmp_path, capsys):
    _, path, cal, _ = stack
    broken = tmp_path / "broken.tif"
    broken.write_bytes(path.read_bytes()[:3000])
    out = tmp_path / "b.csv"
    assert main(["reconstruct", str(broken), "-c", str(cal), "-o", str(out), "--quiet"]) == 3
    assert not out.exists()
