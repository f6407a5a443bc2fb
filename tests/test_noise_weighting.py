"""Camera-noise weights of the linear amplitude fit (``weighting="camera"``).

Ground truth: the project's forward model (:func:`latticeread.core.simulate.simulate_frames`,
EMCCD statistics with the excess noise factor of Robbins & Hadwen, IEEE Trans. Electron Devices
50, 1227 (2003)). Outside check of the weights: the EMCCD variance written out by hand from
Robbins & Hadwen 2003 (F^2 = 2 - 1/gain, quoted from memory; F^2 -> 2 at high gain) plus read
noise referred to the input of the gain register (common practice, no source).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.core.amplitudes import camera_weights
from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, with_camera_weighting
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import CalibrationError

# invented setting: potassium-39 at 767 nm, NA 0.75, 180 nm pixels (Airy FWHM 2.92 pixels)
PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0)
CAMERA = CameraModel(kind="emccd", em_gain=200.0, counts_per_electron=0.1, bias=100.0, read_noise=6.0,
                     quantum_efficiency=0.9)
SHAPE = (96, 96)
BOUNDS = (-8, 8, -8, 8)


def _geometry():
    s = 1.6 * PSF.fwhm
    return LatticeGeometry(a1=(s, 0.0), a2=(0.0, s), offset=(47.3, 48.1))


def _calibration(notes=None):
    return Calibration(geometry=_geometry(), psf=PSF, camera=CAMERA, frame_shape=SHAPE, threshold=400.0,
                       threshold_method="mixture", amplitude_method="linear", pixel_size_nm=180.0,
                       notes=dict({"index_bounds": list(BOUNDS)}, **(notes or {})))


def test_weights_for_a_flat_reference_match_the_emccd_variance_by_hand():
    """Robbins & Hadwen 2003: variance of an EMCCD pixel = F^2 x (photoelectrons + CIC), F^2 = 2 - 1/gain."""
    camera = CameraModel(kind="emccd", em_gain=300.0, counts_per_electron=0.1, bias=100.0, read_noise=12.0,
                         quantum_efficiency=0.9, clock_induced_charge=0.01)
    reference = np.full((20, 30), 15.0)  # photons per pixel
    weights = camera_weights(reference, camera=camera, smoothing=3.0)
    electrons = 15.0 * 0.9 + 0.01
    read_electrons = 12.0 / (0.1 * 300.0)  # read noise referred to the gain register's input
    variance_photons = ((2.0 - 1.0 / 300.0) * electrons + read_electrons**2) / 0.9**2
    assert weights.shape == reference.shape
    np.testing.assert_allclose(weights, 1.0 / variance_photons, rtol=1e-12)
    # high-gain limit: F^2 = 2, so without read noise and CIC the variance is 2 x photons / QE
    ideal = CameraModel(kind="emccd", em_gain=1e6, quantum_efficiency=0.9)
    assert camera_weights(np.full((4, 4), 10.0), camera=ideal)[0, 0] == pytest.approx(0.9 / 20.0, rel=1e-5)


def test_zero_noise_camera_has_no_weights():
    with pytest.raises(ValueError, match="gives zero noise for the reference image"):
        camera_weights(np.zeros((8, 8)), camera=CameraModel())


@pytest.fixture(scope="module")
def dense_cloud():
    """Bright cloud with an empty margin on a weak background: the weights vary 40-fold at its edge."""
    frames, truth = simulate_frames(geometry=_geometry(), frame_shape=SHAPE, psf=PSF, camera=CAMERA,
                                    region=("rectangle", 13, 13), filling=0.3, photons_per_atom=800.0,
                                    background=0.3, n_shots=30, phase_jitter=0.5, rng=7)
    return frames, truth


def _isolated_errors(reconstructor, frames, truth):
    """Amplitude minus simulated photons for atoms without an occupied nearest neighbour."""
    lut = {(r, c): i for i, (r, c) in enumerate(zip(reconstructor.sites.rows, reconstructor.sites.cols))}
    idx = np.array([lut[(r, c)] for r, c in zip(truth.sites.rows, truth.sites.cols)])
    errors = []
    for f, frame in enumerate(frames):
        occ = truth.sites.to_matrix(truth.final_occupation[f], fill=0, dtype=np.int64)
        padded = np.pad(occ, 1)
        neighbours = padded[:-2, 1:-1] + padded[2:, 1:-1] + padded[1:-1, :-2] + padded[1:-1, 2:]
        isolated = truth.sites.from_matrix((occ == 1) & (neighbours == 0))
        _, amplitudes, _ = reconstructor.extract(frame)
        errors.append(amplitudes[idx][isolated] - truth.photons[f][isolated])
    return np.concatenate(errors)


def test_camera_weights_are_unbiased_and_not_noisier(dense_cloud):
    frames, truth = dense_cloud
    plain = Reconstructor(_calibration())
    weighted = Reconstructor(with_camera_weighting(_calibration(), frames))
    assert plain.weighting == "none" and weighted.weighting == "camera"
    w = weighted.pixel_weights
    assert w.max() / w.min() > 10  # the scenario really has non-uniform noise
    e_plain = _isolated_errors(plain, frames, truth)
    e_weighted = _isolated_errors(weighted, frames, truth)
    assert e_plain.size > 300
    # unbiased against the simulated photons: mean error within 1 % of an atom (800 photons);
    # the standard error of the mean is about 50 / sqrt(300) = 3 photons
    assert abs(e_plain.mean()) < 8.0 and abs(e_weighted.mean()) < 8.0
    # the phase jitter moves the sites over the fixed weights; without the per-frame correction of
    # the normal matrix the weighted error variance grew by 17 % in this scenario (measured)
    assert e_weighted.var() <= e_plain.var()


def test_unknown_weighting_is_refused():
    with pytest.raises(ValueError, match="unknown pixel weighting 'poisson'; use 'none'"):
        Reconstructor(_calibration(), weighting="poisson")


def test_camera_weighting_needs_the_mean_frame():
    with pytest.raises(CalibrationError, match="recalibrate with --weighting camera"):
        Reconstructor(_calibration(), weighting="camera")


def test_stored_reference_survives_json_and_matches_the_mean_frame(dense_cloud):
    frames, _ = dense_cloud
    cal = with_camera_weighting(_calibration(), frames[:10])
    back = Calibration.from_dict(json.loads(json.dumps(cal.to_dict())))
    assert back == cal
    assert back.options.weighting == "camera"
    block = back.options.reference.block
    mean = np.mean([CAMERA.counts_to_photons(f) for f in frames[:10]], axis=0)
    stored = back.options.reference.values
    assert stored[2, 3] == pytest.approx(mean[2 * block:3 * block, 3 * block:4 * block].mean(), abs=1e-3)
    a = Reconstructor(back).pixel_weights
    b = Reconstructor(_calibration(), weighting="camera", reference=np.repeat(
        np.repeat(stored, block, 0), block, 1)[:SHAPE[0], :SHAPE[1]]).pixel_weights
    np.testing.assert_allclose(a, b)


def test_command_line_weighting(dense_cloud, tmp_path, capsys):
    frames, _ = dense_cloud
    path = tmp_path / "run.tif"
    tifffile.imwrite(path, frames[:6])
    cal = tmp_path / "cal.json"
    camera = ["--em-gain", "200", "--counts-per-electron", "0.1", "--bias", "100", "--read-noise", "6", "--qe", "0.9"]
    airy = ["--psf", "airy", "--wavelength-nm", "767", "--na", "0.75", "--pixel-size-nm", "180"]
    assert main(["calibrate", str(path), "-o", str(cal), "--weighting", "camera", *airy, *camera]) == 0
    assert "camera-noise weights" in capsys.readouterr().out
    assert json.loads(cal.read_text())["reconstruction"]["weighting"] == "camera"
    out = tmp_path / "sites.csv"
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(out), "--weighting", "none", "--quiet"]) == 0
    plain = np.genfromtxt(out, delimiter=",", names=True)
    out_w = tmp_path / "sites_w.csv"
    assert main(["reconstruct", str(path), "-c", str(cal), "-o", str(out_w), "--quiet"]) == 0
    weighted = np.genfromtxt(out_w, delimiter=",", names=True)
    assert plain.size == weighted.size
    assert not np.allclose(plain["amplitude"], weighted["amplitude"])  # the weights were used
    assert np.mean(plain["occupied"] == weighted["occupied"]) > 0.98
