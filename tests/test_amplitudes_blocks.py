"""Stamps read block by block (latticeread.core.amplitudes._StampBlocks) against scipy's interpolation.

Outside reference: ``scipy.ndimage.map_coordinates`` (cubic B-spline with ``prefilter=False``, and
linear) evaluated value by value at every stamp pixel; the block reading must give the same numbers
to rounding, including emitters exactly half a pixel off and emitters farther off (read value by
value instead).
"""

import numpy as np
import pytest
from scipy import ndimage

from latticeread.core.amplitudes import _StampBlocks, _StampSampler
from latticeread.core.lattice_model import _PSFTable
from latticeread.core.psf import airy_psf, gaussian_psf

PSFS = [airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0), gaussian_psf(fwhm=4.5)]


def _offsets(n=60, seed=4):
    rng = np.random.default_rng(seed)
    dx, dy = rng.uniform(-0.5, 0.5, n), rng.uniform(-0.5, 0.5, n)
    dx[:4] = [-0.5, 0.5, 0.0, 0.7]  # the edges of the blocks' range, and one beyond it
    dy[:4] = [0.5, -0.5, 0.4999999999, -1.3]
    return dx, dy


def _scipy_stamps(table, k, origin, radius, dx, dy, order):
    p = np.arange(-radius, radius + 1, dtype=float)
    cy = (p[None, :, None] - dy[:, None, None]) * k + origin
    cx = (p[None, None, :] - dx[:, None, None]) * k + origin
    cy, cx = np.broadcast_arrays(cy, cx)
    return ndimage.map_coordinates(table, [cy.ravel(), cx.ravel()], order=order, prefilter=False,
                                   mode="mirror").reshape(dx.size, p.size, p.size)


@pytest.mark.parametrize("psf", PSFS, ids=["airy", "gaussian"])
def test_cubic_stamps_equal_scipy_map_coordinates(psf):
    sampler = _StampSampler(psf)
    assert sampler.blocks.blocks is not None
    dx, dy = _offsets()
    ref = _scipy_stamps(sampler.coef, sampler.k, sampler.origin, sampler.radius, dx, dy, order=3)
    ref /= ref.sum(axis=(1, 2), keepdims=True)
    got = sampler(dx, dy)
    assert np.abs(got - ref).max() < 1e-12 * np.abs(ref).max()


@pytest.mark.parametrize("psf", PSFS, ids=["airy", "gaussian"])
def test_linear_tables_and_their_sums_equal_scipy_map_coordinates(psf):
    table = _PSFTable(psf)
    dx, dy = _offsets(seed=5)
    values, sums = table.raw(dx, dy, (0, 1, 2))
    for t, (got, total) in enumerate(zip(values, sums)):
        ref = _scipy_stamps(table.tables[t], table.k, table.origin, table.radius, dx, dy, order=1)
        scale = np.abs(ref).max()
        assert np.abs(got - ref).max() < 1e-12 * scale
        assert np.abs(total - ref.sum(axis=(1, 2))).max() < 1e-10 * scale
    covered = table.blocks.covers(dx, dy)
    assert covered[:3].all() and not covered[3]


def test_block_reading_refuses_an_emitter_it_does_not_cover():
    table = _PSFTable(PSFS[1])
    with pytest.raises(ValueError, match="more than half a pixel"):
        table.blocks(np.array([0.9]), np.array([0.0]))


def test_blocks_too_large_fall_back_to_reading_value_by_value(monkeypatch):
    import latticeread.core.amplitudes as amplitudes

    monkeypatch.setattr(amplitudes, "BLOCK_TABLE_BYTES", 1000)
    psf = PSFS[1]
    sampler = _StampSampler(psf)
    assert sampler.blocks.blocks is None
    dx, dy = _offsets(n=8)
    ref = _scipy_stamps(sampler.coef, sampler.k, sampler.origin, sampler.radius, dx, dy, order=3)
    ref /= ref.sum(axis=(1, 2), keepdims=True)
    assert np.abs(sampler(dx, dy) - ref).max() < 1e-12 * np.abs(ref).max()


def test_unknown_interpolation_order_is_refused():
    with pytest.raises(ValueError, match="linear \\(1\\) or cubic \\(3\\)"):
        _StampBlocks([np.zeros((50, 50))], k=4, origin=25, radius=2, order=2)


def test_banded_factor_takes_the_narrowest_ordering_and_solves_like_numpy():
    """The banded Cholesky factor with the sites ordered by pixel row equals numpy.linalg.solve (dense)."""
    import scipy.sparse

    from latticeread.core.amplitudes import _BandedSPD
    from latticeread.core.geometry import LatticeGeometry, lattice_sites

    angle = 0.6
    a1 = (-2.4 * np.sin(angle), 2.4 * np.cos(angle))
    a2 = (2.4 * np.cos(angle), 2.4 * np.sin(angle))
    geometry = LatticeGeometry(a1=a1, a2=a2, offset=(40.2, 39.7))
    sites = lattice_sites(geometry, (80, 80))
    x, y = np.asarray(sites.x), np.asarray(sites.y)
    rng = np.random.default_rng(0)
    # a banded SPD matrix coupling sites closer than 8 pixels, in the lattice's own order
    d = np.hypot(x[:, None] - x[None], y[:, None] - y[None])
    dense = np.where(d < 8.0, np.exp(-d / 3.0), 0.0) + np.eye(len(x))
    matrix = scipy.sparse.csr_matrix(dense)
    natural = _BandedSPD(matrix)
    ordered = _BandedSPD(matrix, orders=(np.lexsort((x, y)), np.lexsort((y, x))))
    assert ordered.bandwidth < natural.bandwidth
    rhs = rng.normal(size=len(x))
    ref = np.linalg.solve(dense, rhs)
    assert np.abs(ordered.solve(rhs) - ref).max() < 1e-10 * np.abs(ref).max()
    assert np.abs(natural.solve(rhs) - ref).max() < 1e-10 * np.abs(ref).max()
