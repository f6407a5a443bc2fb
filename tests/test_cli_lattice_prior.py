"""``latticeread calibrate`` below the optical cut-off: the lattice from the lab's spacing and angle.

For an Airy PSF the lattice's Fourier peaks lie beyond the cut-off frequency 2 NA / lambda when
the spacing is below lambda / (2 NA) = 0.97 FWHM (Born & Wolf, *Principles of Optics*: FWHM =
0.514 lambda / NA; Goodman, *Introduction to Fourier Optics*: incoherent cut-off 2 NA / lambda;
both from memory), so the Fourier estimate cannot find it; the calibration must then come from a
prior. Ground truth: the project's forward model with phase jitter between shots.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=90.0)  # FWHM 5.84 px
AIRY_ARGS = ["--psf", "airy", "--wavelength-nm", "767", "--na", "0.75", "--pixel-size-nm", "90"]
CAMERA = CameraModel(kind="emccd", em_gain=100.0, counts_per_electron=0.1, bias=100.0, read_noise=5.0,
                     quantum_efficiency=0.9)
CAMERA_ARGS = ["--em-gain", "100", "--counts-per-electron", "0.1", "--bias", "100", "--read-noise", "5",
               "--qe", "0.9"]
SPACING = 0.85 * PSF.fwhm
ANGLE = 0.3  # direction of a1, radians


@pytest.fixture(scope="module")
def stack(tmp_path_factory):
    folder = tmp_path_factory.mktemp("prior")
    geo = LatticeGeometry(a1=(SPACING * np.cos(ANGLE), SPACING * np.sin(ANGLE)),
                          a2=(SPACING * np.sin(ANGLE), -SPACING * np.cos(ANGLE)), offset=(64.3, 63.8))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=PSF, camera=CAMERA,
                                    region=("disk", 11), filling=0.35, photons_per_atom=1500.0, background=1.0,
                                    n_shots=3, phase_jitter=0.5, rng=5)
    path = folder / "tight.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    return folder, path, truth


def _spacing_and_angle_errors(found: LatticeGeometry, truth: LatticeGeometry):
    m = np.rint(np.linalg.inv(truth.basis) @ found.basis)  # same lattice, maybe another basis
    b = found.basis @ np.linalg.inv(m)
    spacing = np.max(np.abs(np.hypot(b[0], b[1]) / np.array(truth.spacings) - 1))
    angles = np.arctan2(b[1], b[0])
    true_angles = np.arctan2(truth.basis[1], truth.basis[0])
    return spacing, np.max(np.abs((angles - true_angles + np.pi) % (2 * np.pi) - np.pi))


def test_without_a_prior_the_error_says_what_to_give(stack, tmp_path, capsys):
    _, path, _ = stack
    code = main(["calibrate", str(path), "--out", str(tmp_path / "c.json"), *AIRY_ARGS, *CAMERA_ARGS])
    assert code != 0
    assert "give the spacing and angle" in capsys.readouterr().err
    assert not (tmp_path / "c.json").exists()


def test_a_prior_without_the_psf_is_refused_with_the_reason(stack, tmp_path, capsys):
    _, path, _ = stack
    code = main(["calibrate", str(path), "--out", str(tmp_path / "c.json"), *CAMERA_ARGS,
                 "--lattice-spacing", f"{SPACING:.3f}", "--lattice-angle", f"{np.degrees(ANGLE):.2f}"])
    assert code != 0
    assert "needs the PSF" in capsys.readouterr().err


def test_bad_lattice_options(stack, tmp_path, capsys):
    _, path, _ = stack
    out = str(tmp_path / "c.json")
    # values outside their range are usage errors of argparse (exit 2)
    with pytest.raises(SystemExit) as exc:
        main(["calibrate", str(path), "--out", out, "--lattice-spacing", "-3"])
    assert exc.value.code == 2 and "two pixels per site at least" in capsys.readouterr().err
    assert main(["calibrate", str(path), "--out", out, "--lattice-angle-between", "60"]) == 5
    assert "needs --lattice-angle" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["calibrate", str(path), "--out", out, "--refine-frames", "0"])
    assert exc.value.code == 2 and "at least 1" in capsys.readouterr().err
    assert main(["calibrate", str(path), "--out", out, "--lattice-spacing", "4", "5", "6"]) == 5
    assert "one or two positive values" in capsys.readouterr().err


def test_lattice_fitted_from_a_rough_prior_below_the_cut_off(stack, tmp_path, capsys):
    """Spacing 1 % and angle 0.5 degree off: the fit of 3 jittered frames finds the true lattice."""
    _, path, truth = stack
    out = tmp_path / "cal.json"
    code = main(["calibrate", str(path), "--out", str(out), *AIRY_ARGS, *CAMERA_ARGS,
                 "--lattice-spacing", f"{1.01 * SPACING:.4f}", "--lattice-angle", f"{np.degrees(ANGLE) + 0.5:.3f}",
                 "--refine-frames", "3"])
    printed = capsys.readouterr().out
    assert code == 0
    assert "fitted from the given spacing and angle on 3 frame(s)" in printed
    data = json.loads(out.read_text())
    fit = data["notes"]["geometry_from_prior"]
    assert fit["n_frames"] == 3 and 0 < fit["spacing_sigma"] < 1e-2
    found = LatticeGeometry.from_dict(data["geometry"])
    spacing, angle = _spacing_and_angle_errors(found, truth.geometry)
    # ~300 sites of 3 frames: the fit's own 1-sigma is a few 1e-4; 4 sigma allowed
    assert spacing < max(4 * fit["spacing_sigma"], 5e-4)
    assert angle < 5e-3
    assert found.quality.spacing_sigma == pytest.approx(fit["spacing_sigma"])


def test_one_frame_at_0_7_fwhm_is_flagged_and_four_are_not():
    """Below 0.75 FWHM one frame can lead the prior path to a wrong lattice: the result says so."""
    import warnings

    from latticeread.core.lattice_model import FEW_FRAMES, lattice_from_prior
    from latticeread.errors import LatticeReadWarning

    spacing = 0.7 * PSF.fwhm
    geo = LatticeGeometry(a1=(spacing * np.cos(ANGLE), spacing * np.sin(ANGLE)),
                          a2=(spacing * np.sin(ANGLE), -spacing * np.cos(ANGLE)), offset=(48.3, 47.8))
    frames, _ = simulate_frames(geometry=geo, frame_shape=(96, 96), psf=PSF, region=("disk", 9), filling=0.35,
                                photons_per_atom=1500.0, background=1.0, n_shots=FEW_FRAMES, rng=12)
    kw = dict(psf=PSF, spacing=spacing, angle=ANGLE - np.pi / 2, angle_between=np.pi / 2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LatticeReadWarning)
        one = lattice_from_prior(frames[:1].astype(float), **kw)
        four = lattice_from_prior(frames.astype(float), **kw)
    assert any("wrong lattice" in w for w in one.quality.warnings)
    assert not any("wrong lattice" in w for w in four.quality.warnings)
