"""The site basis with a PSF that changes across the field (per-site mixes of local PSFs)."""

import numpy as np
import pytest

from latticeread.core.amplitudes import SiteBasis
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import gaussian_psf, render_sites
from latticeread.errors import ReconstructionError

GEO = LatticeGeometry((5.0, 0.3), (-0.3, 5.0), offset=(30.2, 29.7))
SHAPE = (60, 60)
SHARP = gaussian_psf(fwhm=3.0, radius=7)
WIDE = gaussian_psf(fwhm=4.2, radius=7)


@pytest.fixture(scope="module")
def setup():
    sites = lattice_sites(GEO, SHAPE)
    # left half sharp, right half wide, a linear blend in between
    t = np.clip((sites.x - 20.0) / 20.0, 0.0, 1.0)
    weights = np.c_[1 - t, t]
    rng = np.random.default_rng(3)
    inner = (sites.x > 10) & (sites.x < 50) & (sites.y > 10) & (sites.y < 50)  # no light from outside the frame
    amps = np.where((rng.random(len(sites)) < 0.5) & inner, 1000.0, 0.0)
    image = np.full(SHAPE, 2.0)
    for psf, w in ((SHARP, 1 - t), (WIDE, t)):
        image = image + render_sites(SHAPE, sites.x, sites.y, amps * w, psf)
    basis = SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites, local_psfs=[SHARP, WIDE],
                      local_weights=weights)
    return sites, weights, amps, image, basis


def test_local_mix_recovers_noiseless_amplitudes(setup):
    sites, weights, amps, image, basis = setup
    c, d = basis.project(image)
    a, b = basis.solve(c, d)
    assert np.max(np.abs(a - amps)) < 0.03 * 1000
    assert abs(b[0] - 2.0) < 0.05
    # one PSF everywhere leaves a clear error on the wide side
    plain = SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites)
    a0, _ = plain.solve(*plain.project(image))
    assert np.max(np.abs(a0 - amps)) > 3 * np.max(np.abs(a - amps))


def test_local_projection_matches_explicit_basis(setup):
    _, _, _, image, basis = setup
    offset = (GEO.offset[0] + 0.37, GEO.offset[1] - 0.21)
    fast, _ = basis.project(image, offset=offset)
    exact = basis.project_exact(image, offset=offset)
    assert np.max(np.abs(fast - exact)) < 5e-3 * np.max(np.abs(exact))  # as for one PSF


def test_local_weights_checked():
    sites = lattice_sites(GEO, SHAPE)
    with pytest.raises(ReconstructionError, match="sum to 1"):
        SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites, local_psfs=[SHARP, WIDE],
                  local_weights=np.full((len(sites), 2), 0.7))
    with pytest.raises(ReconstructionError, match="local PSF weights are"):
        SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites, local_psfs=[SHARP, WIDE],
                  local_weights=np.ones((3, 2)) / 2)
    with pytest.raises(ReconstructionError, match="stamp radius"):
        SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites, local_psfs=[SHARP, gaussian_psf(fwhm=4.0, radius=9)],
                  local_weights=np.ones((len(sites), 2)) / 2)


def test_poly_background_follows_a_hump_per_frame():
    """A broad hump plus a gradient: the degree-2 background takes it, a constant one cannot."""
    sites = lattice_sites(GEO, SHAPE)
    inner = (sites.x > 10) & (sites.x < 50) & (sites.y > 10) & (sites.y < 50)
    amps = np.where((np.random.default_rng(5).random(len(sites)) < 0.4) & inner, 1000.0, 0.0)
    yy, xx = np.mgrid[0:SHAPE[0], 0:SHAPE[1]]
    hump = 3.0 + 0.04 * xx + 4.0 * np.exp(-((xx - 25) ** 2 + (yy - 33) ** 2) / (2 * 40.0**2))
    image = hump + render_sites(SHAPE, sites.x, sites.y, amps, SHARP)
    errors = {}
    for model in ("constant", "poly2"):
        basis = SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, sites=sites, background=model)
        a, b = basis.solve(*basis.project(image))
        errors[model] = np.max(np.abs(a - amps)[inner])
        if model == "poly2":
            fitted = basis.background_image(b)
            assert np.max(np.abs(fitted - hump)[10:50, 10:50]) < 0.1
            assert abs(basis.background_level(b) - hump[basis.crop].mean()) < 0.1
    assert errors["poly2"] < 5.0  # photons of 1000
    assert errors["constant"] > 4 * errors["poly2"]


def test_unknown_background_model_named():
    with pytest.raises(ReconstructionError, match="unknown background model 'poly9'.*'poly3'"):
        SiteBasis(GEO, frame_shape=SHAPE, psf=SHARP, background="poly9")
