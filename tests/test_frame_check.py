"""The image-model checks: light outside the region, residual against the camera noise, bright light explained.

Truth from the project's forward model; the reduced chi-square is common practice (no source).
"""

import numpy as np
import pytest

from latticeread.core.artefacts import PixelModel
from latticeread.core.camera import CameraModel
from latticeread.core.frame_check import amplitude_unit, camera_is_described, check_frame, outside_light
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, calibrate
from latticeread.core.psf import airy_psf, gaussian_psf, render_sites
from latticeread.core.simulate import simulate_frames
from latticeread.errors import CalibrationError

FWHM = 4.5
PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.6, pixel_size_nm=700.0 * 0.5145 / 0.6 / FWHM)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def _frame(rng, *, psf=PSF, size=96):
    x, y = np.meshgrid(np.arange(20, 76, 5.0) + 0.3, np.arange(20, 76, 5.0) - 0.2)
    x, y = x.ravel(), y.ravel()
    amp = np.where(rng.random(x.size) < 0.5, 700.0, 0.0)
    photons = rng.poisson(render_sites((size, size), x, y, amp, psf) + 2.0).astype(float)
    return photons, x, y, amp


def test_units_follow_the_camera_description():
    assert amplitude_unit(CameraModel()) == "counts" and not camera_is_described(CameraModel())
    assert amplitude_unit(CAMERA) == "photons"


def test_true_model_passes_and_wrong_psf_fails():
    rng = np.random.default_rng(4)
    photons, x, y, amp = _frame(rng)
    crop = (slice(10, 86), slice(10, 86))
    good = check_frame(photons, crop=crop, x=x, y=y, amplitudes=amp, background=2.0, model=PixelModel(PSF),
                       camera=CameraModel(kind="scmos"))
    assert good.warnings == ()
    assert 0.7 < good.residual_ratio < 1.4 and good.explained_fraction > 0.9 and good.outside_fraction < 0.05
    # the same fit judged with a PSF 1.6 times too narrow: the residual is far above the noise
    bad = check_frame(photons, crop=crop, x=x, y=y, amplitudes=amp, background=2.0,
                      model=PixelModel(gaussian_psf(fwhm=FWHM / 1.6)), camera=CameraModel(kind="scmos"))
    assert bad.residual_ratio > 3 and any("times the camera's expected noise" in w for w in bad.warnings)


def test_light_outside_the_region_is_measured():
    image = np.full((50, 50), 1.0)
    image[5, 5] += 300.0  # outside
    image[30, 30] += 100.0  # inside
    assert outside_light(image, crop=(slice(20, 45), slice(20, 45)), background=1.0) == pytest.approx(0.75, abs=0.02)


def test_calibration_refuses_a_region_that_leaves_most_light_outside(monkeypatch):
    """Whatever goes wrong in choosing the region, a region without most of the light is refused."""
    import latticeread.core.pipeline as pipeline

    size = 128
    geo = LatticeGeometry((5.0, 0.0), (0.0, 5.0), offset=(64.3, 63.6))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(size, size), psf=PSF, camera=CAMERA,
                                    region=("disk", 9), filling=0.45, photons_per_atom=700.0, background=1.5,
                                    n_shots=2, rng=5)
    monkeypatch.setattr(pipeline, "_bright_region", lambda *a, **k: (-12, -8, -12, -8))  # a corner patch
    with pytest.raises(CalibrationError, match="of the light above background lies outside the analysed region"):
        calibrate(frames, camera=CAMERA, psf=PSF, geometry=geo)


def test_reconstruction_warns_when_the_frame_has_atoms_outside_its_region():
    size = 160
    geo = LatticeGeometry((5.0, 0.0), (0.0, 5.0), offset=(80.3, 79.6))
    kw = dict(geometry=geo, frame_shape=(size, size), psf=PSF, camera=CAMERA, filling=0.45, photons_per_atom=700.0,
              background=1.5, n_shots=2)
    small, _ = simulate_frames(**kw, region=("disk", 2.5), rng=6)
    large, _ = simulate_frames(**kw, region=("disk", 14), rng=7)
    cal = calibrate(small, camera=CAMERA, psf=PSF, geometry=geo).with_options(index_bounds=(-5, 5, -5, 5))
    rec = Reconstructor(cal)
    assert not any("outside the analysed region" in w for w in rec(small[0]).warnings)
    assert rec.last_check.outside_fraction < 0.2
    assert any("outside the analysed region" in w for w in rec(large[0]).warnings)
    assert rec.last_check.outside_fraction > 0.3


def test_exports_call_amplitudes_counts_without_a_camera_description():
    from latticeread.core.calibration import Calibration
    from latticeread.io.export import units_for

    geo = LatticeGeometry((5.0, 0.0), (0.0, 5.0), offset=(10.0, 10.0))
    bare = Calibration(geometry=geo, psf=PSF, frame_shape=(32, 32))
    assert units_for(bare)["amplitude"].startswith("counts") and units_for(bare)["threshold"].startswith("counts")
    assert units_for(bare.replace(camera=CAMERA))["amplitude"] == "photons"
