"""Cosmic-ray hits and hot pixels: found by their shape, left out of the fit, never an atom.

Truth from the project's own forward model (:mod:`latticeread.core.simulate`, options
``hot_pixels`` and ``cosmic_rays``). The shape test is the Laplacian cosmic-ray idea of
van Dokkum (PASP 113, 1420 (2001); from memory) with the PSF's own bound.
"""

import numpy as np
import pytest

from latticeread.core import flags as site_flags
from latticeread.core.artefacts import (
    SCALES,
    PixelModel,
    bounds,
    clean_stack,
    fill_pixels,
    find_artefacts,
    find_hot_pixels,
    hot_pixel_mask,
    model_fill,
    sharpness,
)
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, calibrate
from latticeread.core.psf import airy_psf, gaussian_psf, render_sites
from latticeread.core.simulate import simulate_frames

FWHM = 4.5
PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.6, pixel_size_nm=700.0 * 0.5145 / 0.6 / FWHM)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def _geometry(size, spacing=1.1 * FWHM, angle=0.3):
    c, s = np.cos(angle), np.sin(angle)
    return LatticeGeometry((spacing * c, spacing * s), (-spacing * s, spacing * c),
                           offset=(size / 2 + 0.3, size / 2 - 0.4))


@pytest.fixture(scope="module")
def hit_stack():
    size = 128
    frames, truth = simulate_frames(geometry=_geometry(size), frame_shape=(size, size), psf=PSF, camera=CAMERA,
                                    region=("disk", 9), filling=0.45, photons_per_atom=700.0, background=1.5,
                                    n_shots=6, hot_pixels=8, cosmic_rays=4, rng=11)
    return frames, truth


def test_sharpness_orders_psf_widths_and_single_pixels():
    # a wider PSF bends less from pixel to pixel; a lone bright pixel has L / v = 4 (common practice, no source)
    wide, narrow = sharpness(gaussian_psf(fwhm=6.0)), sharpness(gaussian_psf(fwhm=2.5))
    assert 0 < wide < narrow < 4.0
    assert len(bounds(PSF)) == len(SCALES)


def test_no_false_hits_on_atoms_alone():
    rng = np.random.default_rng(2)
    x, y = rng.uniform(10, 118, 150), rng.uniform(10, 118, 150)  # overlapping atoms of varied brightness
    photons = render_sites((128, 128), x, y, rng.uniform(200, 3000, 150), PSF) + 2.0
    found = find_artefacts(rng.poisson(photons).astype(float), psf=PSF, camera=CAMERA)
    assert found.n_hits == 0 and not found.mask.any()


def test_spike_streak_and_blob_are_found():
    rng = np.random.default_rng(3)
    photons = render_sites((96, 96), [30.2, 60.7], [40.1, 50.4], [800.0, 800.0], PSF) + 2.0
    photons[10, 10] += 300.0  # one pixel
    photons[70, 20:26] += 150.0  # a streak along a row
    yy, xx = np.mgrid[0:96, 0:96]
    photons += 600.0 * np.exp(-((xx - 80) ** 2 + (yy - 80) ** 2) / 2.0) / (2 * np.pi)  # a blob of radius 1 px
    found = find_artefacts(rng.poisson(photons).astype(float), psf=PSF, camera=CAMERA)
    assert found.mask[10, 10] and found.mask[70, 20:26].all() and found.mask[80, 80]
    assert found.n_hits == 3
    assert not found.mask[38:43, 28:33].any()  # the atoms stay


def test_hot_pixels_from_the_stack(hit_stack):
    frames, truth = hit_stack
    photons = np.stack([CAMERA.counts_to_photons(f) for f in frames])
    hot = find_hot_pixels(photons, psf=PSF, camera=CAMERA)
    true = np.zeros(hot.size, bool)
    true[truth.artefacts["hot_pixel_index"]] = True
    assert np.array_equal(hot.ravel(), true)
    assert not find_hot_pixels(photons[:2], psf=PSF, camera=CAMERA).any()  # two frames cannot tell


def test_find_hot_pixels_rejects_single_frame():
    with pytest.raises(ValueError, match="expected a stack of frames"):
        find_hot_pixels(np.zeros((8, 8)))


def test_find_artefacts_rejects_wrong_inputs():
    with pytest.raises(ValueError, match="expected one 2-D frame"):
        find_artefacts(np.zeros((2, 8, 8)))
    with pytest.raises(ValueError, match="known bad-pixel mask is 4x4"):
        find_artefacts(np.zeros((8, 8)), known=np.zeros((4, 4), bool))


def test_fill_pixels_uses_neighbours_and_refuses_all_masked():
    image = np.full((20, 20), 5.0)
    image[10, 10] = 1000.0
    mask = np.zeros((20, 20), bool)
    mask[10, 10] = True
    assert fill_pixels(image, mask)[10, 10] == pytest.approx(5.0)
    assert image[10, 10] == 1000.0  # input not changed
    with pytest.raises(ValueError, match="every pixel is masked"):
        fill_pixels(image, np.ones((20, 20), bool))


def test_hot_pixel_mask_checks_pairs():
    assert hot_pixel_mask([[1, 2]], (4, 4))[1, 2]
    with pytest.raises(ValueError, match=r"\[row, col\] pairs"):
        hot_pixel_mask([1, 2, 3], (4, 4))
    with pytest.raises(ValueError, match="outside the 4x4-pixel frame"):
        hot_pixel_mask([[4, 0]], (4, 4))


def test_model_fill_predicts_the_rendered_model():
    x, y, amp = np.array([20.3, 25.1]), np.array([20.6, 22.0]), np.array([900.0, 400.0])
    image = render_sites((48, 48), x, y, amp, PSF) + 1.5
    mask = np.zeros((48, 48), bool)
    mask[19:23, 19:24] = True
    corrupted = np.where(mask, 500.0, image)
    filled = model_fill(corrupted, mask, x=x, y=y, amplitudes=amp, background=1.5, model=PixelModel(PSF))
    assert np.allclose(filled[mask], image[mask], rtol=0.02)
    assert np.array_equal(filled[~mask], image[~mask])


def test_reconstruction_never_counts_a_hit_as_an_atom(hit_stack):
    frames, truth = hit_stack
    cal = calibrate(frames, camera=CAMERA, psf=PSF, geometry=truth.geometry)
    assert cal.notes["artefacts"]["hot_pixels"] == 8 and len(cal.options.hot_pixels) == 8
    rec = Reconstructor(cal)
    lookup = {(r, c): i for i, (r, c) in enumerate(zip(truth.sites.rows, truth.sites.cols))}
    flagged = false_atoms = 0
    for f, frame in enumerate(frames):
        res = rec(frame, frame_index=f)
        idx = np.array([lookup.get((r, c), -1) for r, c in zip(res.sites.rows, res.sites.cols)])
        true_occ = np.where(idx >= 0, truth.initial_occupation[f][np.maximum(idx, 0)], 0)
        art = (res.flags & site_flags.ARTEFACT) > 0
        flagged += int(art.sum())
        false_atoms += int(np.sum(art & (res.occupied == 1) & (true_occ == 0)))
        assert np.mean(res.occupied == true_occ) > 0.99
    assert flagged > 0 and false_atoms == 0


def test_calibration_region_is_not_drawn_to_hot_pixels(hit_stack):
    """Regression: hot pixels of thousands of photons once made the calibrated region a patch of them."""
    from scipy.spatial import cKDTree

    frames, truth = hit_stack
    cal = calibrate(frames, camera=CAMERA, psf=PSF)
    res = Reconstructor(cal)(frames[0])
    x0, y0 = truth.geometries[0].offset
    dx, dy = x0 - truth.geometry.offset[0], y0 - truth.geometry.offset[1]
    dist, _ = cKDTree(np.c_[res.sites.x, res.sites.y]).query(np.c_[truth.sites.x + dx, truth.sites.y + dy])
    assert np.all(dist < 0.25 * FWHM)  # every true site is analysed
    assert 500 < cal.options.photons_per_atom < 900  # atoms, not hot pixels


def test_clean_stack_fills_hits(hit_stack):
    frames, truth = hit_stack
    photons = np.stack([CAMERA.counts_to_photons(f) for f in frames[:3]])
    cleaned = clean_stack(photons, psf=PSF, camera=CAMERA)
    assert cleaned.hot.sum() == 8 and cleaned.n_hits > 0
    hot = truth.artefacts["hot_pixel_index"]
    assert cleaned.frames.reshape(3, -1)[:, hot].max() < photons.reshape(3, -1)[:, hot].max()


def test_a_filled_region_is_not_taken_for_hits():
    """Atoms filling most of the searched part of the frame (16 x 16 sites, FWHM 2.7 pixels): the
    background under the shape test is the lower envelope of the blocks' levels. With each
    block's own 20th percentile (6 photons per pixel above a background of 0.4 in the filled
    block) 13 % of the pixels failed the test and the frame was called 'not images of atoms'."""
    from latticeread.core.calibration import Calibration
    from latticeread.core.simulate import demo_scenario

    kw = demo_scenario("square", frame_shape=(128, 128))
    kw.pop("pixel_size_nm")
    kw["region"] = ("rectangle", 16, 16)
    frames, truth = simulate_frames(**kw, n_shots=2, phase_jitter=0.2, rng=21)
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = [int(rows.min()), int(rows.max()), int(cols.min()), int(cols.max())]
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=(128, 128),
                      threshold=450.0, notes={"index_bounds": bounds})
    rec = Reconstructor(cal)
    found = find_artefacts(kw["camera"].counts_to_photons(frames[0])[rec.basis.crop], psf=kw["psf"],
                           camera=kw["camera"])
    assert found.n_hits == 0 and found.n_pixels == 0, (found.n_hits, found.n_pixels)
    assert not any("sharper than the PSF" in w for w in rec(frames[0]).warnings)
