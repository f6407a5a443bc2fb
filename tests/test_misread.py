"""Misread rates of a set of frames (latticeread.core.misread): one computation for every front end.

Outside checks used here:
* The truth of the project's forward model (latticeread.core.simulate.simulate_frames): which
  sites really held an atom, so the false positives of a reconstruction can be counted.
* scipy.stats.binomtest(...).proportion_ci: the 95 % interval of the true false-positive
  count, which the reported rate must fall in.
* EMCCD multiplied noise has a heavier right tail than a normal distribution (Robbins &
  Hadwen, IEEE Trans. Electron Devices 50, 1227 (2003)), which is why skewed peaks are the
  EMCCD default.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from latticeread.core.camera import CameraModel
from latticeread.core.misread import misread_rates, peak_shape_for
from latticeread.errors import FidelityError


def test_peak_shape_follows_the_camera():
    assert peak_shape_for(CameraModel(kind="emccd")) == "skewed"
    assert peak_shape_for(CameraModel(kind="scmos")) == "normal"
    assert peak_shape_for(None) == "normal"


def _two_peaks(rng, n=4000):
    occupied = rng.random(n) < 0.3
    return np.where(occupied, rng.normal(100, 15, n), rng.normal(0, 10, n))


def test_rates_are_read_at_each_frames_threshold_and_weighted_by_sites():
    rng = np.random.default_rng(1)
    frames = [_two_peaks(rng), _two_peaks(rng)[:2000]]
    one = misread_rates(frames, thresholds=50.0)
    low = misread_rates(frames, thresholds=30.0)
    both = misread_rates(frames, thresholds=[50.0, 30.0])
    assert one.n_thresholds == 1 and both.n_thresholds == 2 and one.peak_shape == "normal"
    # normal peaks: FP = 1 - Phi((t - m0) / s0) from the pooled fit (the same fit in all three)
    assert one.fit.false_positive_rate == pytest.approx(both.fit.false_positive_rate)
    expect = (4000 * one.false_positive_rate + 2000 * low.false_positive_rate) / 6000
    assert both.false_positive_rate == pytest.approx(expect, rel=1e-12)
    assert low.false_positive_rate > one.false_positive_rate > 0
    assert both.threshold == pytest.approx((4000 * 50 + 2000 * 30) / 6000)
    atoms = one.filling * one.n_sites
    fn = one.false_negative_rate
    assert one.false_negative_uncertainty == pytest.approx(np.sqrt(fn * (1 - fn) / atoms))
    assert "pooled histogram fit of 6000 site amplitudes in 2 frames, normal peaks" in one.method
    assert one.to_dict()["peak_shape"] == "normal"


def test_one_peak_gives_unknown_rates_with_a_warning():
    rng = np.random.default_rng(2)
    rates = misread_rates([rng.normal(0, 10, 3000)], thresholds=40.0)
    assert np.isnan(rates.false_negative_rate)
    assert any("does not show two peaks" in w for w in rates.warnings)


@pytest.mark.parametrize("kwargs, match", [
    ({"amplitudes": [], "thresholds": 1.0}, "at least one frame"),
    ({"amplitudes": np.zeros((2, 5)), "thresholds": [1.0, 2.0, 3.0]}, "3 thresholds were given for 2 frames"),
    ({"amplitudes": np.zeros((2, 5)), "thresholds": [1.0, np.nan]}, "every frame needs a finite threshold"),
    ({"amplitudes": np.full((2, 5), np.nan), "thresholds": 1.0}, "only 0 finite site amplitudes"),
    ({"amplitudes": np.zeros((2, 5)), "thresholds": 1.0, "peak_shape": "round"}, "unknown peak shape 'round'"),
])
def test_bad_input_is_refused(kwargs, match):
    with pytest.raises(FidelityError, match=match):
        misread_rates(**kwargs)


@pytest.fixture(scope="module")
def emccd_frames():
    """40 dim frames of an EMCCD (100 photons per atom, 1 photon per pixel of background), no loss or hops."""
    from latticeread.core.calibration import Calibration
    from latticeread.core.pipeline import Reconstructor
    from latticeread.core.simulate import demo_scenario, simulate_frames

    kw = demo_scenario("square", frame_shape=(64, 64))
    kw.pop("pixel_size_nm")
    kw.update(region=("rectangle", 12, 12), filling=0.3, loss_probability=0.0, hop_probability=0.0,
              photons_per_atom=100.0, background=1.0)
    frames, truth = simulate_frames(**kw, n_shots=40, images_per_shot=1, rng=7)
    rows, cols = truth.sites.rows, truth.sites.cols
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=(64, 64),
                      notes={"index_bounds": [int(rows.min()), int(rows.max()), int(cols.min()), int(cols.max())]})
    rec = Reconstructor(cal)
    results = [rec(f, frame_index=i) for i, f in enumerate(frames)]
    return results, truth, kw["camera"]


def test_emccd_false_positives_match_the_forward_models_truth(emccd_frames):
    """Reported FP rate inside the binomial interval of the true count (skewed peaks, the EMCCD default).

    Normal peaks, the model the front ends used before, put it several times too low (outside).
    """
    results, truth, camera = emccd_frames
    amplitudes = [r.amplitudes for r in results]
    threshold = float(np.median([float(getattr(r.threshold, "threshold", r.threshold)) for r in results]))
    called = np.stack([r.sites.to_matrix(np.asarray(r.amplitudes) > threshold, fill=0, dtype=np.uint8)
                       for r in results])
    true = truth.occupation_matrices()
    empty, full = true == 0, true == 1
    k_fp, n_empty = int(called[empty].sum()), int(empty.sum())
    k_fn, n_full = int((called[full] == 0).sum()), int(full.sum())
    assert k_fp >= 5                                            # enough events to test a rate
    fp_ci = stats.binomtest(k_fp, n_empty).proportion_ci(confidence_level=0.95)
    fn_ci = stats.binomtest(k_fn, n_full).proportion_ci(confidence_level=0.95)

    rates = misread_rates(amplitudes, thresholds=threshold, camera=camera)
    assert rates.peak_shape == "skewed" and rates.to_dict()["peak_shape"] == "skewed"
    assert fp_ci.low <= rates.false_positive_rate <= fp_ci.high, (rates.false_positive_rate, k_fp, n_empty)
    assert fn_ci.low <= rates.false_negative_rate <= fn_ci.high, (rates.false_negative_rate, k_fn, n_full)
    normal = misread_rates(amplitudes, thresholds=threshold, camera=camera, peak_shape="normal")
    assert normal.false_positive_rate < fp_ci.low                 # the bias the default avoids
