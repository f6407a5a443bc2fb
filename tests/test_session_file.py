"""The session file (latticeread.io.session_file): layout, versions, damaged files, and what a
reopened session gets back (calibration origin, fidelity estimate).

Ground truth: frames from the project's forward model (latticeread.core.simulate); a reopened
session must give the same numbers as the one saved (common practice, no source).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from latticeread.core.calibration import Calibration
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf
from latticeread.errors import FrameFileError
from latticeread.io.session_file import SESSION_FORMAT_VERSION, SessionRecord, read_session, write_session
from latticeread.session import Session

GEOMETRY = LatticeGeometry(a1=(0.3, 4.0), a2=(4.0, -0.3), offset=(48.2, 47.7))
PSF = gaussian_psf(fwhm=3.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=0.5, bias=100.0, read_noise=1.0, quantum_efficiency=0.8)
SHAPE = (96, 96)


@pytest.fixture(scope="module")
def frames():
    from latticeread.core.simulate import simulate_frames

    stack, _truth = simulate_frames(geometry=GEOMETRY, frame_shape=SHAPE, psf=PSF, camera=CAMERA,
                                    region=("disk", 9), filling=0.4, photons_per_atom=800.0, n_shots=3,
                                    images_per_shot=2, loss_probability=0.02, rng=11)
    return stack


def _session(frames) -> Session:
    s = Session()
    s.set_frames(frames.copy())
    s.set_calibration(Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE), record=False)
    return s


def test_reopened_session_keeps_its_fidelity_estimate(frames, tmp_path):
    s = _session(frames)
    s.update_settings(images_per_shot=2, bootstrap_resamples=20)
    s.reconstruct()
    s.finish_reconstruction()
    s.compute_fidelity()
    assert s.fidelity is not None
    path = s.save(tmp_path / "with_fidelity.json")
    again = Session.open(path)
    assert again.fidelity is not None, "the reopened session lost its fidelity estimate"
    assert again.fidelity.to_dict() == s.fidelity.to_dict()


def test_calibration_origin_survives_save_and_open(frames, tmp_path):
    s = _session(frames)
    s.set_threshold(300.0)  # an edit of the calibration in use
    assert s.calibration_origin.kind == "set" and s.calibration_origin.edited
    again = Session.open(s.save(tmp_path / "origin.json"))
    assert again.calibration_origin == s.calibration_origin
    assert again.calibration == s.calibration


def test_version_1_files_still_open(frames, tmp_path):
    """A session written before the calibration origin and the fidelity were stored."""
    s = _session(frames)
    s.reconstruct([0])
    path = s.save(tmp_path / "old.json")
    doc = json.loads(path.read_text())
    for key in ("calibration_origin", "fidelity"):
        doc.pop(key)
    doc["format_version"] = 1
    path.write_text(json.dumps(doc))
    again = Session.open(path)
    assert again.calibration == s.calibration
    assert again.calibration_origin.kind == "session"
    np.testing.assert_array_equal(again.amplitudes(0), s.amplitudes(0))


def test_newer_format_is_refused_with_advice(tmp_path):
    path = write_session(tmp_path / "new.json", SessionRecord(settings={}))
    doc = json.loads(path.read_text())
    doc["format_version"] = SESSION_FORMAT_VERSION + 1
    path.write_text(json.dumps(doc))
    with pytest.raises(FrameFileError, match="written by a newer latticeread: update latticeread"):
        read_session(path)


def test_damaged_results_file_is_named(frames, tmp_path):
    s = _session(frames)
    s.reconstruct([0])
    path = s.save(tmp_path / "broken.json")
    path.with_suffix(".h5").write_bytes(b"not an HDF5 file")
    with pytest.raises(FrameFileError, match="results file broken.h5 of this session is damaged"):
        read_session(path)


def test_an_unwritable_record_leaves_no_file(tmp_path):
    record = SessionRecord(settings={"odd": object()})
    with pytest.raises(TypeError, match="cannot store object in a session file"):
        write_session(tmp_path / "odd.json", record)
    assert list(tmp_path.iterdir()) == []


def test_undo_and_redo_restore_where_the_calibration_came_from(frames, tmp_path):
    from latticeread.io import save_calibration

    s = Session()
    s.set_frames(frames.copy())
    path = tmp_path / "lab.calibration.json"
    save_calibration(path, Calibration(geometry=GEOMETRY, psf=PSF, camera=CAMERA, frame_shape=SHAPE))
    s.load_calibration(path)
    assert s.calibration_origin.kind == "file" and not s.calibration_origin.edited
    s.set_threshold(300.0)
    assert s.calibration_origin.edited
    s.undo()
    assert s.calibration_origin.kind == "file" and not s.calibration_origin.edited
    s.redo()
    assert s.calibration_origin.edited
