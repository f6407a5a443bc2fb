"""Damaged session files are refused with a message naming the entry, never a raw Python error.

Each case is a session file with one entry of the wrong JSON type or out of range (as a
damaged or hand-edited file has); the reference is our own file layout
(:mod:`latticeread.io.session_file`), no outside source.
"""

from __future__ import annotations

import json

import pytest

from latticeread.errors import CalibrationError, FrameFileError
from latticeread.io.session_file import SESSION_FORMAT, read_session

BASE = {"format": SESSION_FORMAT, "format_version": 2, "frames": {"source": None, "n_frames": 4},
        "current_index": 0, "calibration": None, "settings": {}, "undo": []}


@pytest.mark.parametrize("change, error, message", [
    ({"frames": [1]}, FrameFileError, r"'frames' must be an object, not list"),
    ({"frames": {"source": 5}}, FrameFileError, r"'frames\.source' must be text, not int"),
    ({"current_index": "a"}, FrameFileError, r"'current_index' must be a frame number \(0 or more\), not 'a'"),
    ({"current_index": -5}, FrameFileError, r"'current_index' must be a frame number"),
    ({"calibration_origin": "x"}, FrameFileError, r"'calibration_origin' must be an object, not str"),
    ({"settings": [1]}, FrameFileError, r"'settings' must be an object, not list"),
    ({"undo": "x"}, FrameFileError, r"'undo' must be a list, not str"),
    ({"fidelity": "x"}, FrameFileError, r"'fidelity' must be an object, not str"),
    ({"calibration": {"threshold": -1e9}}, CalibrationError, r"calibration: threshold is -1000000000\.0 photons"),
    ({"calibration": {"psf": {"radius": "big"}}}, CalibrationError, r"stored calibration is malformed"),
])
def test_a_wrong_entry_is_named(tmp_path, change, error, message):
    path = tmp_path / "s.json"
    path.write_text(json.dumps({**BASE, **change}))
    with pytest.raises(error, match=message):
        read_session(path)


def test_deeply_nested_json_is_a_damaged_file_not_a_recursion_error(tmp_path):
    path = tmp_path / "s.json"
    path.write_text("[" * 100000 + "]" * 100000)
    with pytest.raises(FrameFileError, match="nested too deeply"):
        read_session(path)


def test_a_well_formed_file_still_reads(tmp_path):
    path = tmp_path / "s.json"
    path.write_text(json.dumps(BASE))
    assert read_session(path).n_frames == 4
