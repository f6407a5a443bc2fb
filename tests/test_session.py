"""The session model: change signals, dependency tracking, undo/redo, save/reopen, export.

Ground truth comes from the project's forward model (latticeread.core.simulate); the
numbers the session produces must be the ones latticeread.core.pipeline.Reconstructor gives
for the same frame and threshold (one implementation for GUI and command line).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf
from latticeread.errors import CalibrationError, ExportError, FrameError, FrameFileError, ReconstructionError
from latticeread.session import ReconstructBatch, Session

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)


@pytest.fixture(scope="module")
def simulated():
    from latticeread.core.simulate import simulate_frames

    frames, truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA,
                                    region=("disk", 9), filling=0.4, photons_per_atom=800.0, n_shots=2,
                                    images_per_shot=2, loss_probability=0.02, rng=7)
    return frames, truth


@pytest.fixture()
def calibration():
    return Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE)


@pytest.fixture()
def session(simulated, calibration):
    s = Session()
    s.set_frames(simulated[0].copy())
    s.set_calibration(calibration, record=False)
    return s


class Recorder:
    """Collects the emissions of every signal of a session."""

    def __init__(self, session):
        self.events = []
        for name in ("frames_changed", "index_changed", "calibration_changed", "amplitudes_changed",
                     "classification_changed", "threshold_result_changed", "fidelity_changed",
                     "settings_changed", "undo_changed", "modified_changed"):
            getattr(session, name).connect(lambda *a, n=name: self.events.append((n, a)))

    def names(self):
        return [n for n, _ in self.events]

    def clear(self):
        self.events.clear()


def test_signals_fire_only_on_real_change(session, calibration):
    rec = Recorder(session)
    session.set_index(0)
    session.set_calibration(calibration.replace())  # equal value
    session.update_settings(images_per_shot=1)      # unchanged
    assert rec.names() == []
    session.set_index(2)
    assert rec.names() == ["index_changed"]
    assert rec.events[0][1] == (2,)
    session.set_index(99)  # clamped to the last frame
    assert session.index == 3


def test_amplitudes_match_the_pipeline_and_the_truth(session, simulated):
    """The session's result of a frame is the Reconstructor's result (same code path) and
    recovers the forward model's occupation."""
    from latticeread.core.pipeline import Reconstructor

    frames, truth = simulated
    session.reconstruct()
    session.finish_reconstruction()
    assert session.done.all()
    t = session.threshold
    reference = Reconstructor(session.calibration)(frames[1], frame_index=1, threshold=session.threshold_result)
    mine = session.result(1)
    np.testing.assert_array_equal(mine.amplitudes, reference.amplitudes)
    np.testing.assert_array_equal(mine.occupied, reference.occupied)
    np.testing.assert_allclose(mine.sites.x, reference.sites.x)
    assert mine.threshold == pytest.approx(t)
    # against the truth of the forward model: map truth sites to our sites by index
    for i in range(len(frames)):
        res = session.result(i)
        got = res.sites.to_matrix(res.occupied, fill=0)
        want = np.zeros_like(got)
        tr, tc = truth.sites.rows - res.sites.row_min, truth.sites.cols - res.sites.col_min
        # truth.final_occupation: the atoms present at the end of the exposure of frame i
        want[tr, tc] = truth.final_occupation[i]
        assert np.mean(got == want) > 0.99


def test_threshold_change_reclassifies_without_recomputing(session, monkeypatch):
    session.reconstruct()
    session.finish_reconstruction()
    calls = []
    rec = session.reconstructor()
    original = rec.extract_full
    monkeypatch.setattr(rec, "extract_full", lambda *a, **k: calls.append(1) or original(*a, **k))
    before = session.amplitudes(0).copy()
    n_before = session.counts()["occupied"]
    events = Recorder(session)
    session.set_threshold(5.0)  # far below the atoms' photons: almost every site "occupied"
    assert calls == []
    np.testing.assert_array_equal(session.amplitudes(0), before)
    assert "amplitudes_changed" not in events.names()
    assert "classification_changed" in events.names()
    res = session.result(0)
    np.testing.assert_array_equal(res.occupied, (before > 5.0).astype(np.uint8))
    assert session.counts()["occupied"] > n_before
    assert session.threshold_result.threshold == 5.0


def test_geometry_change_invalidates_amplitudes(session):
    session.reconstruct()
    gen = session.generation
    events = Recorder(session)
    moved = GEOMETRY.with_offset((48.5, 47.7))
    session.set_geometry(moved)
    assert session.generation == gen + 1
    assert session.amplitudes(0) is None and not session.done.any()
    assert ("amplitudes_changed", ((),)) in events.events
    assert session.threshold_result is None


def test_stale_batches_are_dropped(session):
    job = session.reconstruct_job([0])
    batches = list(job())
    session.set_psf(gaussian_psf(fwhm=3.2))
    assert session.store_batch(batches[0]) is False
    assert session.amplitudes(0) is None


def test_loading_frames_drops_results_keeps_matching_calibration(session, simulated, calibration):
    session.reconstruct([0])
    session.set_frames(simulated[0][:2].copy())
    assert session.calibration == calibration
    assert not session.done.any() and session.n_frames == 2
    messages = []
    session.message.connect(messages.append)
    session.set_frames(np.zeros((1, 80, 96), dtype=np.uint16) + 100)
    assert session.calibration is None
    assert any("made for 96x96" in m for m in messages)


def test_undo_redo_and_merged_threshold_drag(session):
    session.reconstruct([0])
    assert not session.can_undo
    for t in (100.0, 120.0, 140.0):  # one drag: merged into one undo step
        session.set_threshold(t, group="threshold")
    session.close_undo_group()
    session.set_threshold(300.0)
    assert session.calibration.threshold == 300.0
    assert session.undo() and session.calibration.threshold == 140.0
    assert session.undo() and session.calibration.threshold is None
    assert not session.undo()
    assert session.redo() and session.calibration.threshold == 140.0
    assert session.amplitudes(0) is not None  # threshold undo never drops amplitudes
    moved = GEOMETRY.with_offset((48.6, 47.5))
    session.set_geometry(moved)
    assert session.amplitudes(0) is None
    session.undo()
    assert session.calibration.geometry == GEOMETRY


def test_mean_occupation_and_drift(session):
    session.reconstruct()
    session.finish_reconstruction()
    stack = session.occupation_stack()
    mean = session.mean_occupation()
    inside = stack[0] != 255
    np.testing.assert_allclose(mean[inside], stack[:, inside].mean(axis=0))
    assert np.isnan(mean[~inside]).all()
    idx, offsets, trend = session.phase_drift()
    assert list(idx) == [0, 1, 2, 3] and offsets.shape == (4, 2) and trend.shape == (4, 2)
    np.testing.assert_allclose(offsets, np.broadcast_to(GEOMETRY.offset, (4, 2)), atol=0.1)


def test_fidelity_through_the_core(session):
    session.reconstruct()
    session.finish_reconstruction()
    with pytest.raises(ReconstructionError, match="at least two consecutive images"):
        session.compute_fidelity()
    session.update_settings(images_per_shot=2, bootstrap_resamples=20)
    session.compute_fidelity()
    report = session.fidelity
    assert report.n_shots == 2 and report.n_images == 2
    session.set_threshold(session.threshold + 1.0)
    assert session.fidelity is None  # stale after re-classification


def test_fidelity_needs_every_frame(session):
    session.update_settings(images_per_shot=2)
    session.reconstruct([0])
    with pytest.raises(ReconstructionError, match="needs every frame reconstructed; 1 of 4"):
        session.compute_fidelity()


def test_save_and_reopen_round_trip(session, tmp_path):
    session.reconstruct([0, 2])
    session.set_threshold(250.0)
    session.update_settings(images_per_shot=2, pixel_size_nm=150.0)
    session.set_index(2)
    path = session.save(tmp_path / "run.json")
    assert path.exists() and (tmp_path / "run.h5").exists() and not session.modified
    doc = json.loads(path.read_text())
    assert doc["format"] == "latticeread-session" and doc["frames"]["source"] is None
    again = Session.open(path)
    assert again.calibration == session.calibration
    assert again.index == 2 and again.settings == session.settings
    np.testing.assert_array_equal(again.frame(3), session.frame(3))
    np.testing.assert_array_equal(again.done, session.done)
    for i in (0, 2):
        a, b = again.result(i), session.result(i)
        np.testing.assert_array_equal(a.amplitudes, b.amplitudes)
        np.testing.assert_array_equal(a.occupied, b.occupied)
        np.testing.assert_array_equal(a.sites.x, b.sites.x)
    assert again.can_undo  # history came back too
    again.undo()
    assert again.calibration.threshold is None


def test_save_with_file_frames_and_refuse_to_overwrite_input(tmp_path, simulated, calibration):
    import tifffile

    tif = tmp_path / "shots.tif"
    tifffile.imwrite(tif, simulated[0], photometric="minisblack")
    s = Session()
    s.open_frames(tif)
    s.set_calibration(calibration)
    s.reconstruct([1])
    with pytest.raises(ExportError, match="refusing to overwrite"):
        s.export_sites_csv(tif)
    before = tif.read_bytes()
    path = s.save(tmp_path / "session.json")
    assert tif.read_bytes() == before
    again = Session.open(path)
    assert again.source == str(tif.resolve())
    np.testing.assert_array_equal(again.amplitudes(1), s.amplitudes(1))


def test_export_csv_and_hdf5_read_back(session, tmp_path):
    from latticeread.io import read_occupation_hdf5, read_sites_csv

    session.reconstruct()
    session.finish_reconstruction()
    session.export_sites_csv(tmp_path / "sites.csv")
    table = read_sites_csv(tmp_path / "sites.csv")
    results = session.results()
    assert len(table["frame"]) == sum(len(r.sites) for r in results)
    first = table["frame"] == 1
    np.testing.assert_array_equal(table["occupied"][first], results[1].occupied)
    np.testing.assert_allclose(table["amplitude"][first], results[1].amplitudes, rtol=1e-9)
    session.export_occupation_hdf5(tmp_path / "occ.h5")
    occ = read_occupation_hdf5(tmp_path / "occ.h5")
    np.testing.assert_array_equal(np.asarray(occ.occupation), session.occupation_stack())


def test_export_needs_results(session, tmp_path):
    with pytest.raises(ExportError, match="nothing to export yet"):
        session.export_sites_csv(tmp_path / "x.csv")
    assert not (tmp_path / "x.csv").exists()


def test_autosave_only_when_modified(session, tmp_path):
    path = tmp_path / "auto.json"
    assert session.autosave(path) is not None and path.exists()
    assert session.modified  # autosave does not count as the user's save
    session.save(tmp_path / "mine.json")
    path.unlink()
    assert session.autosave(path) is None and not path.exists()


def test_set_threshold_needs_calibration():
    s = Session()
    with pytest.raises(CalibrationError, match="no calibration yet"):
        s.set_threshold(10.0)


@pytest.mark.parametrize("value", [float("nan"), float("inf"), -1.0, -1e9, 2e7])
def test_threshold_must_be_finite_and_in_range(session, value):
    before = session.calibration
    with pytest.raises(CalibrationError, match=r"it must be a finite number between 0 and 1e\+07"):
        session.set_threshold(value)
    assert session.calibration == before


def test_unknown_threshold_method(session):
    with pytest.raises(ValueError, match="unknown threshold method 'median'"):
        session.set_threshold_method("median")


def test_unknown_setting():
    with pytest.raises(ValueError, match="unknown setting"):
        Session().update_settings(colour="red")


def test_images_per_shot_positive():
    with pytest.raises(ValueError, match="images per shot must be at least 1"):
        Session().update_settings(images_per_shot=0)


def test_frame_index_out_of_range(session):
    with pytest.raises(FrameError, match="frame 7 does not exist; the stack has 4"):
        session.frame(7)


def test_no_frames_loaded():
    with pytest.raises(FrameError, match="no frames are loaded"):
        Session().frame()


def test_four_dimensional_frames_rejected():
    with pytest.raises(FrameError, match="2-D frame or a 3-D stack"):
        Session().set_frames(np.zeros((2, 2, 8, 8)))


def test_calibration_of_other_frame_size_rejected(session):
    other = Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=(64, 64))
    with pytest.raises(CalibrationError, match="calibration was made for 64x64"):
        session.set_calibration(other)


def test_open_rejects_other_json(tmp_path):
    p = tmp_path / "other.json"
    p.write_text('{"format": "something-else"}')
    with pytest.raises(FrameFileError, match="not a latticeread session file"):
        Session.open(p)


def test_open_missing_session(tmp_path):
    with pytest.raises(FrameFileError, match="does not exist"):
        Session.open(tmp_path / "gone.json")


def test_batch_of_wrong_site_count_rejected(session):
    session.reconstruct([0])
    n = session.amplitudes(0).size
    bad = ReconstructBatch(session.generation, (1,), (GEOMETRY,), np.zeros((1, n - 1)),
                           np.zeros((1, n - 1), np.uint8), np.zeros(1), ((),))
    with pytest.raises(Exception, match="the site set must be fixed by the calibration"):
        session.store_batch(bad)


def test_camera_setting_recomputes_in_photons(session):
    session.reconstruct([0])
    a0 = session.amplitudes(0).copy()
    double = CAMERA.to_dict() | {"counts_per_electron": 1.0}  # twice the counts per photon
    session.update_settings(camera=double)
    assert session.amplitudes(0) is None and session.calibration.camera.counts_per_electron == 1.0
    session.reconstruct([0])
    bright = a0 > 400
    np.testing.assert_allclose(session.amplitudes(0)[bright], a0[bright] / 2, rtol=1e-6)


def test_incremental_pooled_statistics_equal_a_full_recount(session):
    from latticeread.core.classify import classify

    session.reconstruct([0, 1])
    first = session.pooled_counts()  # statistics of two frames, then two more arrive
    session.reconstruct([2, 3])
    counts = session.pooled_counts()
    assert counts["occupied"] > first["occupied"]
    amps = session.all_amplitudes()
    occ, p = classify(amps, session.threshold_result)
    assert counts["occupied"] == int(occ.sum())
    assert counts["empty"] == int(np.isfinite(amps).sum() - occ.sum())
    assert counts["uncertain"] == int(((p >= 0.1) & (p <= 0.9)).sum())
    stack = session.occupation_stack()
    inside = stack[0] != 255
    np.testing.assert_allclose(session.mean_occupation()[inside], stack[:, inside].mean(axis=0))
    # the background threshold fit brings its own statistics: same numbers
    session.store_threshold_fit(session.fit_threshold_job()())
    occ2, _ = classify(amps, session.threshold_result)
    assert session.pooled_counts()["occupied"] == int(occ2.sum())


def test_histogram_amplitudes_are_bounded(session):
    session.reconstruct()
    n = session.amplitudes(0).size
    assert session.histogram_amplitudes().size == 4 * n
    assert session.histogram_amplitudes(max_values=2 * n).size == 2 * n  # every other frame


def test_worker_processes_give_the_same_amplitudes(session, simulated):
    """Frames reconstructed in spawned worker processes equal those done in this thread."""
    job = session.reconstruct_job(batch_size=1, processes=2)
    for batch in job():
        assert session.store_batch(batch)
    assert session.done.all()
    from latticeread.core.pipeline import Reconstructor

    rec = Reconstructor(session.calibration)
    for i in range(4):
        _g, amp, _w = rec.extract_full(simulated[0][i])
        np.testing.assert_array_equal(session.amplitudes(i), amp.amplitudes)


def test_psf_estimate_job_recovers_the_airy_width():
    """Sparse frames of an ideal Airy PSF: the estimated FWHM is 0.514 lambda/NA (Born & Wolf,
    Principles of Optics, 8.5.2) within 5 %; the estimate replaces the PSF and drops amplitudes."""
    from latticeread.core.psf import airy_psf
    from latticeread.core.simulate import simulate_frames

    g = LatticeGeometry(a1=(0.3, 5.0), a2=(5.0, -0.3), offset=(64.2, 63.7))
    true = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=200.0)
    frames, _ = simulate_frames(geometry=g, frame_shape=(128, 128), psf=true, camera=CAMERA, filling=0.05,
                                photons_per_atom=2000.0, n_shots=6, rng=2)
    s = Session()
    s.set_frames(frames)
    s.set_calibration(Calibration(geometry=g, psf=gaussian_psf(fwhm=4.0), camera=CAMERA, frame_shape=(128, 128)))
    s.reconstruct([0])
    psf = s.estimate_psf_job()()
    assert psf.fwhm == pytest.approx(0.514 * 767.0 / 0.75 / 200.0, rel=0.05)
    s.set_psf(psf)
    assert s.calibration.psf.kind == "empirical" and s.amplitudes(0) is None
    s.undo()
    assert s.calibration.psf.kind == "gaussian"


def test_autosave_job_writes_the_state_of_when_it_was_made(session, tmp_path):
    session.reconstruct([0, 1])
    session.set_threshold(200.0)
    job = session.autosave_job(tmp_path / "auto.json")  # snapshot taken here (GUI thread)
    session.set_threshold(400.0)
    session.reconstruct([2])
    path = job()  # written later (worker thread in the program)
    again = Session.open(path)
    assert again.calibration.threshold == 200.0
    assert list(again.done) == [True, True, False, False]


def _direct_pooled(session):
    """Pooled counts and per-site mean occupation straight from the stored amplitudes.

    The outside reference: ``amplitude > threshold`` over every stored amplitude with numpy
    (strictly above, the rule of latticeread.core.classify; common practice, no source).
    """
    amps = np.stack([session.amplitudes(i) for i in np.flatnonzero(session.done)])
    t = session.threshold
    finite = np.isfinite(amps)
    occ = amps > t
    mean = session.sites.to_matrix(occ.sum(axis=0) / finite.sum(axis=0), fill=np.nan, dtype=float)
    return int(occ.sum()), int(finite.sum() - occ.sum()), mean


def test_threshold_drag_recounts_pooled_statistics_without_posteriors(session, monkeypatch):
    from latticeread.core.classify import ThresholdResult

    session.reconstruct()
    session.finish_reconstruction()
    tr = session.threshold_result
    p = tr.posterior(session.all_amplitudes())
    uncertain = int(((p >= 0.1) & (p <= 0.9)).sum())
    assert session.pooled_counts()["uncertain"] == uncertain
    sizes = []
    original = ThresholdResult.posterior
    monkeypatch.setattr(ThresholdResult, "posterior", lambda self, a: sizes.append(np.size(a)) or original(self, a))
    n_sites = session.amplitudes(0).size
    for t in np.linspace(150.0, 650.0, 9):  # one drag across the gap between the peaks
        session.set_threshold(float(t), group="threshold")
        occupied, empty, mean = _direct_pooled(session)
        counts = session.pooled_counts()
        assert (counts["occupied"], counts["empty"]) == (occupied, empty)
        assert counts["uncertain"] == uncertain  # the posterior does not move with the threshold
        np.testing.assert_array_equal(session.mean_occupation(), mean)
    assert max(sizes, default=0) <= n_sites  # no posterior over the pooled amplitudes during the drag
    session.close_undo_group()
    for step in (session.undo, session.redo, session.undo):
        assert step()
        occupied, empty, mean = _direct_pooled(session)
        assert session.pooled_counts()["occupied"] == occupied and session.pooled_counts()["empty"] == empty
        np.testing.assert_array_equal(session.mean_occupation(), mean)
    assert session.calibration.threshold is None
    session.set_threshold_method("otsu")  # other components: the uncertain count is made again
    p = session.threshold_result.posterior(session.all_amplitudes())
    assert session.pooled_counts()["uncertain"] == int(((p >= 0.1) & (p <= 0.9)).sum())
    assert session.pooled_counts()["occupied"] == _direct_pooled(session)[0]


def test_replaced_frame_is_counted_again(session):
    session.reconstruct()
    session.finish_reconstruction()
    before = session.pooled_counts()
    res = session.result(0)
    brighter = np.where(np.isfinite(res.amplitudes), res.amplitudes + 5000.0, np.nan)[None]
    assert session.store_batch(ReconstructBatch(session.generation, (0,), (res.geometry,), brighter,
                                                res.flags[None], np.array([res.background]), ((),)))
    occupied, empty, mean = _direct_pooled(session)
    counts = session.pooled_counts()
    assert counts["occupied"] > before["occupied"]
    assert (counts["occupied"], counts["empty"]) == (occupied, empty)
    np.testing.assert_array_equal(session.mean_occupation(), mean)


def test_sorted_copy_counts_like_a_comparison_with_nan_inf_and_ties():
    """Binary search on each site's sorted amplitudes = numpy ``(a > t).sum(axis=0)``
    (common practice, no source), including NaN (never above), +-inf and values equal to t."""
    from latticeread.pooled_stats import PooledStats, count_above_sorted

    rng = np.random.default_rng(3)
    for n_frames in (1, 2, 7, 64):
        a = np.round(rng.normal(300.0, 400.0, (n_frames, 40)))  # rounded: many exact ties
        a[rng.random(a.shape) < 0.1] = np.nan
        a[0, 0], a[-1, 1], a[:, 2] = np.inf, -np.inf, np.nan  # site 2: no finite amplitude at all
        stats = PooledStats.empty(0, 0.0, np.ones(n_frames, bool), a.shape[1])
        stats.add_sorted_index(a)
        for t in np.concatenate([[-1e9, 1e9], a[np.isfinite(a)][:20]]):
            want = (np.nan_to_num(a, nan=-np.inf) > t).sum(axis=0)
            np.testing.assert_array_equal(count_above_sorted(stats.sorted, stats.n_not_nan, float(t)), want)


def test_drag_after_the_background_fit_uses_the_sorted_copy_and_stays_exact(session):
    session.reconstruct([0, 1, 2])
    session.store_threshold_fit(session.fit_threshold_job()())
    assert session._stats_cache.sorted is not None
    amps = session.all_amplitudes()
    ties = np.sort(amps[np.isfinite(amps) & (amps >= 0)])[:: max(1, amps.size // 7)]  # a threshold is >= 0
    for t in list(ties) + [200.0, 450.0]:  # thresholds equal to stored amplitudes: strictly above only
        session.set_threshold(float(t), group="threshold")
        occupied, empty, mean = _direct_pooled(session)
        assert (session.pooled_counts()["occupied"], session.pooled_counts()["empty"]) == (occupied, empty)
        np.testing.assert_array_equal(session.mean_occupation(), mean)
    assert session._stats_cache.sorted is not None
    session.reconstruct([3])  # a new frame, then a new threshold: re-count the old frames, add the new one
    session.set_threshold(300.0)
    occupied, empty, mean = _direct_pooled(session)
    assert (session.pooled_counts()["occupied"], session.pooled_counts()["empty"]) == (occupied, empty)
    np.testing.assert_array_equal(session.mean_occupation(), mean)
    assert session._stats_cache.sorted is None  # it no longer covers every frame
    session.set_threshold(310.0)  # re-counted by comparison now
    occupied, empty, mean = _direct_pooled(session)
    assert (session.pooled_counts()["occupied"], session.pooled_counts()["empty"]) == (occupied, empty)
