"""The Cramer-Rao bound on the lattice vectors (latticeread.core.lattice_bound).

Outside references:
- One Gaussian spot of N photons without background: position variance sigma^2 / N (Ober, Ram &
  Ward, Biophys. J. 86, 1185 (2004), quoted from memory); pixels of size 1 widen sigma^2 by
  about 1/12 (Mortensen et al., Nat. Methods 7, 377 (2010), from memory), 0.5 % here.
- Independent emitters on a lattice: the vectors are a linear regression of the positions on
  the site indices, covariance sigma_pos^2 (X^T X)^-1 (ordinary least squares; Gauss-Markov).
- EMCCD at high gain: excess noise factor 2 in variance (Robbins & Hadwen 2003).
- Profiling out more nuisance parameters never lowers the bound (Schur complement of a positive
  definite Fisher matrix; Kay 1993, ch. 3).
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice_bound import lattice_precision_bound
from latticeread.core.psf import airy_psf, gaussian_psf

SIGMA = 2.5  # Gaussian PSF standard deviation, pixels
FWHM = SIGMA * 2 * np.sqrt(2 * np.log(2))


def _grid(n):
    rows, cols = np.meshgrid(np.arange(n) - n // 2, np.arange(n) - n // 2, indexing="ij")
    return rows.ravel(), cols.ravel()


def test_isolated_spots_reach_the_single_emitter_bound_and_its_regression():
    """5x5 spots 40 pixels apart: vectors = least-squares regression of sigma^2/N positions."""
    photons = 20_000.0
    geometry = LatticeGeometry(a1=(40.0, 0.0), a2=(0.0, 40.0), offset=(120.3, 119.6))
    rows, cols = _grid(5)
    psf = gaussian_psf(fwhm=FWHM)
    bound = lattice_precision_bound(geometry, frame_shape=(240, 240), psf=psf, rows=rows, cols=cols,
                                    photons=np.full(rows.size, photons), background=1e-6, free="none")
    sigma_pos2 = (SIGMA ** 2 + 1 / 12) / photons  # Ober et al. 2004 with the pixel term of Mortensen 2010
    x = np.stack([rows, cols, np.ones(rows.size)], axis=1).astype(float)
    expected = sigma_pos2 * np.linalg.inv(x.T @ x)  # x-coordinates: (a1x, a2x, offset_x)
    got = bound.covariance[np.ix_([0, 2, 4], [0, 2, 4])]
    np.testing.assert_allclose(np.diag(got), np.diag(expected), rtol=0.005)
    # the relative spacing error of a1 = sd(a1x) / 40
    assert bound.spacing_relative[0] == pytest.approx(np.sqrt(expected[0, 0]) / 40.0, rel=0.02)
    assert bound.angle[0] == pytest.approx(np.sqrt(sigma_pos2 * np.linalg.inv(x.T @ x)[0, 0]) / 40.0, rel=0.02)


def test_isolated_symmetric_spots_lose_nothing_when_brightness_is_free():
    """A symmetric spot's brightness and position decouple: the bound barely changes (< 1 %)."""
    geometry = LatticeGeometry(a1=(30.0, 2.0), a2=(-2.0, 30.0), offset=(100.0, 100.0))
    rows, cols = _grid(5)
    kw = dict(frame_shape=(200, 200), psf=gaussian_psf(fwhm=FWHM), rows=rows, cols=cols,
              photons=np.full(rows.size, 800.0), background=1.0)
    known = lattice_precision_bound(geometry, free="none", **kw)
    free = lattice_precision_bound(geometry, free="amplitudes", **kw)
    np.testing.assert_allclose(free.spacing_relative, known.spacing_relative, rtol=0.01)


def test_more_free_parameters_never_lower_the_bound_and_overlap_costs_precision():
    spacing = 9.0
    psf = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=0.5145 * 767.0 / 0.75 / 11.25)
    geometry = LatticeGeometry(a1=(spacing, 0.4), a2=(-0.4, spacing), offset=(60.0, 60.0))
    rows, cols = _grid(11)
    occupied = np.random.default_rng(3).random(rows.size) < 0.4
    kw = dict(frame_shape=(120, 120), psf=psf, rows=rows, cols=cols, photons=np.where(occupied, 500.0, 0.0),
              background=2.0)
    bounds = [lattice_precision_bound(geometry, free=free, **kw) for free in ("none", "brightness", "amplitudes")]
    spacing_sd = [b.spacing_relative[0] for b in bounds]
    assert spacing_sd[0] <= spacing_sd[1] <= spacing_sd[2]
    # spacing / FWHM = 0.8: the unknown amplitudes of overlapping neighbours cost well over 10 %
    assert spacing_sd[2] > 1.1 * spacing_sd[0]


def test_emccd_excess_noise_and_several_frames_scale_the_bound():
    geometry = LatticeGeometry(a1=(12.0, 0.0), a2=(0.0, 12.0), offset=(60.0, 60.0))
    rows, cols = _grid(7)
    kw = dict(frame_shape=(120, 120), psf=gaussian_psf(fwhm=FWHM), rows=rows, cols=cols,
              photons=np.full(rows.size, 400.0), background=1.0)
    one = lattice_precision_bound(geometry, **kw)
    emccd = lattice_precision_bound(geometry, excess_noise=2.0, **kw)
    four = lattice_precision_bound(geometry, n_frames=4, **kw)
    np.testing.assert_allclose(emccd.spacing_relative, np.sqrt(2) * np.array(one.spacing_relative), rtol=1e-9)
    np.testing.assert_allclose(four.spacing_relative, np.array(one.spacing_relative) / 2, rtol=1e-9)
    # each frame keeps its own offset: four frames do not pin frame 0's offset much better
    assert four.offset > 0.9 * one.offset


def test_bad_arguments_are_named():
    geometry = LatticeGeometry(a1=(12.0, 0.0), a2=(0.0, 12.0), offset=(30.0, 30.0))
    kw = dict(frame_shape=(60, 60), psf=gaussian_psf(fwhm=FWHM), rows=[0, 1], cols=[0, 0], photons=[100.0, 100.0])
    with pytest.raises(ValueError, match="free must be one of"):
        lattice_precision_bound(geometry, background=1.0, free="all", **kw)
    with pytest.raises(ValueError, match="background must be positive"):
        lattice_precision_bound(geometry, background=0.0, **kw)
    with pytest.raises(ValueError, match="do not fix both lattice vectors"):
        lattice_precision_bound(geometry, background=1.0, **kw)  # two sites on one line
    with pytest.raises(ValueError, match="one value per site"):
        lattice_precision_bound(geometry, background=1.0, **{**kw, "photons": [1.0]})
