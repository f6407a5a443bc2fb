"""The per-frame offset from a real-space fit of the occupied sites (:meth:`SiteBasis.fit_offset_sites`),
checked against the forward model's truth below the optical cut-off (spacing 0.8 FWHM)."""

import numpy as np
import pytest

from latticeread.core.amplitudes import SiteBasis
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, SiteGrid
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import ReconstructionError

PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=180.0)  # FWHM 2.86 px
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)
SHAPE = (120, 120)


@pytest.fixture(scope="module")
def scene():
    s = 0.8 * PSF.fwhm
    geo = LatticeGeometry(a1=(s * np.cos(0.3), s * np.sin(0.3)), a2=(-s * np.sin(0.3), s * np.cos(0.3)),
                          offset=(60.2, 59.7))
    frames, truth = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 16),
                                    filling=0.3, photons_per_atom=600.0, background=1.0, n_shots=3,
                                    phase_jitter=0.5, rng=5)
    basis = SiteBasis(geo, frame_shape=SHAPE, psf=PSF)
    return geo, basis, [CAMERA.counts_to_photons(f) for f in frames], truth


def _error(found, truth, geo):
    d = np.asarray(found) - np.asarray(truth)
    frac = np.linalg.inv(geo.basis) @ d
    return geo.basis @ (frac - np.rint(frac))


def test_offset_of_occupied_sites_matches_the_truth_within_its_sigma(scene):
    geo, basis, images, truth = scene
    spacing = min(geo.spacings)
    for k, image in enumerate(images):
        fit = basis.fit_offset_sites(image, atom_photons=600.0, search=True)
        err = _error(fit.offset, truth.geometries[k].offset, geo)
        sigma = np.asarray(fit.sigma)
        assert np.all(np.isfinite(sigma)) and np.all(sigma < 0.02 * spacing)
        assert np.all(np.abs(err) < 4 * sigma + 1e-3)  # the 1-sigma is honest
        assert np.hypot(*err) < 0.02 * spacing
        assert fit.n_atoms > 20
        assert fit.atom_photons == pytest.approx(600.0, rel=0.15)


def test_offset_of_occupied_sites_ignores_atoms_outside_the_fitted_sites(scene):
    # fitted sites: a block in the middle of the cloud; atoms around it light its edge
    geo, _, images, truth = scene
    full = SiteBasis(geo, frame_shape=SHAPE, psf=PSF)
    s = full.sites
    keep = (np.abs(s.rows - np.median(s.rows)) <= 12) & (np.abs(s.cols - np.median(s.cols)) <= 12)
    block = SiteGrid(rows=s.rows[keep], cols=s.cols[keep], x=s.x[keep], y=s.y[keep], row_min=int(s.rows[keep].min()),
                     col_min=int(s.cols[keep].min()), n_rows=25, n_cols=25)
    basis = SiteBasis(geo, frame_shape=SHAPE, psf=PSF, sites=block, background="none")
    for k, image in enumerate(images):  # (the background is known here: 1 photon per pixel)
        fit = basis.fit_offset_sites(image - 1.0, atom_photons=600.0, start=truth.geometries[k].offset)
        err = _error(fit.offset, truth.geometries[k].offset, geo)
        # with every block site in the sums, the unmodelled neighbours pull one frame 0.04 spacing away
        assert np.hypot(*err) < 0.03 * min(geo.spacings)


def test_offset_of_occupied_sites_needs_a_positive_atom():
    geo = LatticeGeometry(a1=(3.0, 0.0), a2=(0.0, 3.0), offset=(20.0, 20.0))
    basis = SiteBasis(geo, frame_shape=(40, 40), psf=PSF)
    with pytest.raises(ReconstructionError, match="needs the photons of one atom as a positive number"):
        basis.fit_offset_sites(np.zeros((40, 40)), atom_photons=0.0)
