"""A smooth background surface fitted with the sites in every frame (stray light that changes per frame)."""

import json

import numpy as np
import pytest

from latticeread.core.calibration import Calibration, ReconstructionOptions
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, calibrate
from latticeread.core.psf import gaussian_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import CalibrationError
from latticeread.io.calibration_file import calibration_from_json, calibration_to_json

PSF = gaussian_psf(fwhm=2.6)
CAMERA = CameraModel(kind="scmos", counts_per_electron=1.0, bias=100.0, read_noise=1.0)
GEO = LatticeGeometry((4.0, 0.3), (-0.3, 4.0), offset=(48.2, 47.7))


def _frames(structure: float, seed: int = 4):
    return simulate_frames(geometry=GEO, frame_shape=(96, 96), psf=PSF, camera=CAMERA, region=("disk", 9.0),
                           filling=0.4, photons_per_atom=600.0, background=2.0, background_structure=structure,
                           n_shots=2, rng=seed)


@pytest.fixture(scope="module")
def humped():
    frames, truth = _frames(6.0)
    cal = calibrate(frames, psf=PSF, camera=CAMERA, geometry=GEO, background="auto", correct_distortion=False,
                    correct_brightness=False)
    return frames, truth, cal


def test_auto_takes_the_surface_when_the_frames_show_one(humped):
    frames, truth, cal = humped
    assert cal.options.background == "poly2", cal.notes.get("background")
    assert cal.notes["background"].startswith("poly2")
    flat, _ = _frames(0.0, seed=5)
    plain = calibrate(flat, psf=PSF, camera=CAMERA, geometry=GEO, background="auto", correct_distortion=False,
                      correct_brightness=False)
    assert plain.options.background == "constant", plain.notes.get("background")


def test_surface_brings_the_amplitudes_closer_to_the_truth(humped):
    frames, truth, cal = humped
    errors = {}
    for model in ("constant", "poly2"):
        rec = Reconstructor(cal.with_options(background=model))
        res = [rec(f, frame_index=k) for k, f in enumerate(frames)]
        err = []
        for k, r in enumerate(res):
            true = truth.photons[k]  # photons each site gave in the exposure
            # the simulated sites are the region's; match by position
            tx, ty = truth.positions(k)
            d = np.hypot(r.sites.x[:, None] - tx[None], r.sites.y[:, None] - ty[None])
            j = np.argmin(d, axis=1)
            near = d[np.arange(len(j)), j] < 1.0
            err.append(r.amplitudes[near] - true[j[near]])
        errors[model] = float(np.sqrt(np.mean(np.concatenate(err) ** 2)))
    assert errors["poly2"] < 0.8 * errors["constant"], errors


def test_background_option_stored_and_checked(humped):
    *_, cal = humped
    back = calibration_from_json(calibration_to_json(cal))
    assert back.options.background == "poly2"
    data = json.loads(calibration_to_json(cal.with_options(background="constant")))
    assert "background" not in data["reconstruction"]  # files without a surface stay readable by older versions
    with pytest.raises(CalibrationError, match="unknown background model 'wavy'"):
        ReconstructionOptions(background="wavy")
