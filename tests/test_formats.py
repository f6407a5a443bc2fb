"""The shared format/version check of latticeread files."""

import pytest

from latticeread.errors import CalibrationError
from latticeread.io.formats import check_format_version

KW = dict(expected_format="latticeread-session", versions=[1, 2], where="s.json")


def test_known_versions_pass():
    assert check_format_version("latticeread-session", 2, **KW) == 2
    assert check_format_version(b"latticeread-session", b"1", **KW) == 1
    assert check_format_version("latticeread-session", None, default_version=1, **KW) == 1


def test_another_kind_of_file_is_refused():
    with pytest.raises(ValueError, match=r"s\.json is not a latticeread-session file \(its format stamp is 'other'\)"):
        check_format_version("other", 1, **KW)


def test_a_newer_version_is_refused_with_a_hint_to_update():
    with pytest.raises(CalibrationError, match=r"format_version 99, which this program does not know; it was "
                                               r"written by a newer latticeread"):
        check_format_version("latticeread-session", 99, error=CalibrationError, **KW)


def test_an_older_unknown_version_names_the_known_ones():
    with pytest.raises(ValueError, match=r"format_version 0, .* reads only versions 1, 2"):
        check_format_version("latticeread-session", 0, **KW)


@pytest.mark.parametrize("bad", [1.5, "one", True, None, [1]])
def test_a_version_that_is_not_a_whole_number_is_refused(bad):
    with pytest.raises(ValueError, match=r"expected a whole number \(1, 2\)"):
        check_format_version("latticeread-session", bad, **KW)


def test_readers_refuse_an_unknown_format_version(tmp_path):
    import json

    import h5py

    from latticeread.errors import FrameFileError
    from latticeread.io.run_file import read_run
    from latticeread.session import Session

    with h5py.File(tmp_path / "run.h5", "w") as f:
        f.attrs["format"] = "latticeread-run"
        f.attrs["format_version"] = 99
    with pytest.raises(FrameFileError, match=r"run file .*run\.h5 has format_version 99, which this program does not"):
        read_run(tmp_path / "run.h5")
    (tmp_path / "s.json").write_text(json.dumps({"format": "latticeread-session", "format_version": 99}))
    with pytest.raises(FrameFileError, match=r"session file s\.json has format_version 99"):
        Session.open(tmp_path / "s.json")


def test_occupation_file_with_an_unknown_version_is_refused(tmp_path):
    import h5py
    import numpy as np

    from latticeread.errors import FrameFileError
    from latticeread.io.export import _MATRIX_DATASETS, read_occupation_hdf5

    with h5py.File(tmp_path / "occ.h5", "w") as f:
        for name in [*_MATRIX_DATASETS, "frame_index", "offset", "threshold", "warnings"]:
            f[name] = np.zeros(1)
        f.attrs["format"] = "latticeread-occupation"
        f.attrs["format_version"] = 7
    with pytest.raises(FrameFileError, match=r"occ\.h5 has format_version 7"):
        read_occupation_hdf5(tmp_path / "occ.h5")


@pytest.mark.parametrize("version", [0, -3, 1.5])
def test_calibration_with_an_impossible_format_version_is_refused(version):
    import json
    from pathlib import Path

    from latticeread.io.calibration_file import calibration_from_json

    sample = Path(__file__).resolve().parents[1] / "sample_data" / "demo_folded.calibration.json"
    data = json.loads(sample.read_text())
    data["format_version"] = version
    with pytest.raises(CalibrationError, match=rf"format version {version!r} is not one this program knows "
                                               r"\(whole numbers 1 to \d\)"):
        calibration_from_json(json.dumps(data), where="cal.json")
