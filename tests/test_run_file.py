"""The resumable HDF5 run file (latticeread.io.run_file).

The records here are small hand-made arrays: the file layer must store whatever the
pipeline produces bit for bit, whatever the numbers are. The reference for "stored
exactly" is h5py/HDF5 itself (chunked, resizable datasets round-trip exactly; common
practice, no source).
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest

from latticeread import __version__
from latticeread.errors import ExportError, FrameFileError
from latticeread.io.run_file import RUN_FORMAT, RUN_FORMAT_VERSION, RunWriter, ShotKey, ShotRecord, read_run

CAL = json.dumps({"format": "latticeread-calibration", "geometry": {"a1": [4.0, 0.0], "a2": [0.0, 4.0]},
                  "frame_shape": [64, 64], "notes": {"made": "today"}})


def _record(i: int, *, shape=(3, 4), source="/data/shot.tif", file_hash="ab" * 16, rng=None) -> ShotRecord:
    rng = np.random.default_rng(i if rng is None else rng)
    occ = rng.integers(0, 2, size=shape).astype(np.uint8)
    occ[0, 0] = 255  # one site outside the region
    amp = rng.normal(500.0, 300.0, size=shape)
    amp[0, 0] = np.nan
    return ShotRecord(
        key=ShotKey(source, file_hash, i), occupation=occ, amplitude=amp,
        p_occupied=rng.random(shape), x=rng.random(shape) * 64, y=rng.random(shape) * 64,
        flags=rng.integers(0, 64, size=shape).astype(np.uint8),
        offset=(1.25 + i, 2.5), a1=(4.0, 0.0), a2=(0.0, 4.0), threshold=250.0 + i,
        peak_to_background=12.0, lattice_residual=0.01, warnings=("few atoms", "poor fit") if i == 1 else (),
        false_positive_rate=1e-3 * i, false_negative_rate=2e-3, light_outside=0.01 * i, model_residual=1.1,
        light_explained=0.97)


def test_round_trip_is_exact(tmp_path):
    path = tmp_path / "run.h5"
    recs = [_record(i) for i in range(3)]
    with RunWriter(path, calibration_json=CAL, metadata={"inputs": ["a", "b"]}) as w:
        for r in recs:
            assert w.append(r)
    run = read_run(path)
    assert len(run) == 3
    for name in ("occupation", "amplitude", "p_occupied", "x", "y", "flags"):
        want = np.stack([getattr(r, name) for r in recs])
        got = getattr(run, name)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)  # NaN == NaN here, bit-exact values
    assert run.keys == [r.key for r in recs]
    np.testing.assert_array_equal(run.offset, [r.offset for r in recs])
    np.testing.assert_array_equal(run.threshold, [250.0, 251.0, 252.0])
    np.testing.assert_array_equal(run.false_positive_rate, [0.0, 1e-3, 2e-3])
    np.testing.assert_array_equal(run.false_negative_rate, [2e-3] * 3)
    assert run.warnings == ((), ("few atoms", "poor fit"), ())
    # n_sites / n_occupied / filling computed from the matrix, 255 = outside.
    assert run.n_sites[0] == 11
    assert run.n_occupied[0] == np.count_nonzero(recs[0].occupation == 1)
    assert run.filling[0] == pytest.approx(run.n_occupied[0] / 11)
    assert run.calibration == json.loads(CAL)
    assert run.program_version == __version__
    assert run.metadata == {"inputs": ["a", "b"]}
    assert len(run.failures) == 0
    table = run.shot_table()
    assert set(table) >= {"source", "frame_index", "filling", "offset_x", "threshold"}
    with h5py.File(path) as f:
        assert f.attrs["format"] == RUN_FORMAT
        assert f["occupation"].fillvalue == 255


def test_same_key_is_never_written_twice(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        assert w.append(_record(0))
        assert not w.append(_record(0))
    assert len(read_run(path)) == 1


def test_resume_keeps_shots_and_continues(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(0))
        w.append(_record(1))
    # The same calibration written with other spacing, key order and program version resumes.
    cal2 = json.dumps({**dict(reversed(list(json.loads(CAL).items()))), "program_version": "9.9"}, indent=3)
    with RunWriter(path, calibration_json=cal2) as w:
        assert w.done == {_record(0).key, _record(1).key}
        assert not w.append(_record(1))
        assert w.append(_record(2))
    run = read_run(path)
    np.testing.assert_array_equal(run.frame_index, [0, 1, 2])
    np.testing.assert_array_equal(run.occupation[2], _record(2).occupation)


def test_half_written_rows_are_ignored_and_overwritten(tmp_path):
    """An interruption after the data rows but before the commit counter leaves extra rows."""
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(0))
    with h5py.File(path, "r+") as f:  # imitate a kill in the middle of append()
        f["occupation"].resize(2, axis=0)
        f["occupation"][1] = 7
        f["frames/source"].resize(2, axis=0)
    assert len(read_run(path)) == 1
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(5))
    run = read_run(path)
    np.testing.assert_array_equal(run.frame_index, [0, 5])
    np.testing.assert_array_equal(run.occupation[1], _record(5).occupation)


def test_failures_are_recorded_once_and_resolved(tmp_path):
    path = tmp_path / "run.h5"
    bad = ShotKey("/data/bad.tif", "cd" * 16, -1)
    with RunWriter(path, calibration_json=CAL) as w:
        w.record_failure(bad, error="FrameFileError", reason="truncated")
        w.record_failure(bad, error="FrameFileError", reason="truncated again")
        w.record_failure(_record(3).key, error="LatticeNotFound", reason="no lattice")
    with RunWriter(path, calibration_json=CAL) as w:
        assert w.failed == {bad, _record(3).key}
        w.append(_record(3))  # a retry that now succeeds
        assert w.failed == {bad}
    run = read_run(path)
    f = run.failures
    assert len(f) == 2
    assert list(f.reason) == ["truncated again", "no lattice"]
    assert list(f.frame_index) == [-1, 3]
    assert list(f.resolved) == [False, True]


def test_new_version_of_a_failed_file_resolves_its_failure(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.record_failure(ShotKey("/data/shot.tif", "00" * 16, -1), error="FrameFileError", reason="truncated")
        w.record_failure(ShotKey("/data/other.tif", "00" * 16, -1), error="FrameFileError", reason="truncated")
        w.append(_record(0, source="/data/shot.tif", file_hash="11" * 16))
        assert w.failed == {ShotKey("/data/other.tif", "00" * 16, -1)}
    assert list(read_run(path).failures.resolved) == [True, False]


def test_resume_with_other_calibration_is_refused(tmp_path):
    path = tmp_path / "run.h5"
    RunWriter(path, calibration_json=CAL).close()
    for other in ({**json.loads(CAL), "frame_shape": [128, 128]},
                  {**json.loads(CAL), "notes": {"index_bounds": [0, 9, 0, 9]}}):  # notes steer the pipeline
        with pytest.raises(ExportError, match="different calibration"):
            RunWriter(path, calibration_json=json.dumps(other))


def test_existing_non_run_file_is_left_alone(tmp_path):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f["data"] = np.arange(3)
    with pytest.raises(ExportError, match="not a latticeread run file"):
        RunWriter(path, calibration_json=CAL)
    with h5py.File(path) as f:
        np.testing.assert_array_equal(f["data"][:], np.arange(3))


def test_existing_non_hdf5_file_is_left_alone(tmp_path):
    path = tmp_path / "notes.h5"
    path.write_text("not hdf5")
    with pytest.raises(ExportError, match="cannot be opened as a run file"):
        RunWriter(path, calibration_json=CAL)
    assert path.read_text() == "not hdf5"


def test_missing_folder(tmp_path):
    with pytest.raises(ExportError, match="does not exist"):
        RunWriter(tmp_path / "nope" / "run.h5", calibration_json=CAL)


def test_unwritable_folder_leaves_nothing(tmp_path):
    # /proc refuses new files even for root, unlike a chmod'ed folder.
    with pytest.raises(ExportError, match="not writable"):
        RunWriter("/proc/run.h5", calibration_json=CAL)


def test_matrix_shape_change_is_refused(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(0))
        with pytest.raises(ExportError, match="one calibration"):
            w.append(_record(1, shape=(5, 5)))
    assert len(read_run(path)) == 1


def test_read_run_missing_file(tmp_path):
    with pytest.raises(FrameFileError, match="does not exist"):
        read_run(tmp_path / "none.h5")


def test_read_run_not_hdf5(tmp_path):
    (tmp_path / "x.h5").write_bytes(b"\x00" * 100)
    with pytest.raises(FrameFileError, match="cannot be opened"):
        read_run(tmp_path / "x.h5")


def test_read_run_other_hdf5(tmp_path):
    with h5py.File(tmp_path / "y.h5", "w") as f:
        f["a"] = 1
    with pytest.raises(FrameFileError, match="not a latticeread run file"):
        read_run(tmp_path / "y.h5")


def test_empty_run_reads_as_zero_shots(tmp_path):
    path = tmp_path / "run.h5"
    RunWriter(path, calibration_json=CAL).close()
    run = read_run(path)
    assert len(run) == 0 and run.occupation.shape[0] == 0


def test_reader_is_exported_from_the_io_package():
    import latticeread.io

    assert latticeread.io.read_run is read_run


def test_read_only_some_matrices(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(0))
    run = read_run(path, matrices=("occupation",))
    np.testing.assert_array_equal(run.occupation[0], _record(0).occupation)
    assert run.amplitude is None and run.flags is None
    assert read_run(path, matrices=False).occupation is None


def test_read_unknown_matrix(tmp_path):
    path = tmp_path / "run.h5"
    RunWriter(path, calibration_json=CAL).close()
    with pytest.raises(ValueError, match="unknown run-file matrices"):
        read_run(path, matrices=("occupancy",))


def test_append_many_writes_a_block_once(tmp_path):
    path = tmp_path / "run.h5"
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(_record(0))
        assert w.append_many([_record(1), _record(0), _record(2), _record(1)]) == 2  # 0 done, 1 repeated
        with pytest.raises(ExportError, match="one calibration"):
            w.append_many([_record(3), _record(4, shape=(5, 5))])  # nothing of a bad block is written
    run = read_run(path)
    assert run.frame_index.tolist() == [0, 1, 2]
    np.testing.assert_array_equal(run.amplitude[2], _record(2).amplitude)


def test_read_results_gives_plain_arrays_and_a_settings_dict(tmp_path):
    from latticeread.io import read_results

    path = tmp_path / "run.h5"
    recs = [_record(i) for i in range(3)]
    with RunWriter(path, calibration_json=CAL, metadata={"command": "batch"}) as w:
        w.append_many(recs)
        w.record_failure(ShotKey("/data/bad.tif", "", -1), error="FrameFileError", reason="truncated")
    arrays, settings = read_results(path)
    assert all(isinstance(v, np.ndarray) for v in arrays.values())
    np.testing.assert_array_equal(arrays["occupation"], np.stack([r.occupation for r in recs]))
    np.testing.assert_array_equal(arrays["amplitude"], np.stack([r.amplitude for r in recs]))
    assert arrays["source"].tolist() == ["/data/shot.tif"] * 3 and arrays["frame_index"].tolist() == [0, 1, 2]
    assert arrays["warnings"].tolist() == ["", "few atoms\npoor fit", ""]
    assert arrays["failure_reason"].tolist() == ["truncated"] and arrays["failure_frame_index"].tolist() == [-1]
    assert settings["calibration"] == json.loads(CAL) and settings["metadata"] == {"command": "batch"}
    assert (settings["n_frames"], settings["n_failures"], settings["format_version"]) == (3, 1, RUN_FORMAT_VERSION)
    table, _ = read_results(path, matrices=False)
    assert "occupation" not in table and table["threshold"].tolist() == [250.0, 251.0, 252.0]


def test_read_results_refuses_other_files(tmp_path):
    from latticeread.io import read_results

    with h5py.File(tmp_path / "y.h5", "w") as f:
        f["a"] = 1
    with pytest.raises(FrameFileError, match="not a latticeread results file"):
        read_results(tmp_path / "y.h5")


def test_long_and_undecodable_text_round_trips_or_is_marked_cut(tmp_path):
    path = tmp_path / "run.h5"
    odd = "/data/" + "\udcff" + "odd.tif"  # a file name that is not UTF-8, as os.fsdecode gives it
    long_warning = "w" * 5000
    rec = _record(0)
    rec = ShotRecord(**{**rec.__dict__, "key": ShotKey(odd, "ab" * 16, 0), "warnings": (long_warning,)})
    with RunWriter(path, calibration_json=CAL) as w:
        w.append(rec)
    run = read_run(path)
    assert run.source.tolist() == [odd]
    (warning,) = run.warnings[0]
    assert warning.endswith(" [cut]") and len(warning.encode()) <= 4096


def test_version_1_file_is_read_and_converted_on_resume(tmp_path):
    """A run file of the earlier layout (counters in attributes, variable-length strings)."""
    path = tmp_path / "old.h5"
    rec = _record(0)
    text = h5py.string_dtype("utf-8")
    with h5py.File(path, "w") as f:
        f.attrs.update(format=RUN_FORMAT, format_version=1, program_version="0.0", calibration=CAL, created="x",
                       metadata="{}", n_shots=1, n_failures=0)
        s = f.create_group("shots")
        for name, value in (("source", [rec.key.source]), ("file_hash", [rec.key.file_hash]), ("warnings", [""])):
            s.create_dataset(name, data=value, dtype=text, maxshape=(None,))
        s["frame_index"] = [0]
        for name in ("offset", "a1", "a2"):
            s[name] = [getattr(rec, name)]
        for name in ("threshold", "false_positive_rate", "false_negative_rate", "filling", "peak_to_background",
                     "lattice_residual", "written_at"):
            s[name] = [float(getattr(rec, name, 0.0))]
        s["n_sites"], s["n_occupied"] = [rec.n_sites], [rec.n_occupied]
        g = f.create_group("failures")
        for name in ("source", "file_hash", "error", "reason"):
            g.create_dataset(name, shape=(0,), dtype=text, maxshape=(None,))
        g.create_dataset("frame_index", shape=(0,), dtype=np.int64, maxshape=(None,))
        g.create_dataset("resolved", shape=(0,), dtype=bool, maxshape=(None,))
        g.create_dataset("written_at", shape=(0,), dtype=float, maxshape=(None,))
        for name in ("occupation", "amplitude", "p_occupied", "x", "y", "flags"):
            f[name] = getattr(rec, name)[None]
    assert read_run(path).keys == [rec.key]
    with RunWriter(path, calibration_json=CAL) as w:
        assert w.done == {rec.key}
        w.append(_record(1))
    run = read_run(path)
    assert run.frame_index.tolist() == [0, 1]
    np.testing.assert_array_equal(run.amplitude[0], rec.amplitude)
    # the rebuilt old row has no image-model checks (NaN), the new one its own numbers
    assert np.isnan(run.light_outside[0]) and run.light_outside[1] == _record(1).light_outside
    with h5py.File(path, "r") as f:
        assert f.attrs["format_version"] == RUN_FORMAT_VERSION
        assert "frames" in f and "shots" not in f  # one row per frame, named so since format 4
