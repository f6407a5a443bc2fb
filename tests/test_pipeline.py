"""The frame pipeline (latticeread.core.pipeline) against the forward model's ground truth.

Ground truth: :func:`latticeread.core.simulate.simulate_frames` (the project's forward model,
EMCCD statistics after Robbins & Hadwen 2003). The error rates quoted in asserts are bounds
from the physics of the scenario (well separated histograms), not tuned values.
"""

from __future__ import annotations

import json
import types

import numpy as np
import pytest

from latticeread.core import flags as F
from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import FrameResult, Reconstructor, calibrate, reclassify, reconstruct_stack
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames
from latticeread.errors import CalibrationError, FrameError

PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0)  # FWHM 2.92 px
CAMERA = CameraModel(kind="emccd", em_gain=150.0, counts_per_electron=0.08, bias=100.0, read_noise=5.0,
                     quantum_efficiency=0.9, saturation=65535)
SHAPE = (112, 112)


def lattice(ratio, angle=0.25):
    s = ratio * PSF.fwhm
    return LatticeGeometry(a1=(s * np.cos(angle), s * np.sin(angle)), a2=(-s * np.sin(angle), s * np.cos(angle)),
                           offset=(56.4, 55.8))


def truth_positions(result: FrameResult, truth, frame: int):
    """Index into result sites of every truth site (by lattice index)."""
    lut = {(r, c): i for i, (r, c) in enumerate(zip(result.sites.rows, result.sites.cols))}
    return np.array([lut[(r, c)] for r, c in zip(truth.sites.rows, truth.sites.cols)])


@pytest.fixture(scope="module")
def scenario():
    geo = lattice(1.0)
    frames, truth = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 11),
                                    filling=0.45, photons_per_atom=1200.0, background=1.5, n_shots=6,
                                    phase_jitter=0.5, rng=21)
    cal = calibrate(frames, psf=PSF, camera=CAMERA, geometry=geo)
    return geo, frames, truth, cal


def test_calibrate_and_reconstruct_match_the_truth(scenario):
    geo, frames, truth, cal = scenario
    assert cal.amplitude_method == "linear"
    assert 300 < cal.threshold < 900
    assert cal.options.photons_per_atom == pytest.approx(1200.0, rel=0.05)
    results = list(reconstruct_stack(frames, cal))
    shapes = {r.occupation_matrix().shape for r in results}
    assert len(shapes) == 1  # same matrix for every frame
    errors = 0
    for f, res in enumerate(results):
        idx = truth_positions(res, truth, f)
        errors += np.count_nonzero(res.occupied[idx] != truth.initial_occupation[f])
        outside = np.setdiff1d(np.arange(len(res.sites)), idx)
        assert res.occupied[outside].sum() == 0
        g = truth.geometries[f]
        assert np.hypot(res.geometry.offset[0] - g.offset[0], res.geometry.offset[1] - g.offset[1]) < 0.05
    assert errors == 0


def test_frame_result_contract(scenario):
    _, frames, _, cal = scenario
    res = Reconstructor(cal)(frames[0], frame_index=7)
    n = len(res.sites)
    assert res.frame_index == 7
    assert res.amplitudes.shape == res.p_occupied.shape == res.flags.shape == res.occupied.shape == (n,)
    assert res.occupied.dtype == np.uint8 and res.flags.dtype == np.uint8
    m = res.occupation_matrix(fill=255)
    assert m.dtype == np.uint8 and set(np.unique(m)) <= {0, 1, 255}
    assert m.sum(where=m != 255) == res.n_atoms
    assert np.isclose(res.threshold, cal.threshold)


def test_reclassify_keeps_amplitudes(scenario):
    _, frames, _, cal = scenario
    res = Reconstructor(cal)(frames[1])
    low = reclassify(res, 50.0)
    assert low.amplitudes is res.amplitudes
    assert low.n_atoms > res.n_atoms
    assert low.threshold == 50.0
    # the posterior keeps the calibration's components; sites near 50 photons are not uncertain,
    # the UNCERTAIN flag follows the posterior, not the threshold
    assert np.array_equal(low.p_occupied, res.p_occupied)
    assert np.array_equal(low.flags & F.UNCERTAIN, res.flags & F.UNCERTAIN)


def test_stack_is_streamed(scenario):
    _, frames, _, cal = scenario
    pulled = []

    def source():
        for i, f in enumerate(frames):
            pulled.append(i)
            yield f

    gen = reconstruct_stack(source(), cal)
    assert isinstance(gen, types.GeneratorType)
    first = next(gen)
    assert first.frame_index == 0 and pulled == [0]


def test_frame_without_atoms(scenario):
    geo, _, _, cal = scenario
    frames, _ = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 11),
                                filling=0.0, photons_per_atom=1200.0, background=1.5, rng=3)
    res = Reconstructor(cal)(frames[0])
    assert res.n_atoms == 0


def test_one_atom(scenario):
    geo, _, truth, cal = scenario
    occ = np.zeros(len(truth.sites), np.uint8)
    occ[len(occ) // 2] = 1
    frames, t1 = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 11),
                                 occupation=occ, photons_per_atom=1200.0, background=1.5, rng=4)
    res = Reconstructor(cal)(frames[0])
    idx = truth_positions(res, t1, 0)
    assert res.n_atoms == 1 and res.occupied[idx][len(occ) // 2] == 1


def test_all_sites_occupied(scenario):
    geo, _, truth, cal = scenario
    frames, t1 = simulate_frames(geometry=geo, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 11),
                                 filling=1.0, photons_per_atom=1200.0, background=1.5, rng=5)
    res = Reconstructor(cal)(frames[0])
    idx = truth_positions(res, t1, 0)
    assert res.occupied[idx].all()
    assert res.n_atoms == len(idx)


def test_saturated_and_nan_pixels_are_flagged(scenario):
    _, frames, truth, cal = scenario
    frame = frames[2].astype(float)
    rec = Reconstructor(cal)
    res0 = rec(frame)
    k = int(np.argmax(res0.amplitudes))
    x, y = int(round(res0.sites.x[k])), int(round(res0.sites.y[k]))
    frame[y, x] = CAMERA.saturation
    frame[y + 1, x] = np.nan
    res = rec(frame)
    assert res.flags[k] & F.SATURATED and res.flags[k] & F.NONFINITE
    assert np.isfinite(res.amplitudes).all()
    assert res.occupied[k] == 1
    assert any("saturated" in w for w in res.warnings)


def test_binary_method_chosen_below_0p7_fwhm():
    """Spacing 0.65 FWHM: calibrate switches to the binary refinement and stays far below the
    linear estimator's error (which is near 40 % there, see test_amplitudes)."""
    geo = lattice(0.65)
    frames, truth = simulate_frames(geometry=geo, frame_shape=(80, 80), psf=PSF, camera=CAMERA, region=("disk", 8),
                                    filling=0.5, photons_per_atom=1000.0, background=1.0, n_shots=3,
                                    phase_jitter=0.4, rng=9)
    cal = calibrate(frames, psf=PSF, camera=CAMERA, geometry=geo)
    assert cal.amplitude_method == "nonlinear"
    assert cal.options.photons_per_atom == pytest.approx(1000.0, rel=0.1)
    err = []
    for f, res in enumerate(reconstruct_stack(frames, cal)):
        idx = truth_positions(res, truth, f)
        err.append(np.mean(res.occupied[idx] != truth.initial_occupation[f]))
    assert np.mean(err) < 0.08


def test_calibrate_estimates_geometry_and_psf():
    """Without geometry and PSF the calibration measures both (lattice and PSF estimators)."""
    geo = lattice(1.6)
    frames, truth = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=PSF, camera=CAMERA,
                                    region=("disk", 10), filling=0.2, photons_per_atom=1500.0, background=1.0,
                                    n_shots=8, phase_jitter=0.3, rng=12)
    cal = calibrate(frames, camera=CAMERA)
    assert sorted(cal.geometry.spacings) == pytest.approx([1.6 * PSF.fwhm] * 2, rel=0.01)
    assert cal.psf.fwhm == pytest.approx(PSF.fwhm, rel=0.1)
    total_err = 0
    for f, res in enumerate(reconstruct_stack(frames, cal)):
        # match sites by position (the estimated lattice numbers its sites its own way)
        g = truth.geometries[f]
        tx, ty = g.site_positions(truth.sites.rows, truth.sites.cols)
        d = np.hypot(res.sites.x[:, None] - tx[None], res.sites.y[:, None] - ty[None])
        nearest = np.argmin(d, axis=0)
        assert d[nearest, np.arange(tx.size)].max() < 0.3
        total_err += np.count_nonzero(res.occupied[nearest] != truth.initial_occupation[f])
    assert total_err == 0


# --- one test per error message ---------------------------------------------------------------

def test_error_frame_size(scenario):
    _, frames, _, cal = scenario
    with pytest.raises(CalibrationError, match="is 111x112 pixels but the calibration was made for 112x112"):
        Reconstructor(cal)(frames[0][:-1])


def test_error_stack_given_as_frame(scenario):
    _, frames, _, cal = scenario
    with pytest.raises(FrameError, match="expected one 2-D frame"):
        Reconstructor(cal)(frames[:2])


def test_error_unknown_method(scenario):
    with pytest.raises(CalibrationError, match="unknown amplitude method 'best'"):
        Reconstructor(scenario[3], method="best")


def test_error_unknown_phase_method(scenario):
    with pytest.raises(CalibrationError, match="unknown phase method 'guess'"):
        Reconstructor(scenario[3], phase_method="guess")


def test_error_mask_shape(scenario):
    with pytest.raises(CalibrationError, match="the mask is 3x3 pixels but the calibration was made for 112x112"):
        Reconstructor(scenario[3], mask=np.ones((3, 3), bool))


def test_error_empty_mask(scenario):
    with pytest.raises(CalibrationError, match="the mask excludes every pixel"):
        Reconstructor(scenario[3], mask=np.zeros(SHAPE, bool))


def test_error_calibration_without_frame_shape(scenario):
    cal = scenario[3].replace(frame_shape=(0, 0))
    with pytest.raises(CalibrationError, match="has no valid frame shape"):
        Reconstructor(cal)


def test_error_not_a_calibration():
    with pytest.raises(CalibrationError, match="expected a Calibration, got dict"):
        Reconstructor({})


def test_error_calibrate_without_frames():
    with pytest.raises(FrameError, match="no frames to calibrate from"):
        calibrate(np.zeros((0, 8, 8)), psf=PSF, geometry=lattice(1.0))


def test_error_calibrate_mixed_frame_sizes():
    with pytest.raises(FrameError, match="frame 1 is 40x41 pixels but frame 0 is 40x40"):
        calibrate([np.zeros((40, 40)), np.zeros((40, 41))], psf=PSF, geometry=lattice(1.0))


def test_calibration_round_trip_keeps_the_threshold_fit(scenario):
    cal = scenario[3]
    again = Calibration.from_dict(cal.to_dict())
    rec = Reconstructor(again)
    assert rec.threshold.threshold == pytest.approx(cal.threshold)
    assert rec.threshold.has_components




@pytest.fixture(scope="module")
def tight_offsets():
    """Two frames at 0.85 FWHM (beyond the optical cut-off of the Airy PSF), reconstructed with the
    true vectors; each frame's offset is drawn afresh (phase jitter 0.5 px)."""
    from latticeread.core.calibration import ReconstructionOptions

    psf = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=105.0)  # FWHM 5.0 px
    s, angle = 0.85 * psf.fwhm, 0.3
    geo = LatticeGeometry(a1=(s * np.cos(angle), s * np.sin(angle)), a2=(-s * np.sin(angle), s * np.cos(angle)),
                          offset=(80.3, 79.6))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(160, 160), psf=psf, camera=CAMERA,
                                    region=("disk", 15), filling=0.3, photons_per_atom=900.0, background=1.5,
                                    n_shots=2, phase_jitter=0.5, rng=5)
    cal = Calibration(geometry=geo, psf=psf, camera=CAMERA, frame_shape=(160, 160), threshold=450.0,
                      options=ReconstructionOptions(phase_method="atoms", photons_per_atom=900.0))
    return geo, psf, frames, truth, cal, list(reconstruct_stack(frames, cal))


def test_offset_beyond_the_cut_off_from_all_occupied_sites_is_more_precise_than_from_the_lone_atoms(tight_offsets):
    """Below 1 FWHM each frame's offset starts from its lone atoms; the real-space fit of all its
    occupied sites (SiteBasis.fit_offset_sites) replaces it when its 1-sigma is smaller, and says so.
    Truth: the forward model's per-frame offsets."""
    from latticeread.core.atoms import locate_atoms, offset_from_atoms

    geo, psf, frames, truth, cal, results = tight_offsets
    spacing = min(geo.spacings)
    errors_sites, errors_atoms = [], []
    for f, res in enumerate(results):
        assert res.offset_method == "sites", res.warnings
        sigma = float(np.hypot(*res.offset_sigma))
        true = np.asarray(truth.geometries[f].offset)
        errors_sites.append(np.hypot(*(np.asarray(res.geometry.offset) - true)) / spacing)
        photons = CAMERA.counts_to_photons(frames[f])
        atoms = offset_from_atoms(photons, geo, fwhm=psf.fwhm, atoms=locate_atoms(photons, fwhm=psf.fwhm))
        assert 0 < sigma < float(np.hypot(*atoms.sigma))
        errors_atoms.append(np.hypot(*(np.asarray(atoms.offset) - true)) / spacing)
        assert errors_sites[-1] < 4 * sigma / spacing + 0.002  # the stated 1-sigma holds
    assert max(errors_sites) < 0.01
    assert np.mean(errors_sites) < np.mean(errors_atoms)


def test_every_output_stores_each_frames_offset_method_and_sigma(tight_offsets, tmp_path):
    """The CSV settings, the HDF5 export and the run file of batch/watch (one ShotRecord path)
    carry how each frame's offset was found and its 1-sigma."""
    from latticeread.analysis.service import shot_record
    from latticeread.io import read_results, read_sites_metadata, write_occupation_hdf5, write_sites_csv
    from latticeread.io.run_file import RunWriter, ShotKey

    *_, cal, results = tight_offsets
    want_sigma = np.array([r.offset_sigma for r in results])
    assert np.all(np.isfinite(want_sigma)) and np.all(want_sigma > 0)
    write_sites_csv(tmp_path / "s.csv", results, calibration=cal)
    offsets = read_sites_metadata(tmp_path / "s.csv")["frame_offsets"]
    for r in results:
        entry = offsets[str(r.frame_index)]
        assert entry["method"] == "sites"
        np.testing.assert_allclose(entry["sigma"], r.offset_sigma)
        np.testing.assert_allclose(entry["offset"], r.geometry.offset)
    write_occupation_hdf5(tmp_path / "s.h5", results, calibration=cal)
    with RunWriter(tmp_path / "run.h5", calibration_json=json.dumps(cal.to_dict())) as w:
        w.append_many([shot_record(ShotKey("/data/f.tif", "ab" * 16, r.frame_index), r) for r in results])
    for name in ("s.h5", "run.h5"):
        arrays, _ = read_results(tmp_path / name)
        assert arrays["offset_method"].tolist() == ["sites"] * len(results)
        np.testing.assert_allclose(arrays["offset_sigma"], want_sigma)
