"""Typed settings of a calibration: equality, saving (format 2), loading format 1, the session.

Settings that change results (weighting, index bounds, photons per atom, reference image,
offset refit, threshold policy and fit, frame policy) are typed fields that take part in
equality and are saved; format-1 files, which kept them in ``notes``, still load.
Checked against the standard library's ``json`` round trip (common practice, no source).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from latticeread.core.calibration import (
    Calibration,
    FramePolicy,
    ReconstructionOptions,
    ReferenceImage,
    ThresholdPolicy,
)
from latticeread.core.camera import CameraModel
from latticeread.core.classify import select_threshold
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor
from latticeread.core.psf import gaussian_psf
from latticeread.errors import CalibrationError, FrameError
from latticeread.io.calibration_file import calibration_from_json, calibration_to_json, load_calibration

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)


def _base(**changes) -> Calibration:
    return Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE, **changes)


def _fit():
    rng = np.random.default_rng(3)
    amps = np.concatenate([rng.normal(0, 30, 600), rng.normal(800, 90, 400)])
    return select_threshold(amps, method="mixture")


def _full() -> Calibration:
    ref = ReferenceImage(block=4, shape=SHAPE, values=np.full((24, 24), 2.5), n_frames=3)
    return _base(threshold=410.0, options=ReconstructionOptions(weighting="camera", index_bounds=(-3, 5, -4, 6),
                                                               photons_per_atom=800.0, reference=ref,
                                                               phase_method="fourier", refit_phase=False),
                 threshold_scope="per_frame", threshold_fit=_fit(), frame_policy=FramePolicy(nonfinite="fail"),
                 notes={"source": "demo.tif"})


@pytest.mark.parametrize("change", [
    {"options": ReconstructionOptions(weighting="camera", reference=ReferenceImage(4, SHAPE, np.ones((24, 24))))},
    {"options": ReconstructionOptions(index_bounds=(0, 3, 0, 3))},
    {"options": ReconstructionOptions(photons_per_atom=750.0)},
    {"options": ReconstructionOptions(refit_phase=False)},
    {"threshold_scope": "per_frame"},
    {"threshold_fit": _fit()},
    {"frame_policy": FramePolicy(saturated="fail")},
])
def test_every_setting_that_changes_results_takes_part_in_equality(change):
    assert _base() != _base(**change)
    assert _base(**change) == _base(**change)
    assert _base(notes={"a": 1}) == _base(notes={"b": 2})  # provenance only


def test_format_2_round_trip_keeps_every_setting(tmp_path):
    cal = _full()
    text = calibration_to_json(cal)
    data = json.loads(text)
    assert data["format_version"] == 2
    assert data["reconstruction"]["index_bounds"] == [-3, 5, -4, 6]
    assert data["frame_policy"] == {"nonfinite": "fail", "saturated": "flag"}
    back = calibration_from_json(text)
    assert back == cal
    assert back.options.reference.values.shape == (24, 24)
    assert back.threshold_policy == ThresholdPolicy("fixed", "mixture", 410.0)
    assert back.threshold_fit.threshold == pytest.approx(cal.threshold_fit.threshold)


def test_format_1_file_still_loads_with_its_settings_moved_out_of_notes(tmp_path):
    fit = _fit()
    v1 = _full().to_dict()
    for key in ("reconstruction", "frame_policy", "threshold_scope", "threshold_fit"):
        del v1[key]
    v1["format_version"] = 1
    v1["notes"] = {"source": "old.tif", "weighting": "camera", "index_bounds": [-3, 5, -4, 6],
                   "photons_per_atom": 800.0, "threshold_result": fit.to_dict(),
                   "reference_photons": {"block": 4, "shape": [96, 96], "values": np.full((24, 24), 2.5).tolist(),
                                         "n_frames": 3}}
    path = tmp_path / "old.json"
    path.write_text(json.dumps(v1))
    cal = load_calibration(path)
    assert cal.notes == {"source": "old.tif"}
    assert cal.options.weighting == "camera" and cal.options.index_bounds == (-3, 5, -4, 6)
    assert cal.options.photons_per_atom == 800.0
    assert cal.options.reference == _full().options.reference
    assert cal.threshold_fit.threshold == pytest.approx(fit.threshold)
    assert cal.threshold_scope == "pooled" and cal.frame_policy == FramePolicy()
    # the settings now reach the reconstruction from the typed fields
    assert Reconstructor(cal).index_bounds == (-3, 5, -4, 6)


def test_format_newer_than_the_program_is_refused():
    data = _base().to_dict()
    data["format_version"] = 3
    with pytest.raises(CalibrationError, match=r"format version 3 is newer than this program understands \(2\)"):
        calibration_from_json(json.dumps(data))


def test_threshold_policy_from_the_calibration():
    assert _base().threshold_policy == ThresholdPolicy("pooled", "mixture")
    assert _base(threshold=5.0).threshold_policy.kind == "fixed"
    cal = _base().with_threshold_policy(ThresholdPolicy("per_frame", "otsu"))
    assert (cal.threshold, cal.threshold_scope, cal.threshold_method) == (None, "per_frame", "otsu")
    assert "each frame's own histogram" in cal.threshold_policy.describe()


@pytest.mark.parametrize("make, match", [
    (lambda: ThresholdPolicy("median"), "unknown threshold policy 'median'"),
    (lambda: ThresholdPolicy("pooled", "kmeans"), "unknown threshold method 'kmeans'"),
    (lambda: ThresholdPolicy("fixed"), "a fixed threshold needs a finite number of photons"),
    (lambda: ThresholdPolicy("pooled", value=3.0), "a pooled threshold is chosen from the histogram"),
    (lambda: FramePolicy(nonfinite="ignore"), "unknown nonfinite pixel policy 'ignore'"),
    (lambda: ReconstructionOptions(weighting="poisson"), "unknown pixel weighting 'poisson'"),
    (lambda: ReconstructionOptions(phase_method="peak"), "unknown phase method 'peak'"),
    (lambda: ReconstructionOptions(index_bounds=(3, 1, 0, 2)), "with min <= max"),
    (lambda: ReconstructionOptions(photons_per_atom=-5), "photons per atom must be a positive number"),
    (lambda: ReferenceImage(4, SHAPE, np.ones((3, 3))), "does not match its frame shape"),
    (lambda: _base(threshold_scope="global"), "unknown threshold scope 'global'"),
])
def test_bad_settings_are_refused_with_a_message(make, match):
    with pytest.raises(CalibrationError, match=match):
        make()


def test_frame_policy_fail_refuses_frames_with_nan_pixels():
    frame = np.full(SHAPE, 100.0)
    frame[48, 48] = np.nan
    rec = Reconstructor(_base(threshold=400.0, frame_policy=FramePolicy(nonfinite="fail")))
    with pytest.raises(FrameError, match=r"NaN or infinite pixel\(s\) under the lattice"):
        rec(frame)
    flagged = Reconstructor(_base(threshold=400.0))(frame)  # default: flag the sites
    assert flagged.n_atoms == 0 and flagged.flags.any()


def test_frame_policy_fail_refuses_saturated_frames():
    frame = np.full(SHAPE, 100.0)
    frame[48, 48] = CAMERA.saturation
    rec = Reconstructor(_base(threshold=400.0, frame_policy=FramePolicy(saturated="fail")))
    with pytest.raises(FrameError, match=r"saturated pixel\(s\) under the lattice"):
        rec(frame)


# --- the session: a calibration differing only in a typed setting is a change -----------------

@pytest.fixture(scope="module")
def frames():
    from latticeread.core.simulate import simulate_frames

    stack, _ = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA, region=("disk", 9),
                               filling=0.4, photons_per_atom=800.0, n_shots=2, rng=7)
    return stack


@pytest.mark.parametrize("change", [
    {"options": ReconstructionOptions(index_bounds=(-5, 5, -5, 5))},
    {"options": ReconstructionOptions(photons_per_atom=700.0)},
    {"frame_policy": FramePolicy(nonfinite="fail")},
])
def test_session_treats_a_changed_setting_as_a_new_calibration(frames, change):
    from latticeread.session import Session

    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(_base(), record=False)
    s.reconstruct()
    before = s.amplitudes(0).copy()
    generation = s.generation
    s.set_calibration(_base(**change))
    assert s.calibration == _base(**change)  # stored
    assert s.can_undo  # an undo step
    assert s.generation != generation and s.amplitudes(0) is None  # old amplitudes dropped
    s.reconstruct()
    if "options" in change and change["options"].index_bounds is not None:
        assert s.amplitudes(0).size != before.size  # recomputed with the new site set
    s.undo()
    assert s.calibration == _base()
