"""Atoms located one by one and the lattice read from their positions (latticeread.core.atoms).

Truth comes from the project's forward model (latticeread.core.simulate). Outside checks:
the localisation error of an isolated spot is compared with sigma_psf / sqrt(N photons), the
photon-limited precision (Thompson, Larson & Webb, Biophys. J. 82, 2775 (2002); from memory),
and the lattice is found where an ideal Airy PSF passes no lattice frequency at all: spacing
below lambda / (2 NA) = 0.97 FWHM, the incoherent cut-off (Born & Wolf, Principles of Optics,
from memory), so the test frames below 0.97 FWHM hold no Fourier peak of the lattice.
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.atoms import lattice_from_atoms, locate_atoms, offset_from_atoms
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf, gaussian_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import FrameError, LatticeNotFound


def _rot(length, angle):
    return (length * np.cos(angle), length * np.sin(angle))


def _airy(fwhm):
    # Airy FWHM = 0.5145 lambda / NA (Born & Wolf): pick the pixel size that gives ``fwhm`` pixels
    return airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=0.5145 * 1000.0 / fwhm)


def _frames(geometry, psf, *, shape=(256, 256), filling=0.1, photons=700.0, background=1.0, seed=0, n_shots=1,
            **kw):
    frames, truth = simulate_frames(geometry=geometry, frame_shape=shape, psf=psf, filling=filling,
                                    photons_per_atom=photons, background=background, rng=seed, n_shots=n_shots,
                                    margin=0, **kw)
    return frames.astype(float), truth


def _max_site_error(found: LatticeGeometry, truth: LatticeGeometry, shape) -> float:
    """Largest distance from a true site in the frame to the nearest found site, in spacings."""
    from latticeread.core.geometry import lattice_sites

    sites = lattice_sites(truth, shape)
    rel = np.stack([sites.x, sites.y]) - np.asarray(found.offset)[:, None]
    frac = np.linalg.inv(found.basis) @ rel
    d = found.basis @ (frac - np.rint(frac))
    return float(np.hypot(*d).max() / min(truth.spacings))


def test_isolated_atoms_are_located_to_the_photon_limited_precision():
    fwhm = 4.0
    geometry = LatticeGeometry(a1=(0.0, 3 * fwhm), a2=(3 * fwhm, 0.0), offset=(127.3, 126.8))
    psf = gaussian_psf(fwhm=fwhm)
    photons = 2000.0
    frames, truth = _frames(geometry, psf, filling=0.5, photons=photons, background=0.0, seed=3)
    atoms = locate_atoms(frames, fwhm=fwhm)
    occupied = truth.initial_occupation[0].astype(bool)
    tx, ty = truth.sites.x[occupied], truth.sites.y[occupied]
    assert atoms.single.sum() >= 0.9 * occupied.sum()
    x, y = atoms.x[atoms.single], atoms.y[atoms.single]
    d2 = (x[:, None] - tx[None]) ** 2 + (y[:, None] - ty[None]) ** 2
    err = np.sqrt(d2.min(axis=1))
    limit = fwhm / 2.3548 / np.sqrt(photons)  # Thompson-Larson-Webb, photon-limited term
    rms = np.sqrt(np.mean(err**2) / 2)  # per axis
    assert rms < 1.6 * limit
    assert 0.6 < rms / np.median(atoms.sigma[atoms.single]) < 1.6  # the reported error is honest


@pytest.mark.parametrize("kind, ratio, between, filling", [
    ("square", 0.75, np.pi / 2, 0.1),
    ("triangular", 0.9, np.pi / 3, 0.15),
    ("oblique", 1.2, np.deg2rad(75.0), 0.3),
])
def test_lattice_from_atoms_beyond_the_cut_off(kind, ratio, between, filling):
    fwhm = 5.0
    spacing = ratio * fwhm
    geometry = LatticeGeometry(a1=_rot(spacing, 0.35 + between), a2=_rot(spacing * (1.1 if kind == "oblique" else 1),
                                                                          0.35), offset=(128.4, 127.1))
    frames, _ = _frames(geometry, _airy(fwhm), filling=filling, seed=7)
    found = lattice_from_atoms(frames, fwhm=fwhm)
    assert _max_site_error(found, geometry, frames.shape[1:]) < 0.02
    assert found.quality.spacing_sigma < 2e-3


def test_lattice_from_atoms_of_a_stack_shares_the_vectors_and_ignores_drift():
    fwhm = 5.0
    geometry = LatticeGeometry(a1=_rot(3.6, 1.9), a2=_rot(3.6, 1.9 - np.pi / 2), offset=(128.4, 127.1))
    frames, truth = _frames(geometry, _airy(fwhm), filling=0.06, seed=11, n_shots=3, phase_drift=(1.1, -0.7))
    found = lattice_from_atoms(frames, fwhm=fwhm)
    assert _max_site_error(found, truth.geometries[0], frames.shape[1:]) < 0.02
    for f in range(3):
        off = offset_from_atoms(frames[f], found, fwhm=fwhm)
        assert _max_site_error(found.with_offset(off.offset), truth.geometries[f], frames.shape[1:]) < 0.02
        assert 0 < off.sigma[0] < 0.05 * 3.6


def test_error_locate_atoms_needs_a_positive_fwhm():
    with pytest.raises(ValueError, match="fwhm must be a positive number of pixels"):
        locate_atoms(np.zeros((32, 32)), fwhm=0.0)


def test_error_locate_atoms_refuses_nan():
    image = np.zeros((32, 32))
    image[3, 4] = np.nan
    with pytest.raises(FrameError, match="NaN or infinite pixels"):
        locate_atoms(image, fwhm=3.0)


def test_error_locate_atoms_refuses_4d():
    with pytest.raises(FrameError, match=r"expected a frame \(H, W\) or a stack"):
        locate_atoms(np.zeros((2, 2, 32, 32)), fwhm=3.0)


def test_error_no_lattice_without_atoms():
    rng = np.random.default_rng(1)
    with pytest.raises(LatticeNotFound, match="single atoms were found"):
        lattice_from_atoms(rng.poisson(2.0, (128, 128)).astype(float), fwhm=4.0)


def test_error_offset_needs_single_atoms():
    geometry = LatticeGeometry(a1=(0.0, 5.0), a2=(5.0, 0.0), offset=(60.0, 60.0))
    with pytest.raises(LatticeNotFound, match="single atoms in the frame"):
        offset_from_atoms(np.ones((128, 128)), geometry, fwhm=4.0)


def test_check_geometry_flags_a_lattice_a_tenth_of_a_spacing_off():
    from latticeread.core.atoms import check_geometry

    fwhm = 4.0
    geometry = LatticeGeometry(a1=_rot(3.6, 1.9), a2=_rot(3.6, 1.9 - np.pi / 2), offset=(128.4, 127.1))
    frames, _ = _frames(geometry, _airy(fwhm), filling=0.08, seed=2, n_shots=2)
    atoms = locate_atoms(frames, fwhm=fwhm)
    good = check_geometry(atoms, geometry)
    assert good.ok and good.max_deviation < 0.03
    # 0.35 % too long: the sites 30 spacings from the centre are a tenth of a spacing off
    wrong = LatticeGeometry(a1=tuple(1.0035 * np.asarray(geometry.a1)), a2=tuple(1.0035 * np.asarray(geometry.a2)),
                            offset=geometry.offset)
    bad = check_geometry(atoms, wrong)
    assert not bad.ok and bad.max_deviation > 0.05
    assert "the lattice misses the atoms" in bad.warning


def test_calibrate_unaided_beyond_the_cut_off_reads_the_lattice_from_the_atoms():
    """calibrate with only the PSF: the geometry and every frame's offset come from the atoms."""
    from latticeread.core.pipeline import calibrate, reconstruct_stack

    fwhm = 5.0
    psf = _airy(fwhm)
    geometry = LatticeGeometry(a1=_rot(4.0, 1.2), a2=_rot(4.0, 1.2 - np.pi / 2), offset=(100.2, 99.6))
    frames, truth = _frames(geometry, psf, shape=(200, 200), filling=0.12, seed=4, n_shots=2, phase_jitter=0.8)
    cal = calibrate(frames, psf=psf)
    assert cal.notes["geometry_method"] == "atoms"
    assert cal.options.phase_method == "atoms"
    assert cal.notes["geometry_check"]["ok"]
    results = list(reconstruct_stack(frames, cal))
    for f, res in enumerate(results):
        # started from the atoms, refined by the fit of all occupied sites where that is more precise
        assert res.offset_method in ("atoms", "sites")
        assert 0 < res.offset_sigma[0] < 0.1
        assert _max_site_error(res.geometry, truth.geometries[f], frames.shape[1:]) < 0.02
    # asked for the Fourier phase at 0.8 FWHM: the atoms decide, and the frame says why
    from latticeread.core.pipeline import Reconstructor

    res = Reconstructor(cal, phase_method="fourier")(frames[1], frame_index=1)
    assert res.offset_method in ("atoms", "sites")
    assert any("the Fourier phase was not used" in w for w in res.warnings)
    assert _max_site_error(res.geometry, truth.geometries[1], frames.shape[1:]) < 0.02
    # a frame with a handful of atoms: its offset is said to be poorly determined, through the
    # analysis service into the record every output is written from
    from latticeread.analysis.service import analyse_stack, shot_record
    from latticeread.io.run_file import ShotKey

    few, _ = _frames(geometry, psf, shape=(200, 200), filling=0.006, seed=9)  # 9 atoms
    (result,) = analyse_stack(few, cal)
    record = shot_record(ShotKey("/tmp/few.tif", "0" * 32, 0), result)
    assert any("lattice offset is poorly determined" in w for w in record.warnings), record.warnings


@pytest.fixture(scope="module")
def filled_core():
    """A densely filled frame (filling 0.93) at 0.95 FWHM: beyond the cut-off, few atoms stand apart."""
    fwhm = 5.0
    geometry = LatticeGeometry(a1=_rot(4.75, 0.55 + np.pi / 2), a2=_rot(4.75, 0.55), offset=(85.3, 84.6))
    frames, truth = _frames(geometry, _airy(fwhm), shape=(170, 170), filling=0.93, photons=700.0, seed=5)
    return fwhm, geometry, frames, truth


def test_holes_of_a_filled_core_sit_on_empty_sites_and_give_the_lattice(filled_core):
    from latticeread.core.atoms import locate_holes, merge_located

    fwhm, geometry, frames, truth = filled_core
    holes = locate_holes(frames, fwhm=fwhm)
    single = holes.single
    assert single.sum() >= 40
    # each isolated hole lies on an empty site (nearest true site within a quarter spacing)
    sx, sy = truth.sites.x, truth.sites.y
    d2 = (holes.x[single, None] - sx[None]) ** 2 + (holes.y[single, None] - sy[None]) ** 2
    nearest = d2.argmin(axis=1)
    assert np.mean(np.sqrt(d2.min(axis=1)) < 0.25 * 4.75) > 0.9
    assert np.mean(truth.initial_occupation[0][nearest] == 0) > 0.9
    # the atoms alone do not give the lattice; with the holes it is found
    atoms = locate_atoms(frames, fwhm=fwhm)
    found = lattice_from_atoms(frames, fwhm=fwhm, atoms=merge_located(atoms, holes))
    assert _max_site_error(found, geometry, frames.shape[1:]) < 0.05


def test_a_sparse_frame_has_no_holes():
    from latticeread.core.atoms import locate_holes

    fwhm = 4.0
    geometry = LatticeGeometry(a1=_rot(4.0, 1.2), a2=_rot(4.0, 1.2 - np.pi / 2), offset=(64.2, 63.6))
    frames, _ = _frames(geometry, _airy(fwhm), shape=(128, 128), filling=0.1, seed=1)
    assert not locate_holes(frames, fwhm=fwhm).single.any()


def test_error_locate_holes_needs_a_positive_fwhm():
    from latticeread.core.atoms import locate_holes

    with pytest.raises(ValueError, match="fwhm must be a positive number of pixels"):
        locate_holes(np.zeros((32, 32)), fwhm=-1.0)


def test_error_merge_located_refuses_different_stacks():
    from latticeread.core.atoms import merge_located

    one = locate_atoms(np.zeros((32, 32)), fwhm=3.0)
    two = locate_atoms(np.zeros((2, 32, 32)), fwhm=3.0)
    with pytest.raises(ValueError, match="different numbers of frames"):
        merge_located(one, two)
    with pytest.raises(ValueError, match="nothing to merge"):
        merge_located()


def test_offset_warning_names_few_atoms_and_a_large_error():
    from latticeread.core.pipeline import offset_warning

    assert offset_warning((0.02, 0.02), 200, 5.0) == ""
    few = offset_warning((0.02, 0.02), 4, 5.0)
    assert "poorly determined" in few and "4 atom(s)" in few
    assert "poorly determined" in offset_warning((0.2, 0.2), 200, 5.0)


def test_an_uncertain_lattice_from_few_atoms_is_refined_by_the_image_model():
    """Vectors 0.4 % off with a 1-sigma far-site error above the limit: the image-model fit fixes them."""
    from latticeread.core.geometry import LatticeQuality
    from latticeread.core.pipeline import _refine_atom_geometry

    fwhm = 5.0
    truth = LatticeGeometry(a1=_rot(4.5, 0.4 + np.pi / 3), a2=_rot(4.5, 0.4), offset=(100.2, 99.6))
    frames, _ = _frames(truth, _airy(fwhm), shape=(200, 200), filling=0.15, seed=2, photons=900.0)
    atoms = locate_atoms(frames, fwhm=fwhm)
    off = LatticeGeometry(a1=tuple(1.004 * np.asarray(truth.a1)), a2=tuple(1.004 * np.asarray(truth.a2)),
                          offset=truth.offset, quality=LatticeQuality(spacing_sigma=2e-3))
    assert _max_site_error(off, truth, frames.shape[1:]) > 0.1
    notes: dict = {}
    fixed = _refine_atom_geometry(frames, off, psf=_airy(fwhm), atoms=atoms, notes=notes)
    assert notes["vectors_model_fit"]["kept"]
    assert _max_site_error(fixed, truth, frames.shape[1:]) < 0.025
    # a precise start is left alone
    precise = off.with_offset(off.offset, quality=LatticeQuality(spacing_sigma=1e-5))
    assert _refine_atom_geometry(frames, precise, psf=_airy(fwhm), atoms=atoms, notes={}) is precise


def test_lattice_from_atoms_at_three_pixels_is_not_fooled_by_folded_harmonics():
    """Spacing 3.2 px: harmonics beyond half a cycle per pixel fold into the band of the points' spectrum."""
    fwhm = 4.0
    # this frame gave a cell of 8.45 px (a folded harmonic) before the points were spread on a finer grid
    geometry = LatticeGeometry(a1=(-2.69364, 1.72752), a2=(1.72752, 2.69364), offset=(255.5396, 255.0819))
    frames, _ = _frames(geometry, _airy(fwhm), shape=(512, 512), filling=0.05, photons=600.0, seed=0)
    found = lattice_from_atoms(frames, fwhm=fwhm)
    assert _max_site_error(found, geometry, frames.shape[1:]) < 0.03


def test_a_third_of_the_points_on_a_lattice_give_that_lattice_or_none():
    """A third of the points on a lattice among random ones (as merged spots crowd a dense frame):
    the fit keeps the points near a site, so it finds the lattice they sit on, never another."""
    from latticeread.core.atoms import LocatedAtoms

    rng = np.random.default_rng(4)
    n = 400
    # a weak square pattern (every third point on a lattice of spacing 8) among random points
    on = np.arange(n) % 3 == 0
    x = np.where(on, 20 + 8.0 * rng.integers(0, 20, n), rng.uniform(10, 180, n))
    y = np.where(on, 20 + 8.0 * rng.integers(0, 20, n), rng.uniform(10, 180, n))
    atoms = LocatedAtoms(x=x, y=y, photons=np.ones(n), width=np.ones(n), sigma=np.full(n, 0.05),
                         frame=np.zeros(n, int), single=np.ones(n, bool))
    try:
        found = lattice_from_atoms(np.zeros((192, 192)), fwhm=4.0, atoms=atoms)
    except LatticeNotFound as exc:
        assert "fit the lattice only in part" in str(exc) or "do not sit on the lattice" in str(exc)
        return
    truth = LatticeGeometry(a1=(0.0, 8.0), a2=(8.0, 0.0), offset=(20.0, 20.0))
    assert _max_site_error(found, truth, (192, 192)) < 0.02
    assert found.quality.n_sites_used < 0.6 * n  # the random points are left out


def test_pixel_noise_is_not_swamped_by_a_crowded_frame():
    """The wavelet (Donoho-Johnstone) noise of a frame filled with atoms is the pixels' own noise."""
    from latticeread.core.atoms import pixel_noise

    rng = np.random.default_rng(5)
    s = 4.0 / 2.3548  # Gaussian spots of FWHM 4 px on a 3.2 px square lattice, filling 0.6, peak 60 photons
    yy, xx = np.mgrid[0:128, 0:128].astype(float)
    light = np.zeros((128, 128))
    for cy in np.arange(2.0, 126.0, 3.2):
        for cx in np.arange(2.0, 126.0, 3.2):
            if rng.random() < 0.6:
                light += 60.0 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * s * s))
    # photon noise of the light and of 1 photon/px of background, and read noise of 2 photons
    noisy = rng.poisson(light + 1.0) + rng.normal(0.0, 2.0, light.shape)
    typical = float(np.median(np.sqrt(light + 1.0 + 4.0)))  # the median pixel's own noise
    assert 0.8 * typical < pixel_noise(noisy) < 1.3 * typical
    # a robust spread of the frame itself is the atoms' light, several times the noise
    assert 1.4826 * np.median(np.abs(noisy - np.median(noisy))) > 3 * pixel_noise(noisy)


def test_error_pixel_noise_needs_two_by_two_pixels():
    from latticeread.core.atoms import pixel_noise

    with pytest.raises(FrameError, match="at least 2x2 pixels are needed to estimate its noise"):
        pixel_noise(np.zeros((1, 5)))


def test_lattice_from_atoms_at_uniform_filling_beyond_the_cut_off():
    """Spacing 1.0 FWHM, filling 0.3: the crowded frame's spread is the atoms' light (no candidate passed a
    threshold on it); the noise comes from the wavelets, the plateau goes with the band-pass filter."""
    fwhm = 4.0
    geometry = LatticeGeometry(a1=_rot(4.0, 0.3 + np.pi / 2), a2=_rot(4.0, 0.3), offset=(128.3, 127.6))
    frames, _ = _frames(geometry, _airy(fwhm), filling=0.3, photons=400.0, seed=2)
    found = lattice_from_atoms(frames, fwhm=fwhm)
    assert _max_site_error(found, geometry, frames.shape[1:]) < 0.02


def test_error_a_lattice_that_holds_in_part_of_the_frame_only_is_refused():
    """Atoms on a lattice in the left two thirds, at random in the right third."""
    from latticeread.core.atoms import LocatedAtoms

    rng = np.random.default_rng(6)
    gx, gy = np.meshgrid(np.arange(2, 16) * 8.0, np.arange(2, 24) * 8.0)
    lx, ly = gx.ravel() + rng.normal(0, 0.1, gx.size), gy.ravel() + rng.normal(0, 0.1, gx.size)
    rx, ry = rng.uniform(132, 190, 150), rng.uniform(16, 184, 150)
    x, y = np.concatenate([lx, rx]), np.concatenate([ly, ry])
    n = x.size
    atoms = LocatedAtoms(x=x, y=y, photons=np.ones(n), width=np.ones(n), sigma=np.full(n, 0.1),
                         frame=np.zeros(n, int), single=np.ones(n, bool))
    with pytest.raises(LatticeNotFound, match="fit the lattice only in part of the frame"):
        lattice_from_atoms(np.zeros((200, 200)), fwhm=4.0, atoms=atoms)


def test_error_a_cell_twice_too_large_is_refused():
    """Every second row of atoms half a cell off the sites: the cell found holds only half the atoms."""
    from latticeread.core.atoms import _check_half_cell

    rng = np.random.default_rng(8)
    gx, gy = np.meshgrid(np.arange(20) * 4.0, np.arange(20) * 4.0)
    keep = rng.random(gx.size) < 0.5
    x, y = gx.ravel()[keep] + rng.normal(0, 0.1, keep.sum()), gy.ravel()[keep] + rng.normal(0, 0.1, keep.sum())
    frame = np.zeros(x.size, int)
    _check_half_cell(x, y, frame, np.array([[4.0, 0.0], [0.0, 4.0]]), np.zeros((1, 2)))  # the true cell passes
    with pytest.raises(LatticeNotFound, match="the cell is probably twice too large"):
        _check_half_cell(x, y, frame, np.array([[8.0, 0.0], [0.0, 4.0]]), np.zeros((1, 2)))
