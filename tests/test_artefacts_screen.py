"""The fast cosmic-ray search finds exactly what the whole-frame shape test finds.

:func:`latticeread.core.artefacts.find_artefacts` scores only tiles near pixels that a cheap
bound (``_screen``) cannot clear; ``_excess_reference`` is the whole-frame computation (every
filter on every pixel, then :func:`skimage.filters.apply_hysteresis_threshold`, the general
library the fast path's own hysteresis is compared with). Frames from the project's forward
model with hits, hot pixels, structured background and dense atoms, plus hits placed on
frame edges and tile borders.
"""

import numpy as np
import pytest
from scipy import ndimage

from latticeread.core import artefacts
from latticeread.core.artefacts import bounds, find_artefacts
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf, gaussian_psf
from latticeread.core.simulate import simulate_frames

FWHM = 4.5
PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.6, pixel_size_nm=700.0 * 0.5145 / 0.6 / FWHM)
SCMOS = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)
EMCCD = CameraModel(kind="emccd", em_gain=100.0, counts_per_electron=1.0, bias=200.0, read_noise=40.0)


def _frames(camera, *, size=150, filling=0.45, seed=5, structure=0.0):
    spacing = 1.1 * FWHM
    c, s = np.cos(0.3), np.sin(0.3)
    geometry = LatticeGeometry((spacing * c, spacing * s), (-spacing * s, spacing * c),
                               offset=(size / 2 + 0.3, size / 2 - 0.4))
    frames, _ = simulate_frames(geometry=geometry, frame_shape=(size, size), psf=PSF, camera=camera,
                                region=("disk", size / spacing / 2.3), filling=filling, photons_per_atom=900.0,
                                background=1.5, n_shots=2, hot_pixels=12, cosmic_rays=8, background_structure=structure,
                                rng=seed)
    return [camera.counts_to_photons(f) for f in frames]


def _edge_hits(seed=7, size=96):
    """Atoms plus single pixels, streaks and blobs on the frame's edges, corners and tile borders."""
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(0, size, 60), rng.uniform(0, size, 60)
    from latticeread.core.psf import render_sites

    photons = render_sites((size, size), x, y, rng.uniform(300, 2000, 60), PSF) + 2.0
    t = artefacts._TILE
    photons[0, 0] += 400.0
    photons[size - 1, 40] += 250.0
    photons[t - 1:t + 1, t - 1:t + 1] += 120.0  # a blob across four tiles
    photons[2 * t, t - 3:t + 4] += 60.0  # a streak across a tile border
    photons[50:57, size - 1] += 80.0  # a streak along the right edge
    yy, xx = np.mgrid[0:size, 0:size]
    photons += 500.0 * np.exp(-((xx - 3 * t) ** 2 + (yy - size + 1) ** 2) / 1.5) / (1.5 * np.pi)
    return rng.poisson(photons).astype(float)


@pytest.fixture(scope="module")
def cases():
    out = []
    for frame in _frames(SCMOS):
        out.append((frame, SCMOS, bounds(PSF)))
    for frame in _frames(EMCCD, filling=0.9, seed=6, structure=4.0):  # dense atoms, stray light
        out.append((frame, EMCCD, bounds(PSF)))
    edge = _edge_hits()
    out.append((edge, SCMOS, bounds(PSF)))
    out.append((edge, SCMOS, bounds(gaussian_psf(fwhm=artefacts.SHARPEST_FWHM))))  # the first-pass default
    out.append((edge, CameraModel(), bounds(PSF)))  # photon noise only: no variance at zero photons
    return out


def test_fast_search_finds_exactly_the_whole_frame_hits(cases):
    n_found = 0
    for frame, camera, ks in cases:
        finite = np.isfinite(frame)
        for n_sigma, grow in ((5.5, 3.0), (4.0, 2.0)):
            kw = dict(ks=ks, camera=camera, block=32, n_sigma=n_sigma, grow_sigma=grow, finite=finite)
            fast, _ = artefacts._excess_windows(frame, **kw)
            slow, _ = artefacts._excess_reference(frame, **kw)
            assert np.array_equal(fast, slow)
            n_found += int(slow.sum())
    assert n_found > 100  # the comparison saw hits, not only empty masks


def test_screen_misses_no_pixel_the_shape_test_flags(cases):
    # at a low level the whole-frame test flags many pixels (noise, atom edges): each must be screened
    for frame, camera, ks in cases:
        score, _ = artefacts._excess(frame, ks=ks, camera=camera, block=32)
        levels = artefacts._block_levels(frame, 32)
        for level in (2.0, 5.5):
            screened = artefacts._screen(frame, levels, ks=ks, camera=camera, n_sigma=level)
            above = score > level
            assert above.any()
            assert not (above & ~screened).any()
        assert screened.mean() < 0.05  # and the screen is selective at the detection level


def test_find_artefacts_masks_match_the_whole_frame_path(cases, monkeypatch):
    frame, camera, ks = cases[0]
    known = np.zeros(frame.shape, bool)
    known[10, 20] = known[70, 3] = True
    frame = frame.copy()
    frame[40, 40] = np.nan
    fast = find_artefacts(frame, camera=camera, ks=ks, known=known)
    monkeypatch.setattr(artefacts, "_excess_windows", artefacts._excess_reference)
    slow = find_artefacts(frame, camera=camera, ks=ks, known=known)
    assert fast.n_hits > 0
    assert np.array_equal(fast.mask, slow.mask) and fast.n_hits == slow.n_hits
    assert fast.charge == pytest.approx(slow.charge, rel=1e-9)


def test_interpolated_background_is_scipy_zoom():
    # the window-wise background interpolation against scipy.ndimage.zoom (order 1, grid mode)
    levels = np.random.default_rng(1).uniform(0, 10, (5, 7))
    for shape in ((160, 224), (163, 230)):
        zoomed = ndimage.zoom(levels, (shape[0] / 5, shape[1] / 7), order=1, mode="nearest", grid_mode=True)
        ours = artefacts._interpolated(levels, shape, np.arange(shape[0])[:, None], np.arange(shape[1])[None, :])
        assert np.allclose(ours, zoomed, rtol=0, atol=1e-12)
