"""One canonical basis on every calibration route: a site keeps its (row, col).

A square lattice turned by 8 degrees (as in the square demo) is calibrated automatically,
with the lab's angle given as 8 degrees and as 98 degrees (the same lattice, named from the
other vector), and through the window's geometry estimate; the vectors must come out the
same, so the occupation matrices are not turned by 90 degrees from one route to another.
The reference is the rule of :func:`latticeread.core.lattice.canonical_basis` applied to the
simulated vectors (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice import canonical_basis
from latticeread.core.pipeline import calibrate
from latticeread.core.psf import gaussian_psf

ANGLE = np.deg2rad(8.0)
SPACING = 4.5
A2 = (SPACING * np.cos(ANGLE), SPACING * np.sin(ANGLE))                                  # along 8 deg
A1 = (SPACING * np.cos(ANGLE + np.pi / 2), SPACING * np.sin(ANGLE + np.pi / 2))          # along 98 deg
GEOMETRY = LatticeGeometry(a1=A2, a2=(-A1[0], -A1[1]), offset=(64.3, 63.6))  # a non-canonical naming
PSF = gaussian_psf(fwhm=2.6)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (128, 128)


@pytest.fixture(scope="module")
def frames():
    from latticeread.core.simulate import simulate_frames

    stack, _ = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 11),
                               filling=0.45, photons_per_atom=900.0, n_shots=4, rng=3)
    return stack


def _close(geometry, a1, a2, tol=0.05):
    return np.allclose(geometry.a1, a1, atol=tol) and np.allclose(geometry.a2, a2, atol=tol)


@pytest.fixture(scope="module")
def automatic(frames):
    return calibrate(frames, psf=PSF, camera=CAMERA, restrict_region=False, max_frames=4).geometry


def test_the_automatic_route_gives_the_canonical_basis(automatic):
    a1, a2 = canonical_basis(GEOMETRY.a1, GEOMETRY.a2)
    assert _close(automatic, a1, a2), (automatic.a1, automatic.a2, a1, a2)
    assert np.degrees(automatic.angles[1]) == pytest.approx(8.0, abs=0.5)  # a2 nearest +x


@pytest.mark.parametrize("angle_deg", [8.0, 98.0])
def test_the_labs_angle_gives_the_same_basis_as_the_automatic_route(frames, automatic, angle_deg):
    cal = calibrate(frames, psf=PSF, camera=CAMERA, restrict_region=False, max_frames=4,
                    lattice_prior={"spacing_px": SPACING, "angle_deg": angle_deg})
    assert _close(cal.geometry, automatic.a1, automatic.a2), (cal.geometry.a1, cal.geometry.a2)
    # the same atom gets the same (row, col): the offsets are the same lattice site
    rows, cols = automatic.fractional_indices(np.array([cal.geometry.offset[0]]), np.array([cal.geometry.offset[1]]))
    assert abs(rows[0] - round(rows[0])) < 0.1 and abs(cols[0] - round(cols[0])) < 0.1


def test_the_window_estimates_the_geometry_with_the_routine_of_calibrate(frames, automatic):
    from latticeread.core.calibration import Calibration
    from latticeread.session import Session

    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE), record=False)
    geometry = s.estimate_geometry_job()()
    assert _close(geometry, automatic.a1, automatic.a2), (geometry.a1, geometry.a2)
