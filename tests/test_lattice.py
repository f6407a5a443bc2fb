"""Lattice geometry from frames: vectors, offset, drift, constraints and bad input.

Ground truth comes from the project's forward model (latticeread.core.simulate). Outside
sources named beside the checks:
- Reciprocal lattice, a_i . b_j = delta_ij, and the Fourier peaks of a periodic image at the
  reciprocal-lattice vectors: Ashcroft & Mermin, *Solid State Physics*, ch. 5 (quoted from
  memory); the peaks located independently with numpy.fft.
- Retro-reflected standing wave of wavelength lambda: lattice spacing lambda / 2; folded,
  interfering four-beam lattice: spacing lambda / sqrt(2), rotated 45 degrees to the beams
  (common practice, no source).
- Airy FWHM 0.514 lambda / NA (Born & Wolf, *Principles of Optics*), used to set the PSF width.
- Lagrange-Gauss reduction of a 2-D lattice basis (common practice, no source): the reduced
  basis does not depend on which basis of the lattice one starts from.
"""

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice import (
    PhaseDrift,
    canonical_basis,
    canonical_geometry,
    estimate_lattice,
    offset_error,
    phase_drift,
    refine_phase,
)
from latticeread.core.psf import airy_psf, gaussian_psf, render_sites
from latticeread.core.simulate import simulate_frames
from latticeread.errors import FrameError, LatticeNotFound, LatticeReadWarning


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------
def _rot(length, angle):
    return (length * np.cos(angle), length * np.sin(angle))


def _geometry(spacing=9.8, angle=0.3, between=np.pi / 2, length2=None, offset=(255.3, 255.7)):
    return LatticeGeometry(a1=_rot(spacing, angle), a2=_rot(length2 or spacing, angle + between), offset=offset)


def _simulate(geometry, *, shape=(512, 512), fwhm=None, ratio=1.2, photons=500.0, filling=0.3,
              background=2.0, seed=0, n_shots=1, psf=None, **kw):
    if psf is None:
        psf = gaussian_psf(fwhm=fwhm or min(geometry.spacings) / ratio)
    frames, truth = simulate_frames(geometry=geometry, frame_shape=shape, psf=psf, filling=filling,
                                    photons_per_atom=photons, background=background, rng=seed,
                                    n_shots=n_shots, margin=0, **kw)
    return frames.astype(float), truth


def _matched(estimate: LatticeGeometry, truth: LatticeGeometry) -> LatticeGeometry:
    """The estimate expressed in the truth's basis (the integer change of basis removed)."""
    m = np.rint(np.linalg.inv(truth.basis) @ estimate.basis)
    assert abs(abs(np.linalg.det(m)) - 1) < 1e-9, f"not the same lattice: basis change {m}"
    b = estimate.basis @ np.linalg.inv(m)
    return LatticeGeometry(a1=b[:, 0], a2=b[:, 1], offset=estimate.offset)


def _errors(estimate, truth):
    """(max relative spacing error, max angle error rad, offset error in spacings)."""
    est = _matched(estimate, truth)
    spacing = np.max(np.abs(np.array(est.spacings) / np.array(truth.spacings) - 1))
    dang = (np.array(est.angles) - np.array(truth.angles) + np.pi) % (2 * np.pi) - np.pi
    phase = offset_error(truth.with_offset(est.offset), truth) / np.mean(truth.spacings)
    return float(spacing), float(np.max(np.abs(dang))), float(phase)


def _quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LatticeReadWarning)
        return fn(*args, **kw)


# --------------------------------------------------------------------------------------
# outside checks
# --------------------------------------------------------------------------------------
def test_fourier_peaks_sit_at_analytic_reciprocal_vectors():
    """Ashcroft & Mermin ch. 5: an image periodic on the lattice has Fourier peaks at
    b_j with a_i . b_j = delta_ij. numpy.fft on a noise-free, fully filled oblique lattice
    locates them independently; the estimate must agree with the analytic b_j."""
    truth = _geometry(spacing=8.0, angle=0.21, between=np.radians(70), length2=10.0, offset=(127.4, 128.1))
    image, _ = _simulate(truth, shape=(256, 256), ratio=2.5, filling=1.0, background=0.0, photons=1e4)
    image = image[0]
    b = truth.reciprocal  # rows b1, b2, cycles per pixel
    np.testing.assert_allclose(truth.basis.T @ b.T, np.eye(2), atol=1e-12)
    # independent check with numpy.fft (whole-bin resolution, zero-padded 4x)
    pad = 1024
    spec = np.abs(np.fft.fft2(image - image.mean(), s=(pad, pad)))
    fy, fx = np.fft.fftfreq(pad), np.fft.fftfreq(pad)
    for bj in b:
        ix, iy = int(round(bj[0] * pad)) % pad, int(round(bj[1] * pad)) % pad
        window = spec[np.ix_((iy + np.arange(-3, 4)) % pad, (ix + np.arange(-3, 4)) % pad)]
        jy, jx = np.unravel_index(np.argmax(window), window.shape)
        found = np.array([fx[(ix + jx - 3) % pad], fy[(iy + jy - 3) % pad]])
        assert np.linalg.norm(found - bj) <= 1.5 / pad
    est = estimate_lattice(image)
    np.testing.assert_allclose(est.basis.T @ est.reciprocal.T, np.eye(2), atol=1e-12)
    err = _errors(est, truth)
    assert err[0] < 2e-4 and err[1] < 5e-4 and err[2] < 0.01


@pytest.mark.parametrize("kind", ["standing_wave", "folded_four_beam"])
def test_spacing_in_nanometres_for_two_lattice_geometries(kind):
    """Common practice, no source: retro-reflected 1064 nm beams along x and y give a square
    lattice of spacing 1064/2 = 532 nm aligned with the beams; the folded, interfering four-beam
    arrangement gives 1064/sqrt(2) = 752.3 nm, rotated 45 degrees to the beams. Simulated with
    the camera pixel at 55 nm in the atom plane (the magnification) and an Airy PSF of
    potassium-39 fluorescence at 767 nm through NA 0.9 (FWHM 0.514 lambda/NA, Born & Wolf)."""
    lam, pixel_nm = 1064.0, 55.0
    spacing_nm, angle = (lam / 2, 0.0) if kind == "standing_wave" else (lam / np.sqrt(2), np.pi / 4)
    # the beams along the camera axes, slightly rotated by the imaging optics (10 mrad)
    tilt = 0.010
    a = spacing_nm / pixel_nm
    truth = LatticeGeometry(a1=_rot(a, angle + tilt), a2=_rot(a, angle + tilt + np.pi / 2), offset=(200.2, 199.6))
    psf = airy_psf(wavelength_nm=767.0, numerical_aperture=0.9, pixel_size_nm=pixel_nm)
    image, _ = _simulate(truth, shape=(400, 400), psf=psf, photons=800.0, seed=3)
    est = estimate_lattice(image[0])
    got_nm = np.array(est.spacings) * pixel_nm
    np.testing.assert_allclose(got_nm, spacing_nm, rtol=3e-4)
    # lattice direction modulo 90 degrees (square lattice) relative to the beams
    rel = (np.array(est.angles) - tilt) % (np.pi / 2)
    expected = angle % (np.pi / 2)
    assert np.all(np.abs((rel - expected + np.pi / 4) % (np.pi / 2) - np.pi / 4) < 1e-3)


# --------------------------------------------------------------------------------------
# the accuracy numbers of the issue (forward model, 512^2, ~50x50 sites, filling 0.3)
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("ratio,seed", [(1.2, 11), (1.5, 12), (1.5, 13)])
def test_single_frame_accuracy(ratio, seed):
    """One 512x512 frame, ~52x52 sites, filling 0.3, 500 photons/atom, Gaussian PSF with
    spacing/FWHM = ratio: relative spacing error < 2e-4, angle error < 0.5 mrad, phase error
    < 0.01 spacing (numbers measured over more seeds in bench/bench_lattice.py)."""
    rng = np.random.default_rng(seed)
    truth = _geometry(angle=rng.uniform(0, np.pi), offset=tuple(rng.uniform(240, 270, 2)))
    image, _ = _simulate(truth, ratio=ratio, seed=seed)
    est = estimate_lattice(image[0])
    spacing, angle, phase = _errors(est, truth)
    assert spacing < 2e-4
    assert angle < 5e-4
    assert phase < 0.01
    assert est.quality.is_reliable and est.quality.n_sites_used > 500


def test_phase_with_known_vectors_is_within_a_hundredth_of_a_spacing():
    """refine_phase with the true vectors recovers a shifted lattice (offset error < 0.01
    spacing), at spacing = FWHM, the hardest end of the range where it still holds."""
    truth = _geometry(angle=0.7, offset=(250.37, 261.81))
    image, _ = _simulate(truth, ratio=1.0, seed=5)
    start = truth.with_offset((truth.offset[0] + 2.1, truth.offset[1] - 1.7))
    got = refine_phase(image[0], start, reference=truth.offset)
    assert offset_error(got, truth) / np.mean(truth.spacings) < 0.01
    # unwrapped to the translate nearest the reference: the same site is (0, 0)
    assert np.hypot(*np.subtract(got.offset, truth.offset)) < 0.1
    assert got.a1 == truth.a1 and got.a2 == truth.a2


# --------------------------------------------------------------------------------------
# lattice types and fillings (256^2 frames: quicker, looser bounds)
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("name,kw,sim", [
    ("triangular", dict(between=np.pi / 3, angle=1.1), {}),
    ("oblique, unequal", dict(between=np.radians(75), length2=12.5, angle=-0.4), {}),
    ("sparse 5%", dict(angle=2.0), dict(filling=0.05, ratio=1.5, shape=(512, 512))),
    ("dense 95%", dict(angle=0.5), dict(filling=0.95)),
])
def test_lattice_types_and_fillings(name, kw, sim):
    sim = {"ratio": 1.2, "shape": (256, 256), **sim}
    truth = _geometry(offset=(sim["shape"][1] / 2 + 0.3, sim["shape"][0] / 2 - 0.4), **kw)
    image, _ = _simulate(truth, seed=21, **sim)
    est = _quiet(estimate_lattice, image[0])
    spacing, angle, phase = _errors(est, truth)
    # ~200-600 bright sites only: about 3x the 512^2 errors (see bench/bench_lattice.py)
    assert spacing < 2e-3 and angle < 2e-3 and phase < 0.02, (name, spacing, angle, phase)


def test_stack_is_summed_where_one_sparse_frame_is_not_enough():
    """~34 atoms per 256^2 frame (filling 5%) are too few to show the lattice; the sum of
    twelve shots with the same lattice (~400 atoms) is enough."""
    truth = _geometry(offset=(128.3, 127.6), angle=0.9)
    frames, _ = _simulate(truth, shape=(256, 256), ratio=1.2, filling=0.05, seed=8, n_shots=12)
    with pytest.raises(LatticeNotFound, match="no periodic arrangement"):
        estimate_lattice(frames[0])
    stack = estimate_lattice(frames)
    assert stack.quality.peak_to_background > 8 and stack.quality.n_sites_used > 200
    assert _errors(stack, truth)[0] < 1e-3


def test_large_spacing_is_not_mistaken_for_a_harmonic():
    """Narrow PSF, 30-pixel spacing: harmonics are as strong as the fundamental; the finer
    reciprocal lattice (the true one) must win."""
    truth = _geometry(spacing=30.0, angle=0.98, offset=(255.0, 256.0))
    image, _ = _simulate(truth, ratio=3.0, seed=3, photons=1000.0)
    est = _quiet(estimate_lattice, image[0])
    assert _errors(est, truth)[0] < 1e-3


# --------------------------------------------------------------------------------------
# conventions
# --------------------------------------------------------------------------------------
def test_canonical_basis_square_lattice_looks_like_the_image():
    a1, a2 = canonical_basis((0.0, -7.0), (7.0, 7.0))  # a sheared basis of the square lattice
    np.testing.assert_allclose(a2, (7.0, 0.0), atol=1e-12)
    np.testing.assert_allclose(a1, (0.0, 7.0), atol=1e-12)


@settings(max_examples=25, deadline=None)
@given(angle=st.floats(-3.0, 3.0), between=st.floats(np.radians(60), np.radians(120)),
       ratio=st.floats(0.7, 1.4), m=st.sampled_from([(1, 0, 0, 1), (1, 1, 0, 1), (2, 1, 1, 1), (0, 1, -1, 0),
                                                     (1, -3, 0, 1), (-1, 0, 0, -1)]))
def test_canonical_basis_does_not_depend_on_the_starting_basis(angle, between, ratio, m):
    """Lagrange-Gauss reduction (common practice, no source): any unimodular change of basis
    gives the same canonical pair; a2 points within 45 degrees of +x and a1 follows it towards +y."""
    u = np.array(_rot(8.0, angle))
    v = np.array(_rot(8.0 * ratio, angle + between))
    t = np.array(m, float).reshape(2, 2)
    start = np.array([u, v]).T @ t
    got = np.array(canonical_basis(start[:, 0], start[:, 1]))
    ref = np.array(canonical_basis(u, v))
    # away from the documented tie at +-45 degrees the result is unique
    if abs(abs(np.arctan2(ref[1][1], ref[1][0])) - np.pi / 4) > 1e-6:
        np.testing.assert_allclose(got, ref, atol=1e-9)
    a1, a2 = ref
    assert abs(np.arctan2(a2[1], a2[0])) <= np.pi / 3 + 1e-9
    assert a2[0] * a1[1] - a2[1] * a1[0] > 0


def test_triangular_lattice_gets_the_acute_pair():
    a1, a2 = canonical_basis(_rot(5.0, 0.1 + np.pi / 3), _rot(5.0, 0.1 + 2 * np.pi / 3))
    assert np.degrees(LatticeGeometry(a1, a2).angle_between) == pytest.approx(60.0)
    assert np.arctan2(a2[1], a2[0]) == pytest.approx(0.1)


def test_offset_is_the_site_nearest_the_origin_point():
    truth = _geometry(offset=(128.3, 127.6), angle=0.4)
    image, _ = _simulate(truth, shape=(256, 256), ratio=1.5, seed=2)
    est = estimate_lattice(image[0])
    frac = est.fractional_indices(127.5, 127.5)
    assert np.all(np.abs(frac) <= 0.5 + 1e-9)
    corner = estimate_lattice(image[0], origin=(20.0, 30.0))
    assert np.all(np.abs(corner.fractional_indices(20.0, 30.0)) <= 0.5 + 1e-9)
    assert offset_error(corner, est) < 0.05


@settings(max_examples=4, deadline=None)
@given(shift=st.sampled_from([(1, 0), (0, 1), (-1, 0), (1, -1), (0, -2)]), angle=st.floats(0.0, 1.5))
def test_shifting_the_image_by_a_lattice_vector_shifts_the_indices(shift, angle):
    """Property: the same atoms moved by n1 a1 + n2 a2 are the same lattice; refine_phase with
    the old reference keeps the offset (indices of every atom shift by -(n1, n2)), with the
    shifted reference it returns the shifted offset."""
    truth = canonical_geometry(_geometry(spacing=7.0, angle=angle, offset=(96.2, 95.7)))
    rng = np.random.default_rng(4)
    rows, cols = np.meshgrid(np.arange(-11, 12), np.arange(-11, 12), indexing="ij")
    rows, cols = rows.ravel(), cols.ravel()
    x, y = truth.site_positions(rows, cols)
    inside = (x > 4) & (x < 187) & (y > 4) & (y < 187)
    amp = np.where(rng.random(rows.size) < 0.4, 600.0, 0.0) * inside
    psf = gaussian_psf(fwhm=5.0)
    move = shift[0] * np.array(truth.a1) + shift[1] * np.array(truth.a2)
    before = rng.poisson(render_sites((192, 192), x, y, amp, psf) + 1.0).astype(float)
    after = rng.poisson(render_sites((192, 192), x + move[0], y + move[1], amp, psf) + 1.0).astype(float)
    g0 = refine_phase(before, truth)
    g_same = refine_phase(after, truth, reference=g0.offset)
    g_moved = refine_phase(after, truth, reference=np.add(g0.offset, move))
    assert np.hypot(*np.subtract(g_same.offset, g0.offset)) < 0.1
    assert np.hypot(*(np.subtract(g_moved.offset, g0.offset) - move)) < 0.1
    # the brightest atom's indices in the two labellings differ by the shift
    k = int(np.argmax(amp))
    r0, c0 = g0.fractional_indices(x[k], y[k])
    r1, c1 = g_same.fractional_indices(x[k] + move[0], y[k] + move[1])
    assert (round(float(r1 - r0)), round(float(c1 - c0))) == shift


# --------------------------------------------------------------------------------------
# drift and constraints
# --------------------------------------------------------------------------------------
def test_phase_drift_follows_a_linear_drift_over_many_frames():
    truth = _geometry(spacing=8.0, angle=0.2, offset=(96.3, 95.8))
    drift = (0.9, -0.55)  # pixels per frame: several spacings over the stack
    frames, sim = _simulate(truth, shape=(192, 192), ratio=1.5, seed=9, n_shots=12, phase_drift=drift)
    frames[5] = np.random.default_rng(1).poisson(2.0, frames[5].shape)  # a frame without atoms
    result = phase_drift(frames, truth)
    assert isinstance(result, PhaseDrift) and result.n_frames == 12
    np.testing.assert_allclose(result.trend, drift, atol=0.01)
    assert np.all(np.isnan(result.offsets[5]))
    assert any("frame(s): 5" in w for w in result.warnings)
    valid = np.delete(np.arange(12), 5)
    want = np.array([g.offset for g in sim.geometries])[valid]
    np.testing.assert_allclose(result.offsets[valid], want, atol=0.08)
    # lattice units: the displacement expressed along a1, a2
    np.testing.assert_allclose(truth.basis @ result.lattice_offsets[11], np.subtract(want[-1], truth.offset),
                               atol=0.08)
    assert result.to_dict()["trend_pixels_per_frame"] == pytest.approx(list(result.trend))


def test_fixed_spacing_and_angle_are_kept_exactly():
    truth = _geometry(angle=0.25, offset=(128.3, 127.6))
    image, _ = _simulate(truth, shape=(256, 256), ratio=1.5, seed=4)
    est = canonical_geometry(truth)
    got = estimate_lattice(image[0], fixed_spacing=9.8, fixed_angle=est.angles[1])
    assert got.spacings == pytest.approx((9.8, 9.8), abs=1e-12)
    assert got.angles[1] == pytest.approx(est.angles[1], abs=1e-12)
    assert offset_error(got, truth) < 0.05
    both = estimate_lattice(image[0], fixed_angle=est.angles)
    assert both.angles == pytest.approx(est.angles, abs=1e-12)


def test_spacing_hint_far_from_the_result_is_flagged():
    truth = _geometry(angle=0.25, offset=(128.3, 127.6))
    image, _ = _simulate(truth, shape=(256, 256), ratio=1.5, seed=4)
    got = estimate_lattice(image[0], spacing_hint=8.5)
    assert any("away from the hint" in w for w in got.quality.warnings)
    assert _errors(got, truth)[0] < 1e-3


def test_spacing_hint_picks_the_lattice_under_a_checkerboard():
    """A checkerboard of atoms is itself a lattice with a sqrt(2) larger cell (the documented
    limit); the hint restores the sites' own lattice."""
    truth = _geometry(angle=0.3, offset=(128.3, 127.6))
    image, _ = _simulate(truth, shape=(256, 256), ratio=1.5, filling=0.95, pattern="checkerboard", seed=3)
    plain = estimate_lattice(image[0])
    np.testing.assert_allclose(plain.spacings, 9.8 * np.sqrt(2), rtol=1e-3)
    hinted = estimate_lattice(image[0], spacing_hint=10.0)
    assert _errors(hinted, truth)[0] < 1e-3 and not hinted.quality.warnings


# --------------------------------------------------------------------------------------
# bad input: one test per message
# --------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def frame():
    truth = _geometry(spacing=6.0, angle=0.3, offset=(64.2, 63.7))
    image, _ = _simulate(truth, shape=(128, 128), ratio=1.5, seed=1)
    return image[0], truth


def test_error_not_2d():
    with pytest.raises(FrameError, match=r"expected a 2-D frame .* got an array of shape \(2, 3, 64, 64\)"):
        estimate_lattice(np.ones((2, 3, 64, 64)))


def test_error_stack_where_frame_expected(frame):
    image, truth = frame
    with pytest.raises(FrameError, match="got a 3-D stack"):
        refine_phase(np.stack([image, image]), truth)


def test_error_empty():
    with pytest.raises(FrameError, match="is empty"):
        estimate_lattice(np.zeros((0, 64)))


def test_error_all_nan():
    with pytest.raises(FrameError, match="every pixel of the frame is NaN"):
        estimate_lattice(np.full((64, 64), np.nan))


def test_error_constant():
    with pytest.raises(LatticeNotFound, match="constant"):
        estimate_lattice(np.zeros((64, 64), np.uint16))


def test_error_saturated(frame):
    image = np.minimum(frame[0], 1.0)
    with pytest.raises(FrameError, match="saturated"):
        estimate_lattice(image)


def test_error_tiny():
    with pytest.raises(FrameError, match="too small"):
        estimate_lattice(np.random.default_rng(0).random((12, 40)))


def test_error_too_few_sites_across():
    truth = _geometry(spacing=10.0, angle=0.0, offset=(31.5, 31.5))
    image, _ = _simulate(truth, shape=(64, 64), fwhm=4.0, filling=1.0, photons=5000.0, seed=2)
    with pytest.raises(LatticeNotFound, match="sites across"):
        estimate_lattice(image[0])


def test_error_pure_noise():
    with pytest.raises(LatticeNotFound, match="no atoms found"):
        estimate_lattice(np.random.default_rng(3).poisson(20.0, (128, 128)).astype(float))


def test_error_single_atom():
    image = render_sites((128, 128), [60.3], [70.8], [3000.0], gaussian_psf(fwhm=3.0)) + 2.0
    image = np.random.default_rng(4).poisson(image).astype(float)
    with pytest.raises(LatticeNotFound, match="only 1 isolated bright spot"):
        estimate_lattice(image)


def test_error_stripes_only():
    y = np.arange(128)[:, None] * np.ones((1, 128))
    image = np.random.default_rng(6).poisson(100 + 50 * np.cos(2 * np.pi * y / 7.0)).astype(float)
    with pytest.raises(LatticeNotFound, match="only one lattice direction"):
        estimate_lattice(image)


def test_error_complex_pixels():
    with pytest.raises(FrameError, match="real pixel values"):
        estimate_lattice(np.ones((64, 64), complex))


def test_error_mask_shape(frame):
    with pytest.raises(FrameError, match="the mask is 64x64 but the frame is 128x128"):
        estimate_lattice(frame[0], mask=np.ones((64, 64), bool))


def test_error_phase_of_a_frame_without_atoms(frame):
    noise = np.random.default_rng(5).poisson(2.0, (128, 128)).astype(float)
    with pytest.raises(LatticeNotFound, match="not visible in this frame"):
        refine_phase(noise, frame[1])


def test_error_bad_fixed_spacing(frame):
    with pytest.raises(ValueError, match="fixed_spacing must be one number or a pair"):
        estimate_lattice(frame[0], fixed_spacing=(1.0, 2.0, 3.0))


def test_nan_pixels_are_replaced_with_a_warning(frame):
    image, truth = frame
    image = image.copy()
    image[10:14, 20:30] = np.nan
    with pytest.warns(LatticeReadWarning, match="non-finite pixel"):
        est = estimate_lattice(image)
    assert any("non-finite" in w for w in est.quality.warnings)
    assert _errors(est, truth)[0] < 2e-3


def test_hot_pixels_do_not_hide_the_lattice():
    """Twenty cosmic-ray hits at full scale in a 256^2 frame (common camera defect)."""
    truth = _geometry(angle=0.6, offset=(128.3, 127.6))
    image, _ = _simulate(truth, shape=(256, 256), ratio=1.2, seed=6)
    image = image[0]
    rng = np.random.default_rng(2)
    image[rng.integers(0, 256, 20), rng.integers(0, 256, 20)] = 65535.0
    est = _quiet(estimate_lattice, image)
    assert _errors(est, truth)[0] < 2e-3
    assert offset_error(refine_phase(image, truth), truth) < 0.1


def test_mask_keeps_the_estimate(frame):
    image, truth = frame
    mask = np.zeros(image.shape, bool)
    mask[10:118, 5:120] = True
    est = estimate_lattice(image, mask=mask)
    assert _errors(est, truth)[0] < 2e-3
