"""Observables from occupation matrices, checked against outside references.

Sources named beside each check: binomial statistics and the chi-square test
(``scipy.stats.chi2``), the two-state Markov chain's correlation function (a textbook result,
e.g. J. R. Norris, *Markov Chains*, Cambridge 1997, ch. 1; written from memory),
``scipy.signal.correlate`` as the reference implementation of the pair sums, and a direct sum
over sites for the structure factor.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal, stats

from latticeread.core import observables as ob
from latticeread.errors import LatticeReadError


def _random_stack(n=300, shape=(16, 18), filling=0.35, seed=0):
    rng = np.random.default_rng(seed)
    return (rng.random((n, *shape)) < filling).astype(np.uint8)


def _markov_rows(n, rows, cols, *, p01, p11, rng):
    """Each row a stationary two-state Markov chain along the columns; rows independent."""
    rho = p01 / (1 - p11 + p01)
    out = np.empty((n, rows, cols), np.uint8)
    out[:, :, 0] = rng.random((n, rows)) < rho
    for j in range(1, cols):
        p = np.where(out[:, :, j - 1] == 1, p11, p01)
        out[:, :, j] = rng.random((n, rows)) < p
    return out, rho, p11 - p01


def _checkerboard(n=4, shape=(10, 12), flip_every_other=True):
    ii, jj = np.indices(shape)
    cb = ((ii + jj) % 2 == 0).astype(np.uint8)
    stack = np.stack([cb if (k % 2 == 0 or not flip_every_other) else 1 - cb for k in range(n)])
    return stack


# --- density and counting ------------------------------------------------------------------

def test_independent_filling_density_equals_filling():
    # Binomial statistics: the mean of Bernoulli(p) readings is p within its standard error.
    occ = _random_stack(filling=0.35, seed=1)
    d = ob.density_map(occ)
    assert abs(d.filling - 0.35) < 4 * d.filling_err
    # per-site standard error equals sqrt(p(1-p)/N) on average (binomial)
    assert np.nanmean(d.stderr) == pytest.approx(np.sqrt(0.35 * 0.65 / occ.shape[0]), rel=0.05)


def test_atom_number_mean_and_variance_are_binomial():
    # Binomial distribution: N_sites p and N_sites p (1 - p) for independent filling.
    occ = _random_stack(n=400, shape=(12, 12), filling=0.4, seed=2)
    a = ob.atom_number(occ)
    ns = 144
    assert abs(a.mean - ns * 0.4) < 4 * a.mean_err
    assert abs(a.variance - ns * 0.4 * 0.6) < 4 * a.variance_err
    assert a.histogram.sum() == 400
    assert np.all(np.diff(a.bin_edges) >= 1)
    np.testing.assert_array_equal(a.per_shot, occ.reshape(400, -1).sum(axis=1))


def test_outside_sites_are_left_out_and_counted():
    occ = _random_stack(n=20, shape=(8, 8), seed=3)
    occ[:, 0, :] = 255
    occ[5, 1, 1] = 255                        # outside in one shot only
    o = ob.compute_observables(occ, n_bootstrap=20, rng=0)
    assert not o.density.region[0].any() and not o.density.region[1, 1]
    assert np.isnan(o.density.mean[1, 1])
    assert any("1 site(s) outside the region in some shots" in w for w in o.warnings)
    assert o.order.n_sites == 64 - 8 - 1


def test_select_and_group_shots():
    atoms = np.array([10, 20, 30, 40])
    hold = np.array([0.0, 5.0, 5.0, 10.0])
    np.testing.assert_array_equal(ob.select_shots(atoms, min_atoms=15, max_atoms=35), [False, True, True, False])
    np.testing.assert_array_equal(ob.select_shots(atoms, parameter=hold, low=5, high=5), [False, True, True, False])
    groups = ob.group_shots([5.0, 0.0, 5.0, float("nan"), 0.0])
    assert list(groups) == [0.0, 5.0]
    np.testing.assert_array_equal(groups[5.0], [0, 2])
    np.testing.assert_array_equal(groups[0.0], [1, 4])


# --- profiles ------------------------------------------------------------------------------

def test_radial_profile_equals_direct_binning():
    # Reference: plain numpy binning of each shot's sites by distance (common practice).
    occ = _random_stack(n=30, shape=(11, 13), seed=4)
    p = ob.radial_profile(occ, centre=(5.0, 6.0), bin_width=1.5)
    ii, jj = np.indices((11, 13))
    lab = np.floor(np.hypot(ii - 5, jj - 6) / 1.5).astype(int)
    per_shot = np.array([[s[lab == b].mean() for b in np.unique(lab)] for s in occ])
    np.testing.assert_allclose(p.mean, per_shot.mean(axis=0))
    np.testing.assert_allclose(p.stderr, per_shot.std(axis=0, ddof=1) / np.sqrt(30))
    np.testing.assert_allclose(p.coordinate, (np.unique(lab) + 0.5) * 1.5)


def test_radial_profile_of_a_flat_core_drops_at_the_edge():
    rng = np.random.default_rng(5)
    ii, jj = np.indices((21, 21))
    r = np.hypot(ii - 10, jj - 10)
    occ = (rng.random((40, 21, 21)) < np.where(r < 6, 0.95, 0.02)).astype(np.uint8)
    p = ob.radial_profile(occ)
    assert p.centre == pytest.approx((10, 10), abs=0.2)
    assert np.all(p.mean[:5] > 0.85) and np.all(p.mean[7:10] < 0.1)


def test_distances_use_the_lattice_vectors():
    # Triangular lattice (60 degrees): a1 - a2 has the length of a1 (elementary geometry).
    tri = ((10.0, 0.0), (5.0, 10.0 * np.sqrt(3) / 2))
    assert ob._lengths(1, -1, np.asarray(tri)) == pytest.approx(1.0)
    assert ob._lengths(1, 1, np.asarray(tri)) == pytest.approx(np.sqrt(3))
    occ = _random_stack(n=10, shape=(9, 9), seed=6)
    p = ob.radial_profile(occ, centre=(4, 4), vectors=tri, bin_width=0.5)
    # the six nearest neighbours at distance 1, the next six at sqrt(3); empty bins dropped
    np.testing.assert_array_equal(p.n_sites[:3], [1, 6, 6])
    np.testing.assert_allclose(p.coordinate[:3], [0.25, 1.25, 1.75])


def test_azimuthal_profile_sees_an_anisotropy():
    rng = np.random.default_rng(7)
    ii, jj = np.indices((15, 15))
    occ = (rng.random((60, 15, 15)) < np.where(jj > 7, 0.8, 0.2)).astype(np.uint8)   # right half dense
    p = ob.azimuthal_profile(occ, centre=(7, 7), n_bins=4, r_min=1)
    right = np.abs(p.coordinate) < np.pi / 2
    assert p.mean[right].min() > p.mean[~right].max()


def test_line_profile_moments_and_group_change():
    rng = np.random.default_rng(8)
    ii, jj = np.indices((9, 30))

    def cloud(x0, n):
        return (rng.random((n, 9, 30)) < 0.9 * np.exp(-0.5 * ((jj - x0) / 3.0) ** 2)).astype(np.uint8)

    occ = np.concatenate([cloud(10, 40), cloud(16, 40)])
    prof = ob.line_profile(occ[:40], axis="a2", centre=(4, 10), half_width=2)
    assert prof.band == (2, 6)
    assert abs(prof.centre_of_mass - 10) < 4 * prof.centre_of_mass_err + 0.05
    # Gaussian profile of sigma 3 sites: atom-weighted RMS width ~3 (slightly less: saturates at 0.9)
    assert 2.5 < prof.width < 3.3
    g = ob.moments_by_group(occ, {0.0: np.arange(40), 20.0: np.arange(40, 80)}, axis="a2", centre=(4, 13))
    assert g.labels == (0.0, 20.0)
    assert g.delta_com[0] == 0 and abs(g.delta_com[1] - 6) < 4 * g.delta_com_err[1] + 0.05


# --- correlations --------------------------------------------------------------------------

def _reference_correlator(occ, region, k):
    """C(d) from scipy.signal.correlate pair sums (the reference implementation)."""
    n = occ.shape[0]
    x = np.where(region, occ, 0).astype(float)
    m = region.astype(float)
    R, C = region.shape
    sl = (slice(R - 1 - k, R + k), slice(C - 1 - k, C + k))
    g = sum(signal.correlate(s, s, mode="full") for s in x)[sl] / n
    nbar = x.mean(axis=0)
    p = signal.correlate(nbar, nbar, mode="full")[sl]
    pairs = signal.correlate(m, m, mode="full")[sl]
    with np.errstate(invalid="ignore", divide="ignore"):
        return n / (n - 1) * (g - p) / pairs, np.rint(pairs)


def test_correlator_equals_scipy_signal_correlate():
    rng = np.random.default_rng(9)
    occ = (rng.random((25, 12, 14)) < 0.5).astype(np.uint8)
    ii, jj = np.indices((12, 14))
    mask = np.hypot(ii - 6, jj - 7) < 6.5                      # a disk region
    occ[:, ~mask] = 255
    c = ob.correlator(occ, max_distance=4, n_bootstrap=20, rng=0)
    ref, pairs = _reference_correlator(occ, mask, 4)
    np.testing.assert_array_equal(c.n_pairs, pairs)
    np.testing.assert_allclose(c.map, ref, rtol=1e-5, atol=1e-6)
    # scipy.signal.correlate(a, a) is symmetric: C(d) = C(-d)
    np.testing.assert_allclose(c.map, c.map[::-1, ::-1], atol=1e-6)


def test_independent_filling_correlator_consistent_with_zero():
    # chi-square of C(d != 0) against the bootstrap errors (scipy.stats.chi2 survival function).
    occ = _random_stack(n=300, shape=(16, 18), filling=0.35, seed=10)
    c = ob.correlator(occ, max_distance=3, n_bootstrap=200, rng=1)
    assert c.dof == (7 * 7 - 1) // 2
    assert c.p_value > 1e-3
    di, dj = np.meshgrid(c.displacement, c.displacement, indexing="ij")
    half = (di > 0) | ((di == 0) & (dj > 0))
    assert c.chi2 == pytest.approx(np.sum((c.map[half] / c.err[half]) ** 2), rel=1e-9)
    # C(0) is the binomial variance p(1-p)
    assert abs(c.map[3, 3] - 0.35 * 0.65) < 4 * c.err[3, 3]


def test_correlator_detects_a_correlation():
    # The same chi-square test must reject zero for a correlated state.
    rng = np.random.default_rng(11)
    occ, _, _ = _markov_rows(200, 10, 20, p01=0.2, p11=0.7, rng=rng)
    c = ob.correlator(occ, max_distance=3, n_bootstrap=100, rng=2)
    assert c.p_value < 1e-6


def test_markov_chain_correlations_recovered():
    # Two-state stationary Markov chain (Norris, Markov Chains, ch. 1; from memory):
    # density rho = p01 / (1 - p11 + p01), C(d) = rho (1 - rho) (p11 - p01)^|d| along the chain,
    # and 0 between independent rows.
    rng = np.random.default_rng(12)
    occ, rho, lam = _markov_rows(400, 12, 24, p01=0.2, p11=0.7, rng=rng)
    k = 4
    c = ob.correlator(occ, max_distance=k, n_bootstrap=200, rng=3)
    d = np.arange(-k, k + 1)
    truth = np.zeros((2 * k + 1, 2 * k + 1))
    truth[k, :] = rho * (1 - rho) * lam ** np.abs(d)
    along = c.map[k, k + 1:]
    z = (along - truth[k, k + 1:]) / c.err[k, k + 1:]
    assert np.all(np.abs(z) < 4), z
    chi2 = float(np.sum(z ** 2))
    assert stats.chi2.sf(chi2, z.size) > 1e-3
    across = c.map[k + 1:, :]
    assert np.all(np.abs(across / c.err[k + 1:, :]) < 4.5)
    # versus |d|: at distance 1 half the displacements are along the chain
    i1 = np.argmin(np.abs(c.distance - 1))
    assert abs(c.radial[i1] - truth[k, k + 1] / 2) < 4 * c.radial_err[i1]


@pytest.mark.parametrize("shape", [(5, 6), (4, 7)])
def test_structure_factor_equals_direct_sum(shape):
    # Direct sum over sites: S(q) = <|sum_j s_j exp(-i q.r_j)|^2> / N_s.
    rng = np.random.default_rng(13)
    occ = (rng.random((6, *shape)) < 0.4).astype(np.uint8)
    occ[:, 0, 0] = 255
    region = occ[0] != 255
    sf = ob.structure_factor(occ)
    ii, jj = np.nonzero(region)
    direct = np.zeros(shape)
    per_shot = np.zeros((6, *shape))
    for a, q1 in enumerate(sf.q1):
        for b, q2 in enumerate(sf.q2):
            phase = np.exp(-1j * (q1 * ii + q2 * jj))
            vals = [abs(np.sum((2.0 * s[ii, jj] - 1) * phase)) ** 2 for s in occ]
            direct[a, b] = np.mean(vals) / region.sum()
            per_shot[:, a, b] = np.asarray(vals) / region.sum()
    np.testing.assert_allclose(sf.s, direct, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(sf.err, per_shot.std(axis=0, ddof=1) / np.sqrt(6), rtol=1e-4, atol=1e-5)
    assert sf.n_sites == shape[0] * shape[1] - 1


# --- order ---------------------------------------------------------------------------------

def test_perfect_checkerboard_order_and_structure_factor():
    # Definition: a perfect checkerboard has |m| = 1 and S(pi, pi) = number of sites.
    occ = _checkerboard(n=4, shape=(10, 12))
    o = ob.staggered_order(occ)
    np.testing.assert_allclose(o.per_shot, [1, -1, 1, -1])
    assert o.mean_abs == pytest.approx(1.0)
    assert o.s_pi_pi == pytest.approx(120.0)
    assert o.s_pi_pi_err == pytest.approx(0.0)
    np.testing.assert_allclose(o.local, 1.0)
    sf = ob.structure_factor(occ)
    a, b = np.argmin(np.abs(sf.q1 + np.pi)), np.argmin(np.abs(sf.q2 + np.pi))   # -pi == pi on the FFT grid
    assert sf.s[a, b] == pytest.approx(120.0, rel=1e-6)
    assert o.histogram.sum() == 4 and o.histogram[0] == 2 and o.histogram[-1] == 2


def test_random_filling_has_no_staggered_order():
    occ = _random_stack(n=200, shape=(12, 12), filling=0.5, seed=14)
    o = ob.staggered_order(occ)
    # uncorrelated +-1 pseudo-spins: <m^2> = 1 / N_s, so S(pi, pi) = 1 (binomial statistics)
    assert abs(o.s_pi_pi - 1.0) < 4 * o.s_pi_pi_err
    assert o.mean_abs < 0.15


def test_local_order_marks_a_checkerboard_domain():
    rng = np.random.default_rng(15)
    occ = (rng.random((30, 12, 24)) < 0.5).astype(np.uint8)
    ii, jj = np.indices((12, 24))
    occ[:, :, 12:] = ((ii + jj) % 2 == 0)[:, 12:]
    o = ob.staggered_order(occ, window=3)
    assert np.all(o.local[1:-1, 14:-1] == pytest.approx(1.0))
    assert np.nanmean(o.local[1:-1, 1:10]) < 0.5


# --- misread correction --------------------------------------------------------------------

def _misread(occ, *, fp, fn, loss, rng):
    survive = occ.astype(bool) & (rng.random(occ.shape) >= loss)
    read_atom = survive & (rng.random(occ.shape) >= fn)
    read_empty = ~survive & (rng.random(occ.shape) < fp)
    return (read_atom | read_empty).astype(np.uint8)


def test_misread_correction_recovers_density_and_correlator():
    # Truth: the Markov chain's analytic density and C(d) (Norris, ch. 1, from memory); the
    # misread channel is applied independently per site with known rates.
    rng = np.random.default_rng(16)
    truth_occ, rho, lam = _markov_rows(800, 12, 24, p01=0.2, p11=0.7, rng=rng)
    read = _misread(truth_occ, fp=0.04, fn=0.06, loss=0.03, rng=rng)
    rates = ob.MisreadRates(0.04, 0.06, 0.03, false_positive_err=0.002, false_negative_err=0.003, loss_err=0.003)
    dens = ob.density_map(read)
    corr = ob.correlator(read, max_distance=3, n_bootstrap=100, rng=4)
    fixed = ob.correct_misreads(dens, corr, rates=rates)
    k = 3
    # the read values are biased beyond their errors ...
    c1_true = rho * (1 - rho) * lam
    assert abs(dens.filling - rho) > 4 * dens.filling_err
    assert abs(corr.map[k, k + 1] - c1_true) > 4 * corr.err[k, k + 1]
    # ... the corrected ones agree with the truth within their total errors
    tot_f = np.hypot(fixed.filling_stat_err, fixed.filling_rate_err)
    assert abs(fixed.filling - rho) < 4 * tot_f
    for dj in (1, 2):
        assert abs(fixed.correlator[k, k + dj] - rho * (1 - rho) * lam ** dj) < 4 * fixed.correlator_err[k, k + dj]
    assert abs(fixed.correlator[k, k] - rho * (1 - rho)) < 4 * fixed.correlator_err[k, k]
    assert fixed.correlator_flag[k, k + 1]
    # per site the correction (~0.005) stays below the statistical error of 800 shots (~0.017)
    assert not fixed.density_flag.any()
    assert any("changes the mean density" in w for w in fixed.warnings)
    assert np.all(fixed.density_rate_err[dens.region] > 0)


def test_zero_rates_change_nothing():
    occ = _random_stack(n=50, shape=(8, 8), seed=17)
    dens = ob.density_map(occ)
    corr = ob.correlator(occ, max_distance=2, n_bootstrap=20, rng=0)
    fixed = ob.correct_misreads(dens, corr, rates=ob.MisreadRates(0.0, 0.0, 0.0))
    np.testing.assert_allclose(fixed.density, dens.mean)
    off = np.ones(corr.map.shape, bool)
    off[2, 2] = False
    np.testing.assert_allclose(fixed.correlator[off], corr.map[off])
    assert not fixed.density_flag.any()
    assert fixed.warnings == ("the misread rates were given without uncertainties: the corrected errors hold the "
                              "statistical part only",)


def test_compute_observables_runs_everything():
    occ = _random_stack(n=30, shape=(10, 10), seed=18)
    post = np.where(occ == 1, 0.97, 0.3)
    o = ob.compute_observables(occ, p_occupied=post, n_bootstrap=20, rng=0,
                               rates=ob.MisreadRates(0.01, 0.02, 0.01))
    assert o.corrected is not None and o.posterior_density.shape == (10, 10)
    assert any("posterior between 0.05 and 0.95" in w for w in o.warnings)
    assert o.settings["n_shots"] == 30 and o.structure.s.shape == (10, 10)
    few = ob.compute_observables(occ[:5], n_bootstrap=20, rng=0)
    assert any("only 5 shots" in w for w in few.warnings)


def test_bootstrap_is_reproducible_with_a_seed():
    occ = _random_stack(n=40, shape=(8, 8), seed=19)
    a = ob.correlator(occ, max_distance=2, n_bootstrap=30, rng=5)
    b = ob.correlator(occ, max_distance=2, n_bootstrap=30, rng=5)
    np.testing.assert_array_equal(a.err, b.err)


# --- error messages ------------------------------------------------------------------------

OK = _random_stack(n=5, shape=(6, 6), seed=20)


@pytest.mark.parametrize("call, match", [
    (lambda: ob.density_map(OK[0]), r"stack of matrices .* got 2-D .*occupation\[None\]"),
    (lambda: ob.density_map(np.zeros((0, 3, 3), np.uint8)), "occupation stack is empty"),
    (lambda: ob.density_map(OK * 3), "only 0 \\(empty\\), 1 \\(occupied\\) and 255"),
    (lambda: ob.density_map(OK * 1.5), "probabilities must lie between 0 and 1"),
    (lambda: ob.density_map(np.full((3, 4, 4), 255, np.uint8)), "no site is inside the region"),
    (lambda: ob.density_map(OK, mask=np.ones((5, 5), bool)), r"mask has shape \(5, 5\)"),
    (lambda: ob.density_map(OK[:1]), "needs at least 2 shots"),
    (lambda: ob.correlator(OK, max_distance=0), "max_distance must be between 1 and 5"),
    (lambda: ob.correlator(OK, n_bootstrap=3), "at least 10 bootstrap replicates"),
    (lambda: ob.radial_profile(OK, bin_width=0), "bin width must be positive"),
    (lambda: ob.radial_profile(OK, vectors=((1, 0), (2, 0))), "parallel"),
    (lambda: ob.radial_profile(OK, vectors=(1, 2, 3)), "two \\(x, y\\) pairs"),
    (lambda: ob.radial_profile(OK, centre=(1,)), "centre must be a \\(row, col\\) pair"),
    (lambda: ob.azimuthal_profile(OK, n_bins=0), "angular bins must be at least 1"),
    (lambda: ob.line_profile(OK, axis="x"), "axis must be 'a1' or 'a2'"),
    (lambda: ob.line_profile(OK, half_width=-1), "half-width must be 0 or more"),
    (lambda: ob.line_profile(OK, centre=(2, 40)), "band around site 40.0 lies outside"),
    (lambda: ob.moments_by_group(OK, {}), "no groups of shots"),
    (lambda: ob.moments_by_group(OK, {1: [0]}), "group 1 holds 1 shot"),
    (lambda: ob.staggered_order(OK, window=2), "odd number of sites"),
    (lambda: ob.select_shots(np.ones((2, 2))), "1-D array"),
    (lambda: ob.select_shots(np.ones(3), min_atoms=5, max_atoms=1), "min_atoms \\(5\\) is larger"),
    (lambda: ob.select_shots(np.ones(3), low=1), "without the per-shot parameter"),
    (lambda: ob.select_shots(np.ones(3), parameter=np.ones(2), low=1), "has 2 values but there are 3 shots"),
    (lambda: ob.group_shots([]), "no per-shot parameter values"),
    (lambda: ob.MisreadRates(1.2, 0.0), "false-positive rate must be a probability"),
    (lambda: ob.MisreadRates(0.0, 0.0, loss_err=-1), "uncertainty of the loss rate"),
    (lambda: ob.MisreadRates(0.5, 0.5), "too little information to correct"),
    (lambda: ob.correct_misreads(ob.density_map(OK), rates=(0.1, 0.1)), "rates must be a MisreadRates"),
    (lambda: ob.compute_observables(OK, p_occupied=np.ones((5, 6, 5))), "posteriors have shape"),
    (lambda: ob.compute_observables(OK, p_occupied=np.full(OK.shape, np.nan)), "posteriors are missing"),
])
def test_error_messages(call, match):
    with pytest.raises(ob.ObservablesError, match=match) as info:
        call()
    assert isinstance(info.value, LatticeReadError) and info.value.exit_code == 3
