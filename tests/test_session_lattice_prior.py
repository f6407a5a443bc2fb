"""The window's calibration below the optical cut-off: the geometry panel's spacing and angle
reach the calibration as the prior of the image-model fit (session level, no Qt).

Same scenario and outside reference as tests/test_cli_lattice_prior.py (Airy cut-off 2 NA /
lambda, Goodman; FWHM 0.514 lambda / NA, Born & Wolf; both from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from test_cli_lattice_prior import ANGLE, CAMERA, PSF, SPACING, _spacing_and_angle_errors

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.simulate import simulate_frames
from latticeread.errors import LatticeNotFound
from latticeread.session import Session


@pytest.fixture(scope="module")
def tight():
    geo = LatticeGeometry(a1=(SPACING * np.cos(ANGLE), SPACING * np.sin(ANGLE)),
                          a2=(SPACING * np.sin(ANGLE), -SPACING * np.cos(ANGLE)), offset=(64.3, 63.8))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=PSF, camera=CAMERA,
                                    region=("disk", 11), filling=0.35, photons_per_atom=1500.0, background=1.0,
                                    n_shots=2, phase_jitter=0.3, rng=8)
    session = Session()
    session.set_frames(frames)
    session.update_settings(psf_source="airy", pixel_size_nm=90.0, wavelength_nm=767.0, numerical_aperture=0.75,
                            camera=CAMERA.to_dict())
    return session, truth


def test_without_constraints_the_calibration_says_what_is_missing(tight):
    session, _ = tight
    with pytest.raises(LatticeNotFound, match="give the spacing and angle"):
        session.calibrate_job()()


def test_constraints_become_the_prior_of_the_model_fit(tight):
    session, truth = tight
    job = session.calibrate_job(constraints={"spacing_px": 1.01 * SPACING, "angle_deg": np.degrees(ANGLE) + 0.5})
    cal = job()
    fit = cal.notes["geometry_from_prior"]
    assert fit["n_frames"] == 2
    spacing, angle = _spacing_and_angle_errors(cal.geometry, truth.geometry)
    assert spacing < max(4 * fit["spacing_sigma"], 5e-4)
    assert angle < 5e-3
    assert any("uncertain to" in w for w in cal.notes["warnings"])  # 2 frames cannot give 1e-4


def test_geometry_estimate_holds_the_panel_constraints():
    """Spacing and direction from the panel are held fixed (extra keys such as spacing_nm ignored)."""
    spacing, angle = 1.3 * PSF.fwhm, 0.2
    geo = LatticeGeometry(a1=(spacing * np.cos(angle), spacing * np.sin(angle)),
                          a2=(spacing * np.sin(angle), -spacing * np.cos(angle)), offset=(48.3, 47.8))
    frames, _ = simulate_frames(geometry=geo, frame_shape=(96, 96), psf=PSF, region=("disk", 6), filling=0.4,
                                photons_per_atom=1500.0, background=1.0, n_shots=3, rng=4)
    session = Session()
    session.set_frames(frames)
    fixed = {"spacing_px": 1.01 * spacing, "spacing_nm": 1.01 * spacing * 90.0, "angle_deg": np.degrees(angle)}
    found = session.estimate_geometry_job(constraints=fixed)()
    np.testing.assert_allclose(found.spacings, [1.01 * spacing] * 2, rtol=1e-9)
    directions = np.degrees(np.arctan2(found.basis[1], found.basis[0]))
    assert np.min(np.abs((directions - np.degrees(angle) + 180) % 360 - 180)) < 1e-6  # a1 or a2 along it
