"""Tests of the empirical PSF estimate from isolated atoms (latticeread.core.psf_estimate)."""

import numpy as np
import pytest

from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import airy_psf, empirical_psf, render_sites
from latticeread.core.psf_estimate import estimate_psf, measure_kernel
from latticeread.core.simulate import simulate_frames
from latticeread.errors import FrameError, ReconstructionError

# Invented setting: potassium-39 fluorescence at 767 nm, NA 0.75 objective, 175 nm camera
# pixels in the atom plane; lattice from 1064 nm beams (spacing 532 nm = 3.04 pixels).
WAVELENGTH_NM, NA, PIXEL_NM = 767.0, 0.75, 175.0
SPACING_PX = 532.0 / PIXEL_NM


def _geometry(offset=(48.3, 47.7), angle_deg=8.0):
    a = np.deg2rad(angle_deg)
    return LatticeGeometry((SPACING_PX * np.cos(a), SPACING_PX * np.sin(a)),
                           (-SPACING_PX * np.sin(a), SPACING_PX * np.cos(a)), offset=offset)


def _emccd():
    return CameraModel(kind="emccd", em_gain=150.0, counts_per_electron=0.05, bias=200.0, read_noise=3.0,
                       quantum_efficiency=0.9, clock_induced_charge=0.005)


def _sparse_frames(psf, *, n_frames=16, filling=0.04, rng=0, photons=1500.0, jitter=0.4):
    geo = _geometry()
    cam = _emccd()
    frames, truth = simulate_frames(geometry=geo, frame_shape=(96, 96), psf=psf, camera=cam,
                                    region=("disk", 14), filling=filling, photons_per_atom=photons,
                                    brightness_spread=0.1, background=0.5, n_shots=n_frames,
                                    phase_jitter=jitter, rng=rng)
    return cam.counts_to_photons(frames), geo, truth


def test_airy_fwhm_matches_born_and_wolf():
    """FWHM of the estimated PSF = 0.514 lambda/NA.

    Source: Born & Wolf, *Principles of Optics*, section 8.5.2 (Airy pattern FWHM
    0.514 lambda/NA; value quoted from memory). Frames come from the project's forward
    model with EMCCD noise, a 10 % brightness spread and a random lattice phase per frame
    (0.4 pixel RMS) that the estimator must re-find.
    """
    psf = airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM)
    frames, geo, _ = _sparse_frames(psf, rng=1)
    est = estimate_psf(frames, geo)
    expected = 0.514 * WAVELENGTH_NM / NA / PIXEL_NM  # pixels
    assert est.kind == "empirical"
    assert est.fwhm == pytest.approx(expected, rel=0.03)
    assert est.params["ellipticity"] < 0.04
    assert est.params["n_atoms"] >= 50
    assert est.params["warnings"] == []
    # normalisation contract of empirical kernels
    assert est.kernel.sum() / est.supersample**2 == pytest.approx(1.0, abs=1e-9)
    # the whole stamp, not only its width: compare with the true pixel-integrated stamp
    truth_psf = airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM,
                         radius=est.radius)
    got = est.stamps([0.3], [-0.2])[0]
    want = truth_psf.stamps([0.3], [-0.2])[0]
    assert np.abs(got - want).max() < 0.05 * want.max()


def test_elliptical_gaussian_ellipticity_and_axis():
    """An elliptical Gaussian PSF (sigma 1.6 and 1.1 pixels, major axis at 30 degrees).

    Expected: ellipticity 1 - 1.1/1.6 = 0.3125, FWHM = 2 sqrt(2 ln 2) sigma along each axis
    (Gaussian FWHM, common practice, no source). Noise-free images with a wrong lattice
    offset given to the estimator, from the PSF model's own pixel integration.
    """
    s_major, s_minor, theta = 1.6, 1.1, np.deg2rad(30.0)
    ss = 5
    g = np.arange(-12 * ss, 12 * ss + 1) / ss
    X, Y = np.meshgrid(g, g)
    u = X * np.cos(theta) + Y * np.sin(theta)
    v = -X * np.sin(theta) + Y * np.cos(theta)
    kern = np.exp(-0.5 * (u / s_major) ** 2 - 0.5 * (v / s_minor) ** 2)
    psf = empirical_psf(kern, supersample=ss, fwhm=2.3548 * np.sqrt(s_major * s_minor), radius=9)
    geo = _geometry(offset=(60.1, 59.6))
    rng = np.random.default_rng(7)
    frames = []
    grid = lattice_sites(geo, (120, 120), margin=11)
    for _ in range(8):
        occ = rng.random(len(grid)) < 0.02
        frames.append(render_sites((120, 120), grid.x[occ], grid.y[occ], np.full(occ.sum(), 1000.0), psf) + 2.0)
    wrong = geo.with_offset((geo.offset[0] + 0.9, geo.offset[1] - 0.7))
    est = estimate_psf(np.array(frames), wrong)
    k = 2 * np.sqrt(2 * np.log(2))
    assert est.params["ellipticity"] == pytest.approx(1 - s_minor / s_major, abs=0.02)
    assert est.params["fwhm_major"] == pytest.approx(k * s_major, rel=0.03)
    assert est.params["fwhm_minor"] == pytest.approx(k * s_minor, rel=0.03)
    assert est.params["major_axis_angle"] == pytest.approx(theta, abs=np.deg2rad(3))


def test_pairs_with_per_frame_geometry():
    """A list of (image, geometry) pairs with the true per-frame offsets gives the same width.

    Source: Born & Wolf Airy FWHM 0.514 lambda/NA, as above.
    """
    psf = airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM)
    frames, _, truth = _sparse_frames(psf, n_frames=12, rng=2)
    frames[0, 40:44, 40:44] = np.nan  # a patch of bad pixels: atoms touching it are skipped
    est = estimate_psf(list(zip(frames, truth.geometries)), refit_offset=False, max_atoms=45)
    assert est.params["n_atoms"] <= 45
    assert np.all(np.isfinite(est.kernel))
    assert any("atoms went into the PSF" in w for w in est.params["warnings"])  # fewer than 50
    assert est.to_dict()["params"]["warnings"] == est.params["warnings"]
    assert est.fwhm == pytest.approx(0.514 * WAVELENGTH_NM / NA / PIXEL_NM, rel=0.04)


def test_measure_kernel_on_a_known_gaussian():
    """measure_kernel on a sampled round Gaussian gives 2 sqrt(2 ln 2) sigma (common practice, no source)."""
    ss, sigma = 4, 1.3
    g = np.arange(-10 * ss, 10 * ss + 1) / ss
    X, Y = np.meshgrid(g, g)
    m = measure_kernel(np.exp(-(X**2 + Y**2) / (2 * sigma**2)), supersample=ss)
    assert m["fwhm"] == pytest.approx(2 * np.sqrt(2 * np.log(2)) * sigma, rel=2e-3)
    assert m["ellipticity"] < 2e-3


def test_too_few_isolated_atoms_says_how_many():
    psf = airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM)
    frames, geo, _ = _sparse_frames(psf, n_frames=2, rng=3)
    with pytest.raises(ReconstructionError, match=r"found \d+ isolated atoms in 2 frames .*need at least 500"):
        estimate_psf(frames, geo, min_atoms=500)


def test_saturated_atoms_are_skipped():
    psf = airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM)
    frames, geo, _ = _sparse_frames(psf, n_frames=2, rng=3)
    with pytest.raises(ReconstructionError, match=r"found 0 isolated atoms .* \d+ more were saturated"):
        estimate_psf(frames, geo, saturation=50.0)  # every atom's peak pixel is above 50 photons


def test_frames_without_atoms():
    rng = np.random.default_rng(4)
    frames = rng.normal(10.0, 1.0, size=(3, 64, 64))
    with pytest.raises(ReconstructionError, match="no bright sites stand out of the background"):
        estimate_psf(frames, _geometry(offset=(32.0, 32.0)))


def test_frames_of_different_sizes():
    with pytest.raises(FrameError, match="frames differ in size"):
        estimate_psf([np.zeros((8, 8)), np.zeros((9, 8))], _geometry())


def test_wrong_dimensions():
    with pytest.raises(FrameError, match=r"expected one \(H, W\) image or an \(N, H, W\) stack"):
        estimate_psf(np.zeros((2, 2, 8, 8)), _geometry())


def test_stack_needs_geometry():
    with pytest.raises(ReconstructionError, match="a stack of frames needs a LatticeGeometry"):
        estimate_psf(np.zeros((2, 8, 8)), None)


def test_bad_pair():
    with pytest.raises(FrameError, match="item 0 of the frame list is not an"):
        estimate_psf([(np.zeros((8, 8)), "not a geometry")])
