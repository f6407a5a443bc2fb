"""Lens distortion: the field fitted to simulated frames recovers the simulator's barrel coefficient.

Truth: :func:`latticeread.core.simulate_features.distort` moves every site to
``c + (p - c)(1 + k1 |p - c|^2)``; in the field's normalised coordinates (``u = (x - cx) / s``)
its cubic part is ``k1 s^3 (u^3 + u v^2)`` for x and ``k1 s^3 (u^2 v + v^3)`` for y (expanded by
hand), whatever the centre ``c``.
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.atoms import locate_atoms, offset_from_atoms
from latticeread.core.calibration import Calibration
from latticeread.core.distortion import fit_distortion
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor
from latticeread.core.psf import gaussian_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import LatticeNotFound

SHAPE = (256, 256)
MARGIN = 8.0  # atoms end this many pixels inside the frame edge
PSF = gaussian_psf(fwhm=4.2)
GEOMETRY = LatticeGeometry(a1=(5.98, 0.42), a2=(-0.42, 5.98), offset=(128.3, 127.6))


def _simulate(k1, *, filling=0.4, seed=4):
    frames, truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, filling=filling,
                                    photons_per_atom=2500.0, background=1.0, distortion_k1=k1,
                                    distortion_centre=(9.0, -6.0), margin=MARGIN, rng=np.random.default_rng(seed))
    return np.asarray(frames, float), truth


def _fit(frames):
    atoms = locate_atoms(frames, fwhm=PSF.fwhm)
    offset = offset_from_atoms(frames[0], GEOMETRY, fwhm=PSF.fwhm, atoms=atoms.in_frame(0)).offset
    return fit_distortion(frames, GEOMETRY, psf=PSF, offsets=[offset], atoms=atoms)


@pytest.fixture(scope="module")
def barrel():
    k1 = -4e-7  # corners ~1.2 px from the undistorted lattice, ~0.1 spacing off the best perfect one
    frames, truth = _simulate(k1)
    return k1, frames, truth, _fit(frames)


def test_barrel_coefficient_and_site_positions_are_recovered(barrel):
    k1, frames, truth, fit = barrel
    field = fit.field
    assert field.applied and field.p_value < 1e-6
    # k1 read back from the fitted field at the true sites: least squares of its displacement on
    # a shift, a linear map and the radial term (p - c)|p - c|^2 about the simulator's centre
    tx, ty = truth.positions(0)
    cx, cy = (SHAPE[1] - 1) / 2 + 9.0, (SHAPE[0] - 1) / 2 - 6.0
    ux, uy = tx - cx, ty - cy
    r2 = ux ** 2 + uy ** 2
    dx, dy = field.shift(tx, ty)
    one, nil = np.ones_like(tx), np.zeros_like(tx)
    design = np.vstack([np.column_stack([one, nil, tx, ty, nil, nil, ux * r2]),
                        np.column_stack([nil, one, nil, nil, tx, ty, uy * r2])])
    k1_fit = np.linalg.lstsq(design, np.concatenate([dx, dy]), rcond=None)[0][-1]
    # seeds 1, 2: -4.05e-7 and -4.03e-7 for -4e-7
    assert k1_fit == pytest.approx(k1, rel=0.1)
    # every simulated site is placed within 0.02 spacing by the fitted lattice and field
    cal = Calibration(geometry=fit.geometry, psf=PSF, frame_shape=SHAPE, distortion=field)
    sites = Reconstructor(cal, refit_phase=False).sites
    d = np.hypot(tx[:, None] - sites.x[None, :], ty[:, None] - sites.y[None, :]).min(axis=1)
    spacing = min(GEOMETRY.spacings)
    assert d.max() < 0.02 * spacing
    # without the field the same lattice misses the corners by far more
    plain = Reconstructor(cal.replace(distortion=None), refit_phase=False).sites
    d0 = np.hypot(tx[:, None] - plain.x[None, :], ty[:, None] - plain.y[None, :]).min(axis=1)
    assert d0.max() > 0.05 * spacing


def test_an_undistorted_lattice_gets_no_applied_field():
    frames, _ = _simulate(0.0, seed=5)
    field = _fit(frames).field
    assert not field.applied
    assert field.max_shift < 0.02 * min(GEOMETRY.spacings)


def test_too_few_atoms_for_a_field_says_so():
    frames, _ = _simulate(-4e-7, filling=0.01, seed=6)
    with pytest.raises(LatticeNotFound, match="blocks of the frames hold enough atoms"):
        _fit(frames)
