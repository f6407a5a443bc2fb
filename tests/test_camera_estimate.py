"""Camera helper: bias, read noise and gain recovered from simulated dark and flat frames.

Outside references:
* EMVA Standard 1288 (European Machine Vision Association), photon-transfer / mean-variance
  method: system gain K = slope of the temporal variance above dark against the mean signal
  above dark, temporal variance from the difference of two frames, var(A - B) / 2, which
  cancels fixed-pattern noise; fit over the linear range up to 70 % of saturation (details
  quoted from memory).
* Robbins & Hadwen, IEEE Trans. Electron Devices 50, 1227 (2003): EMCCD excess noise factor
  F^2 -> 2 at high gain; the gamma-distributed gain register simulated here has F^2 = 2.
* Rousseeuw & Croux, JASA 88, 1273 (1993): MAD x 1.4826 estimates a Gaussian sigma (used
  by the bad-pixel search).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import tifffile

from latticeread.core.camera_estimate import bad_pixel_mask, estimate_camera, estimate_dark
from latticeread.errors import CalibrationError, FrameError
from latticeread.io.calibration_file import load_camera

SHAPE = (96, 96)


def simulate(rng, n, *, kind, electrons, bias, read_noise, counts_per_electron, em_gain=1.0, cic=0.0,
             offset_rms=0.0, gain_rms=0.0, pattern_seed=7):
    """Frames from the CameraModel noise chain (our own generator for this test).

    Poisson photoelectrons (+ clock-induced charge), an EMCCD gain register drawing
    gamma(n, em_gain) electrons, a per-pixel conversion gain (fixed pattern, ``gain_rms``
    relative) and offset (``offset_rms`` counts), Gaussian read noise, rounding to uint16.
    """
    pattern = np.random.default_rng(pattern_seed)
    offset = bias + pattern.normal(0, offset_rms, SHAPE)
    gain = counts_per_electron * (1 + pattern.normal(0, gain_rms, SHAPE))
    e = rng.poisson(electrons + cic, (n, *SHAPE)).astype(float)
    if kind == "emccd":
        e = np.where(e > 0, rng.gamma(np.maximum(e, 1), em_gain), 0.0)
    counts = offset + gain * e + rng.normal(0, read_noise, (n, *SHAPE))
    return np.clip(np.rint(counts), 0, 65535).astype(np.uint16)


SCMOS = dict(kind="scmos", bias=100.0, read_noise=2.5, counts_per_electron=0.6, offset_rms=3.0, gain_rms=0.01)
EMCCD = dict(kind="emccd", bias=500.0, read_noise=40.0, counts_per_electron=0.17, em_gain=300.0, cic=0.005,
             offset_rms=2.0)


def scmos_data(seed=1):
    rng = np.random.default_rng(seed)
    darks = simulate(rng, 8, electrons=0, **SCMOS)
    flats = [simulate(rng, 4, electrons=level, **SCMOS) for level in (100, 400, 1600, 6400, 25600, 120000)]
    return darks, flats


def emccd_data(seed=2):
    rng = np.random.default_rng(seed)
    darks = simulate(rng, 8, electrons=0, **EMCCD)
    flats = [simulate(rng, 4, electrons=level, **EMCCD) for level in (2, 5, 10, 20, 40)]
    return darks, flats


def test_scmos_bias_read_noise_gain_within_3_percent():
    """EMVA 1288 mean-variance method on sCMOS-like frames with offset and gain patterns."""
    darks, flats = scmos_data()
    est = estimate_camera(darks, flats, kind="scmos")
    cam = est.camera
    assert cam.bias == pytest.approx(SCMOS["bias"], rel=0.03)
    # digitisation adds 1/12 count^2 to the measured read noise (EMVA 1288 includes it)
    assert cam.read_noise == pytest.approx(np.sqrt(SCMOS["read_noise"] ** 2 + 1 / 12), rel=0.03)
    assert cam.counts_per_electron == pytest.approx(SCMOS["counts_per_electron"], rel=0.03)
    assert cam.em_gain == 1.0 and est.transfer.excess_noise_factor_squared == 1.0
    # the 120000-electron level saturates the 16-bit range: reported, not fitted
    assert [p.used for p in est.transfer.points] == [True] * 5 + [False]
    assert est.transfer.nonlinearity < 0.05


def test_pair_differences_remove_the_offset_pattern():
    """Per-pixel offsets (3 counts rms) would inflate a plain per-frame standard deviation."""
    darks, _ = scmos_data()
    dark = estimate_dark(darks)
    naive = float(darks[0].astype(float).std())
    assert naive > 1.3 * dark.read_noise  # the naive estimate is wrong ...
    assert dark.read_noise == pytest.approx(2.52, rel=0.03)  # ... the difference method is not
    assert dark.fixed_pattern_noise == pytest.approx(SCMOS["offset_rms"], rel=0.05)


def test_emccd_gain_with_known_conversion_gain_within_3_percent():
    """Slope = F^2 G c with F^2 = 2 for the gamma gain register (Robbins & Hadwen 2003)."""
    darks, flats = emccd_data()
    est = estimate_camera(darks, flats, kind="emccd", counts_per_electron=EMCCD["counts_per_electron"])
    cam = est.camera
    assert cam.kind == "emccd"
    assert cam.bias == pytest.approx(EMCCD["bias"], rel=0.03)
    assert cam.read_noise == pytest.approx(EMCCD["read_noise"], rel=0.03)
    assert cam.em_gain == pytest.approx(EMCCD["em_gain"], rel=0.03)
    assert est.transfer.system_gain == pytest.approx(EMCCD["em_gain"] * EMCCD["counts_per_electron"], rel=0.03)
    assert est.transfer.slope / est.transfer.system_gain == pytest.approx(2.0, abs=0.01)
    assert cam.counts_per_photon == pytest.approx(51.0, rel=0.03)


def test_emccd_needs_conversion_or_em_gain():
    darks, flats = emccd_data()
    with pytest.raises(FrameError, match=r"EM gain x conversion gain = 5\d\.\d+ counts per electron"):
        estimate_camera(darks, flats, kind="emccd")
    est = estimate_camera(darks, flats, kind="emccd", em_gain=300.0)
    assert est.camera.counts_per_electron == pytest.approx(0.17, rel=0.03)


def test_single_level_warns_about_linearity():
    darks, flats = scmos_data()
    est = estimate_camera(darks, flats[2:3])
    assert est.camera.counts_per_electron == pytest.approx(0.6, rel=0.03)
    assert any("only one usable flat level" in w for w in est.warnings)


def test_one_dark_frame_is_refused():
    darks, _ = scmos_data()
    with pytest.raises(FrameError, match="at least two frames are needed"):
        estimate_dark(darks[:1])


def test_flats_darker_than_darks():
    darks, _ = scmos_data()
    with pytest.raises(FrameError, match="no flat level is usable"):
        estimate_camera(darks, [darks[:4]])


def test_bad_pixel_mask_finds_hot_noisy_stuck_and_dead_column():
    """Robust (MAD x 1.4826) outliers of mean level and temporal noise; a dead column."""
    rng = np.random.default_rng(5)
    darks = simulate(rng, 10, electrons=0, **SCMOS).astype(np.int32)
    darks[:, 10, 20] += 400                                # hot pixel
    darks[:, 50, 60] += rng.normal(0, 60, 10).astype(int)  # noisy (telegraph-like) pixel
    darks[:, 70, 5] = 100                                  # stuck pixel, never changes
    darks[:, :, 33] = 0                                    # dead column
    mask = bad_pixel_mask(darks, n_sigma=6.0)
    expected = np.zeros(SHAPE, bool)
    expected[10, 20] = expected[50, 60] = expected[70, 5] = True
    expected[:, 33] = True
    np.testing.assert_array_equal(mask, expected)


def test_command_line_writes_camera_json(tmp_path):
    """`latticeread camera` end to end: TIFF in, JSON out, readable by load_camera."""
    darks, flats = scmos_data()
    tifffile.imwrite(tmp_path / "darks.tif", darks)
    tifffile.imwrite(tmp_path / "flats.tif", np.concatenate(flats[:5]))
    out = subprocess.run([sys.executable, "-m", "latticeread", "camera", str(tmp_path / "darks.tif"),
                          str(tmp_path / "flats.tif"), "--frames-per-level", "4", "--out",
                          str(tmp_path / "camera.json"), "--bad-pixels", str(tmp_path / "bad.npy")],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "read noise" in out.stdout
    data = json.loads((tmp_path / "camera.json").read_text())
    assert data["format"] == "latticeread-camera"
    assert len(data["photon_transfer"]["points"]) == 5
    cam = load_camera(tmp_path / "camera.json")
    assert cam.counts_per_electron == pytest.approx(0.6, rel=0.03)
    assert np.load(tmp_path / "bad.npy").shape == SHAPE


def test_command_line_refuses_uneven_levels(tmp_path):
    darks, flats = scmos_data()
    tifffile.imwrite(tmp_path / "darks.tif", darks)
    tifffile.imwrite(tmp_path / "flats.tif", np.concatenate(flats[:2]))
    out = subprocess.run([sys.executable, "-m", "latticeread", "camera", str(tmp_path / "darks.tif"),
                          str(tmp_path / "flats.tif"), "--frames-per-level", "3", "--out",
                          str(tmp_path / "camera.json")], capture_output=True, text=True, timeout=120)
    assert out.returncode == 3
    assert "cannot be split into light levels of 3 frames" in out.stderr
    assert not (tmp_path / "camera.json").exists()


def test_load_camera_wrong_type(tmp_path):
    (tmp_path / "camera.json").write_text(json.dumps({"camera": {"kind": "emccd", "em_gain": "300"}}))
    with pytest.raises(CalibrationError, match="key 'camera.em_gain' must be a number"):
        load_camera(tmp_path / "camera.json")
