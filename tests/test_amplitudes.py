"""Site amplitudes (latticeread.core.amplitudes) against outside references and the forward model.

Outside references used here:
* scikit-image ``restoration.wiener`` and ``restoration.richardson_lucy`` (same input, same
  PSF) for the two deconvolution alternatives;
* EMCCD excess-noise factor: variance doubled at high gain (Robbins & Hadwen, IEEE Trans.
  Electron Devices 50, 1227 (2003)) for the scatter of isolated-atom amplitudes;
* ``PSFModel.stamps`` (the project's pixel integration of the Born & Wolf Airy pattern) for
  the fast stamp sampler.
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage import restoration

from latticeread.core import flags as F
from latticeread.core.amplitudes import (
    SiteBasis,
    _StampSampler,
    extract_amplitudes,
    richardson_lucy_deconvolve,
    wiener_deconvolve,
)
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf, gaussian_psf, render_sites
from latticeread.core.simulate import simulate_frames
from latticeread.errors import ReconstructionError

# invented demo setting: potassium-39 fluorescence at 767 nm, NA 0.75, 180 nm pixels (FWHM 2.92 px)
PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0)
SHAPE = (96, 96)
EMCCD = CameraModel(kind="emccd", em_gain=200.0, counts_per_electron=0.05, bias=100.0, read_noise=4.0,
                    quantum_efficiency=0.9)


def lattice(ratio, *, angle=0.2, offset=(48.3, 47.6)):
    s = ratio * PSF.fwhm
    return LatticeGeometry(a1=(s * np.cos(angle), s * np.sin(angle)), a2=(-s * np.sin(angle), s * np.cos(angle)),
                           offset=offset)


def site_index(basis_sites, truth_sites):
    lut = {(r, c): i for i, (r, c) in enumerate(zip(basis_sites.rows, basis_sites.cols))}
    return np.array([lut[(r, c)] for r, c in zip(truth_sites.rows, truth_sites.cols)])


@pytest.fixture(scope="module")
def basis10():
    """Sites of a central region: the pixels around it fix the background."""
    geo = lattice(1.0)
    from latticeread.core.geometry import lattice_sites

    sites = lattice_sites(geo, SHAPE, index_bounds=(-9, 9, -9, 9))
    return geo, SiteBasis(geo, frame_shape=SHAPE, psf=PSF, sites=sites)


def test_stamp_sampler_matches_psf_stamps():
    """Fast stamps agree with PSFModel.stamps (pixel-integrated Airy pattern, Born & Wolf)."""
    rng = np.random.default_rng(3)
    dx, dy = rng.uniform(-0.5, 0.5, 40), rng.uniform(-0.5, 0.5, 40)
    for psf in (PSF, gaussian_psf(fwhm=2.4)):
        fast = _StampSampler(psf)(dx, dy)
        ref = psf.stamps(dx, dy)
        assert np.abs(fast - ref).max() < 2e-5


def test_noiseless_frame_gives_the_rendered_photons(basis10):
    """Least squares on a noiseless frame drawn by the forward model returns its photons (to 1 %)."""
    geo, basis = basis10
    rng = np.random.default_rng(1)
    sites = basis.sites
    occ = rng.random(len(sites)) < 0.5
    shift = np.array([0.31, -0.27])
    image = render_sites(SHAPE, sites.x + shift[0], sites.y + shift[1], 1000.0 * occ, PSF) + 3.0
    res = basis.linear(image, offset=np.add(geo.offset, shift))
    inner = res.flags == 0
    assert np.abs(res.amplitudes[inner] - 1000.0 * occ[inner]).max() < 10.0
    assert res.background == pytest.approx(3.0, abs=0.3)


def test_spline_projection_matches_the_explicit_basis(basis10):
    """The per-frame correlation + spline lookup equals B^T y of the explicit sparse basis."""
    geo, basis = basis10
    rng = np.random.default_rng(2)
    image = rng.poisson(20.0, SHAPE).astype(float)
    offset = (geo.offset[0] + 0.4, geo.offset[1] - 0.15)
    c, _ = basis.project(image, offset=offset)
    exact = basis.project_exact(image, offset=offset)
    assert np.abs(c - exact).max() < 5e-3 * np.abs(exact).max()


def test_isolated_atoms_give_their_photons_within_emccd_noise():
    """Isolated atoms: amplitude = simulated photons, scatter = Poisson x EMCCD excess noise.

    Check values: at high EM gain the variance of the detected signal is doubled (excess noise
    factor sqrt(2); Robbins & Hadwen 2003), i.e. var(amplitude) ~ 2 N / QE photons^2 plus the
    background and read noise under the PSF.
    """
    geo = lattice(3.0)
    frames, truth = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=PSF, camera=EMCCD,
                                    region=("disk", 6), filling=0.5, photons_per_atom=1500.0, background=1.0,
                                    n_shots=6, rng=11)
    basis = SiteBasis(geo, frame_shape=(128, 128), psf=PSF, sites=truth.sites)
    resid = []
    for frame, occ, photons in zip(frames, truth.initial_occupation, truth.photons):
        res = basis.linear(EMCCD.counts_to_photons(frame))
        on = occ == 1
        resid.append(res.amplitudes[on] - photons[on])
    resid = np.concatenate(resid)
    # predicted variance of a least-squares amplitude: sum_p s_p^2 V_p / (sum_p s_p^2)^2
    s = PSF.stamps([0.0], [0.0])[0]
    v = EMCCD.photon_variance(1500.0 * s + 1.0)
    predicted = np.sqrt(np.sum(s**2 * v) / np.sum(s**2) ** 2)
    assert resid.size > 150
    assert abs(resid.mean()) < 4 * predicted / np.sqrt(resid.size) + 5.0  # unbiased (5 photons model error)
    assert resid.std() == pytest.approx(predicted, rel=0.15)
    # without the excess noise the scatter would be 1/sqrt(2) smaller: the data tell them apart
    assert resid.std() > 1.2 * predicted / np.sqrt(2)


def test_wiener_agrees_with_scikit_image():
    """Own FFT Wiener-Hunt filter == skimage.restoration.wiener (Laplacian regulariser)."""
    rng = np.random.default_rng(4)
    image = rng.normal(5.0, 1.0, (64, 80))
    psf = PSF.image()
    ours = wiener_deconvolve(image, psf_image=psf, balance=0.05)
    ref = restoration.wiener(image, psf, balance=0.05, clip=False)
    assert np.allclose(ours, ref, atol=1e-9 * np.abs(ref).max())


def test_richardson_lucy_agrees_with_scikit_image():
    """Own Richardson-Lucy == skimage.restoration.richardson_lucy on the same input (no clipping)."""
    rng = np.random.default_rng(5)
    image = rng.poisson(30.0, (48, 56)).astype(float)
    psf = PSF.image()
    ours = richardson_lucy_deconvolve(image, psf_image=psf, n_iter=8)
    ref = restoration.richardson_lucy(image, psf, num_iter=8, clip=False)
    assert np.allclose(ours, ref, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("method", ["wiener", "richardson_lucy"])
def test_deconvolution_alternatives_separate_atoms(method):
    """Deconvolution + cell integration classifies a well-separated lattice without error."""
    geo = lattice(1.3)
    frames, truth = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, region=("disk", 8), filling=0.5,
                                    photons_per_atom=1500.0, background=1.0, rng=6)
    res = extract_amplitudes(frames[0].astype(float), geometry=geo, psf=PSF, sites=truth.sites, method=method)
    occ = truth.initial_occupation[0] == 1
    a = res.amplitudes
    assert a[occ].min() > a[~occ].max()
    assert np.median(a[occ]) == pytest.approx(1500.0, rel=0.25)


def test_binary_refinement_beats_linear_below_0p7_fwhm():
    """At spacing 0.65 FWHM the Airy cut-off hides some patterns; the binary fit recovers most."""
    geo = lattice(0.65)
    frames, truth = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=EMCCD, region=("disk", 9),
                                    filling=0.5, photons_per_atom=1000.0, background=1.0, rng=7)
    basis = SiteBasis(geo, frame_shape=SHAPE, psf=PSF)
    idx = site_index(basis.sites, truth.sites)
    image = EMCCD.counts_to_photons(frames[0])
    occ = truth.initial_occupation[0] == 1
    lin = basis.linear(image).amplitudes[idx]
    best_linear = min(np.mean((lin > t) != occ) for t in np.linspace(0, 1000, 101))  # oracle threshold
    nl = basis.nonlinear(image, atom_photons=1000.0).amplitudes[idx]
    err = np.mean((nl > 500.0) != occ)
    assert best_linear > 0.15
    assert err < 0.08
    assert err < best_linear / 3


@pytest.mark.parametrize("ratio", [0.8, 1.0])
def test_model_phase_fit_finds_the_offset(ratio):
    """The image-model phase fit recovers a displaced lattice, also below 1 FWHM spacing."""
    geo = lattice(ratio)
    frames, truth = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=EMCCD, region=("disk", 10),
                                    filling=0.4, photons_per_atom=1000.0, background=1.0, n_shots=2,
                                    phase_jitter=0.6, rng=8)
    basis = SiteBasis(geo, frame_shape=SHAPE, psf=PSF)
    for frame, g in zip(frames, truth.geometries):
        offset, _ = basis.fit_offset(EMCCD.counts_to_photons(frame), search=True)
        assert np.hypot(offset[0] - g.offset[0], offset[1] - g.offset[1]) < 0.06


def test_amplitudes_scale_with_the_image(basis10):
    """Linearity: doubling the background-free image doubles every amplitude."""
    _, basis = basis10
    rng = np.random.default_rng(9)
    image = render_sites(SHAPE, basis.sites.x, basis.sites.y, rng.uniform(0, 800, len(basis.sites)), PSF)
    a1 = basis.linear(image).amplitudes
    a2 = basis.linear(2.0 * image).amplitudes
    assert np.allclose(a2, 2.0 * a1, atol=1e-6 * np.abs(a1).max())


def test_bad_pixels_are_left_out_and_flagged(basis10):
    """NaN and saturated pixels: the fit ignores them, the sites over them are flagged."""
    geo, basis = basis10
    sites = basis.sites
    occ = np.zeros(len(sites))
    k = int(np.argmin(np.hypot(sites.x - 48, sites.y - 48)))
    occ[k] = 1200.0
    clean = render_sites(SHAPE, sites.x, sites.y, occ, PSF) + 2.0
    iy, ix = int(round(sites.y[k])), int(round(sites.x[k]))
    image = clean.copy()
    image[iy, ix + 1] = np.nan
    saturated = np.zeros(SHAPE, bool)
    saturated[iy, ix] = True
    image[iy, ix] = 50.0  # clipped value
    res = basis.linear(image, saturated=saturated)
    assert np.all(np.isfinite(res.amplitudes))
    assert res.flags[k] & F.NONFINITE and res.flags[k] & F.SATURATED
    assert res.amplitudes[k] == pytest.approx(1200.0, rel=0.02)  # recovered from the other pixels
    far = np.hypot(sites.x - ix, sites.y - iy) > 3 * PSF.fwhm
    assert not np.any(res.flags[far] & (F.NONFINITE | F.SATURATED))
    assert any("non-finite" in w for w in res.warnings)


def test_edge_and_mask_flags(basis10):
    geo, _ = basis10
    mask = np.ones(SHAPE, bool)
    mask[:, :30] = False
    basis = SiteBasis(geo, frame_shape=SHAPE, psf=PSF, mask=mask)
    fl = basis.flags()
    x, y = basis.sites.x, basis.sites.y
    near_border = (np.minimum(np.minimum(x, SHAPE[1] - 1 - x), np.minimum(y, SHAPE[0] - 1 - y)) < 1.0)
    assert np.all(fl[near_border] & F.EDGE)
    assert np.all(fl[(x < 25) & ~near_border] & F.MASKED)
    centre = (np.abs(x - 60) < 10) & (np.abs(y - 48) < 10)
    assert np.all(fl[centre] == 0)


# --- one test per error message ---------------------------------------------------------------

def test_error_stack_instead_of_frame(basis10):
    with pytest.raises(ReconstructionError, match="expected one 2-D frame"):
        basis10[1].linear(np.zeros((2, *SHAPE)))


def test_error_frame_size(basis10):
    with pytest.raises(ReconstructionError, match="site basis was built for 96x96"):
        basis10[1].linear(np.zeros((95, 96)))


def test_error_all_pixels_bad(basis10):
    with pytest.raises(ReconstructionError, match="every pixel of the frame is NaN"):
        basis10[1].linear(np.full(SHAPE, np.nan))


def test_error_unknown_method():
    with pytest.raises(ReconstructionError, match="unknown amplitude method 'magic'"):
        extract_amplitudes(np.zeros(SHAPE), geometry=lattice(1.0), psf=PSF, method="magic")


def test_error_nonlinear_without_atom_photons():
    with pytest.raises(ReconstructionError, match="needs the photons of one atom"):
        extract_amplitudes(np.zeros(SHAPE), geometry=lattice(1.0), psf=PSF, method="nonlinear")


def test_error_nonpositive_atom_photons(basis10):
    with pytest.raises(ReconstructionError, match="positive number, got -5"):
        basis10[1].nonlinear(np.zeros(SHAPE), atom_photons=-5)


def test_error_unknown_background():
    with pytest.raises(ReconstructionError, match="unknown background model 'wavy'"):
        SiteBasis(lattice(1.0), frame_shape=SHAPE, psf=PSF, background="wavy")


def test_error_no_site_in_frame():
    geo = lattice(1.0, offset=(-500.0, -500.0))
    from latticeread.core.geometry import lattice_sites

    sites = lattice_sites(geo, SHAPE, index_bounds=(0, 0, 0, 0))
    with pytest.raises(ReconstructionError, match="no lattice site lies inside the frame"):
        SiteBasis(geo, frame_shape=SHAPE, psf=PSF, sites=sites)


def test_error_mask_shape():
    with pytest.raises(ReconstructionError, match="mask is 10x10 pixels but the frame is 96x96"):
        SiteBasis(lattice(1.0), frame_shape=SHAPE, psf=PSF, mask=np.ones((10, 10), bool))
