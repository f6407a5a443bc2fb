"""The forward model, checked against published optics and camera facts.

Sources named beside each check:
- Airy pattern FWHM 0.514 lambda/NA and first zero 0.61 lambda/NA: Born & Wolf,
  *Principles of Optics* (section 8.5.2); the first zero also from scipy.special.jn_zeros.
- EMCCD excess noise factor sqrt(2) at high gain: Robbins & Hadwen, IEEE Trans. Electron
  Devices 50, 1227 (2003).
- Reciprocal lattice a_i . b_j = delta_ij: Ashcroft & Mermin, *Solid State Physics*, ch. 5;
  peak positions found with numpy.fft.
"""

import numpy as np
import pytest
import tifffile
from scipy import optimize, special

from latticeread.cli import main
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf, gaussian_psf, render_sites
from latticeread.core.simulate import apply_camera, demo_scenario, make_region, simulate_frames

WAVELENGTH_NM, NA, PIXEL_NM = 767.0, 0.65, 110.0  # an arbitrary test optics setting


@pytest.fixture(scope="module")
def airy():
    return airy_psf(wavelength_nm=WAVELENGTH_NM, numerical_aperture=NA, pixel_size_nm=PIXEL_NM)


def _profile_along_x(psf, supersample=41):
    """Radial profile read off a finely supersampled kernel image (not the analytic formula)."""
    img = psf.image(supersample=supersample)
    centre = img.shape[0] // 2
    row = img[centre, centre:]
    radii = np.arange(row.size) / supersample
    return radii, row


def test_airy_fwhm_matches_born_and_wolf(airy):
    # Born & Wolf, Principles of Optics: FWHM = 0.514 lambda / NA
    radii, row = _profile_along_x(airy)
    half = row[0] / 2
    k = np.flatnonzero(row < half)[0]
    r_half = np.interp(half, [row[k], row[k - 1]], [radii[k], radii[k - 1]])
    fwhm_in_lambda_over_na = 2 * r_half * PIXEL_NM * NA / WAVELENGTH_NM
    assert fwhm_in_lambda_over_na == pytest.approx(0.514, rel=0.01)
    assert airy.fwhm * PIXEL_NM * NA / WAVELENGTH_NM == pytest.approx(0.514, rel=0.01)


def test_airy_first_zero_matches_born_and_wolf(airy):
    # Born & Wolf: first dark ring at 0.61 lambda / NA; scipy.special.jn_zeros(1, 1) / (2 pi) = 0.6098
    radii, row = _profile_along_x(airy)
    first_min = np.flatnonzero((row[1:-1] < row[:-2]) & (row[1:-1] <= row[2:]))[0] + 1
    # refine the zero of the analytic density near the sampled minimum
    r0 = optimize.minimize_scalar(lambda r: airy.radial_profile([r])[0],
                                  bounds=(radii[first_min - 1], radii[first_min + 1]), method="bounded").x
    zero_in_lambda_over_na = r0 * PIXEL_NM * NA / WAVELENGTH_NM
    assert zero_in_lambda_over_na == pytest.approx(0.61, rel=0.01)
    assert zero_in_lambda_over_na == pytest.approx(special.jn_zeros(1, 1)[0] / (2 * np.pi), rel=1e-3)


def test_pixel_integrated_psf_sums_to_one(airy):
    rng = np.random.default_rng(5)
    stamps = airy.stamps(rng.uniform(-0.5, 0.5, 7), rng.uniform(-0.5, 0.5, 7))
    np.testing.assert_allclose(stamps.sum(axis=(1, 2)), 1.0, rtol=1e-12)
    # and it is pixel-integrated, not point-sampled: a narrow Gaussian's central pixel holds
    # erf(0.5/(sqrt 2 sigma))^2 of the flux (exact pixel integral)
    g = gaussian_psf(fwhm=1.0, radius=4, supersample=25)
    sigma = g.params["sigma"]
    expected = special.erf(0.5 / (np.sqrt(2) * sigma)) ** 2
    assert g.stamps([0.0], [0.0])[0][4, 4] == pytest.approx(expected, rel=2e-3)


def test_rendered_spot_centroid_is_at_the_requested_subpixel_position():
    psf = gaussian_psf(fwhm=2.5)
    img = render_sites((41, 41), [20.3], [19.65], [1000.0], psf)
    yy, xx = np.mgrid[0:41, 0:41]
    assert img.sum() == pytest.approx(1000.0)
    assert (img * xx).sum() / img.sum() == pytest.approx(20.3, abs=1e-3)
    assert (img * yy).sum() / img.sum() == pytest.approx(19.65, abs=1e-3)


def test_mean_frame_signal_is_photons_times_gain_plus_background_and_bias():
    camera = CameraModel(kind="emccd", em_gain=200.0, counts_per_electron=0.05, bias=150.0, read_noise=4.0,
                         quantum_efficiency=0.85, clock_induced_charge=0.0)
    geometry = LatticeGeometry((4.0, 0.5), (-0.5, 4.0), (64.2, 63.7))
    frames, truth = simulate_frames(geometry=geometry, frame_shape=(128, 128), camera=camera,
                                    photons_per_atom=600.0, background=0.3, filling=0.4, n_shots=4, rng=11)
    expected = truth.photons.sum(axis=1) * camera.counts_per_photon / (128 * 128) \
        + 0.3 * camera.counts_per_photon + camera.bias
    measured = frames.reshape(4, -1).mean(axis=1)
    # statistical error of a frame mean: sqrt(F^2 * electrons) * gain * cpe / npix, F^2 = 2
    sigma = np.sqrt(2 * (truth.photons.sum(axis=1) + 0.3 * 128 * 128) * 0.85) * 200 * 0.05 / (128 * 128)
    assert np.all(np.abs(measured - expected) < 5 * sigma + 0.5)  # + rounding of counts


def test_emccd_variance_shows_excess_noise_factor_sqrt2():
    # Robbins & Hadwen 2003: at high gain the output variance is F^2 = 2 times the Poisson value
    camera = CameraModel(kind="emccd", em_gain=300.0, counts_per_electron=0.1, bias=500.0, read_noise=0.0,
                         quantum_efficiency=1.0)
    photons = np.full((400, 400), 20.0)
    frame = apply_camera(photons, camera, rng=3).astype(float)
    electrons = (frame - camera.bias) / (camera.em_gain * camera.counts_per_electron)
    excess = electrons.var() / electrons.mean()
    assert excess == pytest.approx(2.0, rel=0.03)
    assert camera.excess_noise_factor_squared == pytest.approx(2.0, rel=0.01)


def test_scmos_variance_is_poisson_plus_read_noise():
    camera = CameraModel(kind="scmos", counts_per_electron=1.0, bias=100.0, read_noise=2.0, quantum_efficiency=1.0)
    frame = apply_camera(np.full((400, 400), 30.0), camera, rng=4).astype(float)
    assert frame.mean() == pytest.approx(130.0, abs=0.1)
    assert frame.var() == pytest.approx(30.0 + 4.0 + 1 / 12, rel=0.03)  # + rounding variance


def test_fft_peaks_sit_at_reciprocal_lattice_vectors():
    # Ashcroft & Mermin ch. 5: b_i with a_i . b_j = delta_ij; numpy.fft puts a plane wave of
    # wave vector b (cycles/pixel) at frequency index b * N.
    n = 256
    geometry = LatticeGeometry((5.1, 1.3), (-0.9, 4.4), (128.0, 128.0))
    frames, truth = simulate_frames(geometry=geometry, frame_shape=(n, n), psf=gaussian_psf(fwhm=2.0),
                                    filling=1.0, photons_per_atom=1000.0, margin=0.0, rng=0)
    spectrum = np.abs(np.fft.fft2(frames[0].astype(float) - frames[0].mean()))
    spectrum[0, 0] = 0
    b = geometry.reciprocal  # rows are b1, b2 in cycles/pixel, (x, y) components
    for bx, by in b:
        kx, ky = int(np.rint(bx * n)) % n, int(np.rint(by * n)) % n
        window = np.roll(np.roll(spectrum, -ky + 2, axis=0), -kx + 2, axis=1)[:5, :5]
        iy, ix = np.unravel_index(np.argmax(window), window.shape)
        assert (iy, ix) == (2, 2), f"peak for b=({bx:.4f},{by:.4f}) not at the predicted frequency"
    np.testing.assert_allclose(geometry.basis.T @ geometry.reciprocal.T, np.eye(2), atol=1e-12)


def test_dynamics_conserve_atoms_and_record_events():
    geometry = LatticeGeometry((4.0, 0.0), (0.0, 4.0), (100.0, 100.0))
    frames, truth = simulate_frames(geometry=geometry, frame_shape=(200, 200), psf=gaussian_psf(fwhm=2.5),
                                    filling=0.5, n_shots=3, images_per_shot=3, loss_probability=0.05,
                                    hop_probability=0.05, rng=2)
    initial, final = truth.initial_occupation.astype(int), truth.final_occupation.astype(int)
    # each image starts from the previous image's end within a shot
    for shot in range(3):
        for image in range(1, 3):
            f = shot * 3 + image
            np.testing.assert_array_equal(initial[f], final[f - 1])
    lost = truth.lost.sum(axis=1)
    np.testing.assert_array_equal(final.sum(axis=1), initial.sum(axis=1) - lost)
    # hops go to nearest neighbours only
    src_frames, src = np.nonzero(truth.hop_target >= 0)
    dst = truth.hop_target[src_frames, src]
    dr = np.abs(truth.sites.rows[src] - truth.sites.rows[dst])
    dc = np.abs(truth.sites.cols[src] - truth.sites.cols[dst])
    assert np.all(dr + dc == 1)
    n_atoms = initial.sum()
    # pair-loss victims are residents of a site that a lost hopper moved onto
    victims = np.zeros_like(truth.lost)
    hopped_and_lost = truth.lost & (truth.hop_target >= 0)
    f_idx, s_idx = np.nonzero(hopped_and_lost)
    victims[f_idx, truth.hop_target[f_idx, s_idx]] = True
    single_losses = (truth.lost & (truth.hop_target < 0) & ~victims).sum()
    assert victims.sum() <= hopped_and_lost.sum()  # two hoppers can meet on one site
    assert single_losses / n_atoms == pytest.approx(0.05, abs=0.015)
    assert (truth.hop_target >= 0).sum() / n_atoms == pytest.approx(0.05, abs=0.015)


def test_regions_and_patterns():
    kw = demo_scenario("square", frame_shape=(128, 128))
    geometry, psf = kw["geometry"], kw["psf"]
    rect = make_region(geometry, (128, 128), region=("rectangle", 10, 12), psf=psf)
    assert len(rect) == 120 and rect.matrix_shape == (10, 12)
    mask = np.zeros((5, 5), bool)
    mask[2, :] = True
    line = make_region(geometry, (128, 128), region=mask, psf=psf)
    assert len(line) == 5 and line.n_rows == 1
    _, truth = simulate_frames(geometry=geometry, psf=psf, frame_shape=(128, 128), region=("rectangle", 10, 10),
                               pattern="checkerboard", filling=1.0, rng=0)
    occ = truth.occupation_matrices()[0]
    assert occ.shape == (10, 10) and occ.sum() == 50
    assert np.all(occ[::2, ::2] == occ[0, 0])
    given = np.eye(10, dtype=np.uint8)
    _, truth = simulate_frames(geometry=geometry, psf=psf, frame_shape=(128, 128), region=("rectangle", 10, 10),
                               occupation=given, rng=0)
    np.testing.assert_array_equal(truth.occupation_matrices()[0], given)


@pytest.mark.parametrize("bad, match", [
    (dict(loss_probability=1.5), "loss_probability"),
    (dict(loss_probability=0.6, hop_probability=0.6), "must not exceed 1"),
    (dict(filling=2.0), "filling"),
    (dict(pattern="stripes"), "unknown occupation pattern"),
    (dict(frame_shape=(4, 4)), "too small"),
    (dict(region=("hexagon", 3)), "unknown region"),
])
def test_simulation_rejects_bad_settings(bad, match):
    geometry = LatticeGeometry((4.0, 0.0), (0.0, 4.0), (32.0, 32.0))
    kw = dict(geometry=geometry, frame_shape=(64, 64), psf=gaussian_psf(fwhm=2.0))
    kw.update(bad)
    with pytest.raises(ValueError, match=match):
        simulate_frames(**kw)


def test_simulate_command_writes_tiff_and_truth_that_tifffile_reads(tmp_path, capsys):
    out = tmp_path / "demo.tif"
    assert main(["simulate", str(out), "--shots", "2", "--images-per-shot", "2", "--size", "96", "96",
                 "--seed", "7"]) == 0
    frames = tifffile.imread(out)
    assert frames.shape == (4, 96, 96) and frames.dtype == np.uint16
    from latticeread.io.truth_file import read_truth

    truth = read_truth(out.with_suffix(".truth.h5"))
    assert truth["initial_occupation"].shape[0] == 4
    assert truth["info"]["settings"]["seed"] == 7
    # same seed, same frames
    out2 = tmp_path / "again.tif"
    main(["simulate", str(out2), "--shots", "2", "--images-per-shot", "2", "--size", "96", "96", "--seed", "7"])
    np.testing.assert_array_equal(tifffile.imread(out2), frames)


def test_simulate_command_rejects_wrong_extension(tmp_path, capsys):
    assert main(["simulate", str(tmp_path / "x.png")]) == 2
    assert "must end in one of: .tif" in capsys.readouterr().err


def test_simulate_command_writes_every_imperfection_and_its_truth(tmp_path):
    """The command line's options reach the forward model and the truth file keeps what was drawn."""
    from latticeread.cli import main
    from latticeread.io.truth_file import read_truth

    out = tmp_path / "real.tif"
    assert main(["simulate", str(out), "--size", "96", "96", "--shots", "2", "--images-per-shot", "1",
                 "--hot-pixels", "3", "--cosmic-rays", "2", "--illumination-waist", "60", "--stray-light", "2",
                 "--distortion=-1e-6", "--drift", "0.2", "0.1", "--jitter", "0", "--seed", "3"]) == 0
    truth = read_truth(out.with_suffix(".truth.h5"))
    assert truth["artefacts"]["hot_pixel_index"].size == 3
    assert truth["site_xy_frames"].shape[0] == 2 and truth["background_maps"].shape == (2, 96, 96)
    assert truth["site_illumination"].min() < 0.9  # atoms away from the beam centre are dimmer
    shift = truth["site_xy_frames"][1] - truth["site_xy_frames"][0]
    assert np.allclose(np.median(shift, axis=0), [0.2, 0.1], atol=0.05)
