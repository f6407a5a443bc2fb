"""The shared overwrite policy: never over an input, never over an existing file without force."""

import os

import pytest

from latticeread.errors import ExportError, OutputExistsError, UsageError
from latticeread.io.outputs import check_outputs, check_suffix, same_file


def test_new_outputs_pass_and_come_back_as_paths(tmp_path):
    out = check_outputs([str(tmp_path / "a.csv"), None, tmp_path / "a.csv.json"], force=False)
    assert out == [tmp_path / "a.csv", tmp_path / "a.csv.json"]


def test_an_existing_output_needs_force(tmp_path):
    (tmp_path / "a.csv").write_text("old")
    with pytest.raises(OutputExistsError, match=r"a\.csv already exists; pass --force to replace it"):
        check_outputs([tmp_path / "a.csv"], force=False)
    assert check_outputs([tmp_path / "a.csv"], force=True) == [tmp_path / "a.csv"]
    assert (tmp_path / "a.csv").read_text() == "old"


def test_an_existing_companion_file_needs_force_too(tmp_path):
    (tmp_path / "a.csv.json").write_text("{}")
    with pytest.raises(OutputExistsError, match=r"a\.csv\.json already exists"):
        check_outputs([tmp_path / "a.csv", tmp_path / "a.csv.json"], force=False)


def test_an_input_is_never_an_output_even_with_force(tmp_path):
    cal = tmp_path / "cal.json"
    cal.write_text("{}")
    with pytest.raises(OutputExistsError, match=r"it is the calibration this command reads.*--force never"):
        check_outputs([cal], force=True, inputs={"calibration": cal, "frame file": [tmp_path / "x.tif"]})


def test_a_hard_link_or_another_spelling_of_an_input_is_the_same_file(tmp_path):
    frames = tmp_path / "frames.tif"
    frames.write_bytes(b"II*\x00")
    link = tmp_path / "link.tif"
    os.link(frames, link)
    assert same_file(link, frames)
    assert same_file(tmp_path / "sub" / ".." / "frames.tif", frames)
    assert not same_file(tmp_path / "other.tif", frames)
    with pytest.raises(OutputExistsError, match="it is the input this command reads"):
        check_outputs([link], force=True, inputs=[frames])


def test_an_output_that_is_a_folder_is_refused(tmp_path):
    (tmp_path / "out.h5").mkdir()
    with pytest.raises(OutputExistsError, match="a folder of that name already exists"):
        check_outputs([tmp_path / "out.h5"], force=True)


def test_output_refusals_are_output_problems():
    assert issubclass(OutputExistsError, ExportError) and OutputExistsError.exit_code == 4


def test_unsupported_suffix_is_a_usage_error(tmp_path):
    assert check_suffix(tmp_path / "A.CSV", {".csv": "per-site table"}, what="the output") == ".csv"
    with pytest.raises(UsageError, match=r"the output .*x\.txt must end in one of: \.csv \(per-site table\), \.h5"):
        check_suffix(tmp_path / "x.txt", {".csv": "per-site table", ".h5": "matrices"}, what="the output")
    assert UsageError.exit_code == 2
