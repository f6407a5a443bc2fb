"""Uneven brightness: the map fitted at calibration recovers the simulator's Gaussian beam, and
classifying against it reads the frames as well as the true map does.

Truth: :func:`latticeread.core.simulate_features.illumination` gives each site
``exp(-2 r^2 / w^2)`` about the beam centre (Gaussian beam intensity; common practice, no
source), which a degree-2 log-polynomial holds exactly.
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.brightness import BrightnessMap, fit_brightness
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import calibrate, reconstruct_stack
from latticeread.core.psf import gaussian_psf
from latticeread.core.simulate import simulate_frames
from latticeread.core.simulate_features import illumination
from latticeread.errors import ReconstructionError

SHAPE = (256, 256)
GEOMETRY = LatticeGeometry(a1=(6.0, 0.3), a2=(-0.3, 6.0), offset=(128.2, 127.7))
PSF = gaussian_psf(fwhm=4.5)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=1.5)
WAIST, BEAM = 260.0, (15.0, -10.0)


@pytest.fixture(scope="module")
def beam():
    frames, truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, filling=0.4,
                                    photons_per_atom=120.0, background=3.0, n_shots=2, illumination_waist=WAIST,
                                    illumination_centre=BEAM, margin=6.0, rng=np.random.default_rng(2))
    cal = calibrate(frames, psf=PSF, camera=CAMERA, geometry=GEOMETRY, correct_distortion=False)
    return frames, truth, cal


def _fidelity(frames, truth, cal):
    out = []
    for k, r in enumerate(reconstruct_stack(frames, cal)):
        tx, ty = truth.positions(k)
        j = ((tx[:, None] - r.sites.x[None, :]) ** 2 + (ty[:, None] - r.sites.y[None, :]) ** 2).argmin(axis=1)
        out.append(np.mean(r.occupied[j] == truth.initial_occupation[k]))
    return float(np.mean(out))


def test_gaussian_beam_is_recovered_within_ten_percent_where_it_matters(beam):
    _, truth, cal = beam
    b = cal.brightness
    assert b is not None and b.applied and b.p_value < 1e-6
    x, y = truth.sites.x, truth.sites.y
    centre = illumination(np.array([b.centre[0]]), np.array([b.centre[1]]), frame_shape=SHAPE, waist=WAIST,
                          centre=BEAM)[0]
    true_rel = truth.illumination / centre
    err = b.relative(x, y) / true_rel - 1
    # measured (seed 2, these 2 frames): 1.9 % rms over the sites with 4 frames; at worst 8.4 %
    # where the beam gives half the centre's light or more and 10 % at the dimmest corners
    # (0.41), where the map reads high (atoms near the threshold there are missed more often)
    assert np.max(np.abs(err[true_rel >= 0.5])) < 0.10
    assert np.max(np.abs(err)) < 0.13
    assert b.low == pytest.approx(true_rel.min(), abs=0.06)


def test_classifying_against_the_map_is_as_good_as_the_true_map(beam):
    frames, truth, cal = beam
    exact = fit_brightness(truth.sites.x, truth.sites.y, truth.illumination, frame_shape=SHAPE)
    exact = BrightnessMap(**{**exact.to_dict(), "applied": True})
    handled = _fidelity(frames, truth, cal)
    oracle = _fidelity(frames, truth, cal.replace(brightness=exact))
    assert handled >= oracle - 0.002
    # the map is what makes the difference: the same calibration without it misreads the dim edge
    assert _fidelity(frames, truth, cal.replace(brightness=None)) < handled - 0.001


def test_too_few_occupied_sites_for_a_map_says_so():
    with pytest.raises(ReconstructionError, match="only 3 occupied sites"):
        fit_brightness([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], [100.0, 90.0, 80.0], frame_shape=SHAPE)


def test_factor_never_below_the_floor_far_from_the_atoms():
    from latticeread.core.brightness import MIN_FACTOR, BrightnessMap

    # log b = -(u^2 + v^2): a Gaussian beam of 1/e radius 10 pixels about (50, 50)
    m = BrightnessMap(centre=(50.0, 50.0), scale=10.0, order=2, coef=(0.0, 0.0, -1.0, 0.0, -1.0), applied=True)
    f = m.factor(np.array([50.0, 55.0, 90.0]), np.array([50.0, 50.0, 90.0]))
    assert f[0] == pytest.approx(1.0) and f[1] == pytest.approx(np.exp(-0.25))
    assert f[2] == MIN_FACTOR and m.relative(90.0, 90.0) < 1e-6  # the map itself is not clipped
