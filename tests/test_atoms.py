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
        assert res.offset_method == "atoms"
        assert 0 < res.offset_sigma[0] < 0.1
        assert _max_site_error(res.geometry, truth.geometries[f], frames.shape[1:]) < 0.02
