"""The binary refinement's local search, restricted to the sites that can decide, gives exactly the
result of the straightforward search (every neighbourhood reduced in every pass), kept here as the
reference; with and without pixels left out of the fit (a corrected normal matrix)."""

import numpy as np
import pytest

from latticeread.core.amplitudes import SiteBasis
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=180.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def _reference_local_search(n, rhs, gram, diag, pattern, *, atom, max_iter, dead=None, moves=None):
    """Single-site flips; when none helps, moves of an atom to a neighbouring empty site.

    A move ``k -> l`` changes the energy by ``atom^2 (G_kk + G_ll - 2 G_kl) - 2 atom (g_l - g_k)``
    with ``g = h - atom G n``: at small spacings the typical error is an atom on the wrong one
    of two neighbouring sites, which no single flip can repair without first raising the energy.
    """
    g = rhs - atom * (gram @ n.astype(float))
    order = np.arange(n.size) * 1e-12  # deterministic tie-break
    indptr, indices = pattern.indptr, pattern.indices
    nonempty = np.diff(indptr) > 0
    passes = 0

    def neighbourhood_min(values):
        out = np.full(n.size, np.inf)
        out[nonempty] = np.minimum.reduceat(values[indices], indptr[:-1][nonempty])
        return out

    for passes in range(1, max_iter + 1):
        d_e = atom * atom * diag + np.where(n, 2 * atom * g, -2 * atom * g)
        d_e = d_e * (1 + order)
        if dead is not None:
            d_e[dead] = np.inf
        if np.any(d_e < 0):
            flip = (d_e < 0) & (d_e <= neighbourhood_min(d_e))
            idx = np.flatnonzero(flip)
            delta = np.where(n[idx], -1.0, 1.0)
            n[idx] = ~n[idx]
            g -= atom * (gram[idx].T @ delta)
            continue
        if moves is None:
            break
        src, dst, cost = moves  # cost = G_kk + G_ll - 2 G_kl for each ordered pair
        ok = n[src] & ~n[dst]
        if dead is not None:
            ok &= ~dead[dst]
        d_m = np.where(ok, atom * atom * cost - 2 * atom * (g[dst] - g[src]), np.inf)
        d_m = d_m * (1 + order[src])
        if not np.any(d_m < 0):
            break
        best = np.full(n.size, np.inf)  # best move touching each site
        np.minimum.at(best, src, d_m)
        np.minimum.at(best, dst, d_m)
        near = neighbourhood_min(best)
        take = np.flatnonzero((d_m < 0) & (d_m <= near[src]) & (d_m <= near[dst]))
        # one move per site even if two moves tie
        _, first = np.unique(np.concatenate([src[take], dst[take]]), return_index=True)
        used = np.zeros(2 * take.size, bool)
        used[first] = True
        take = take[used[:take.size] & used[take.size:]]
        if take.size == 0:
            break
        k, l = src[take], dst[take]
        n[k] = False
        n[l] = True
        g -= atom * (gram[l].T @ np.ones(l.size) - gram[k].T @ np.ones(k.size))
    return n, g, passes


@pytest.fixture(scope="module")
def scene():
    s = 0.7 * PSF.fwhm
    geo = LatticeGeometry(a1=(s * np.cos(0.2), s * np.sin(0.2)), a2=(-s * np.sin(0.2), s * np.cos(0.2)),
                          offset=(40.3, 39.6))
    frames, _ = simulate_frames(geometry=geo, frame_shape=(80, 80), psf=PSF, camera=CAMERA, region=("disk", 10),
                                filling=0.4, photons_per_atom=500.0, background=1.0, n_shots=2, rng=11)
    return SiteBasis(geo, frame_shape=(80, 80), psf=PSF), [CAMERA.counts_to_photons(f) for f in frames]


@pytest.mark.parametrize("bad_pixels", [False, True])
def test_local_search_matches_the_straightforward_search(scene, bad_pixels, monkeypatch):
    basis, images = scene
    saturated = None
    if bad_pixels:
        saturated = np.zeros(images[0].shape, bool)
        saturated[38:41, 30:33] = True
    fast = [basis.nonlinear(im, atom_photons=500.0, saturated=saturated) for im in images]
    monkeypatch.setattr(SiteBasis, "_local_search", staticmethod(_reference_local_search))
    slow = [basis.nonlinear(im, atom_photons=500.0, saturated=saturated) for im in images]
    for f, s in zip(fast, slow):
        assert np.array_equal(f.amplitudes, s.amplitudes)
        assert f.iterations == s.iterations
    assert all(f.iterations > 1 for f in fast)  # the searches did flip sites
