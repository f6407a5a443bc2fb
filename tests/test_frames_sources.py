"""Frames whose pixels come from elsewhere (HDF5 virtual datasets and external links) and load
warnings that must reach the output files. Reference for the HDF5 behaviour: h5py itself (a
virtual dataset whose source is missing reads as its fill value, no error)."""

import json
import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.errors import FrameFileError, LatticeReadWarning
from latticeread.io.frames import load_frames

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


def _virtual(folder: Path, *, keep_source: bool) -> Path:
    frames = np.arange(4 * 8 * 8, dtype=np.uint16).reshape(4, 8, 8)
    with h5py.File(folder / "part.h5", "w") as f:
        f["x"] = frames
    layout = h5py.VirtualLayout(shape=(4, 8, 8), dtype=np.uint16)
    layout[:] = h5py.VirtualSource("part.h5", "x", shape=(4, 8, 8))
    with h5py.File(folder / "all.h5", "w") as f:
        f.create_virtual_dataset("frames", layout, fillvalue=0)
    if not keep_source:
        (folder / "part.h5").unlink()
    return folder / "all.h5"


def test_virtual_dataset_with_its_source_reads_normally(tmp_path):
    with load_frames(_virtual(tmp_path, keep_source=True)) as stack:
        assert stack.shape == (4, 8, 8) and int(stack[3].max()) == 255


def test_virtual_dataset_whose_source_file_is_missing_is_an_error(tmp_path):
    path = _virtual(tmp_path, keep_source=False)
    with h5py.File(path, "r") as f:  # what would happen without the check: blank frames
        assert int(f["frames"][0].max()) == 0
    with pytest.raises(FrameFileError, match=r"dataset /frames of all\.h5 takes its pixels from other files that are "
                                             r"missing \(part\.h5\); HDF5 would read those frames as blank"):
        load_frames(path)


def test_external_link_to_a_file_that_is_not_hdf5_is_a_clear_error(tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("not frames")
    with h5py.File(tmp_path / "linked.h5", "w") as f:
        f["frames"] = h5py.ExternalLink("notes.txt", "/x")
        f["other"] = np.zeros((2, 8, 8), np.uint16)
    with pytest.raises(FrameFileError, match=r"'frames' in linked\.h5 cannot be opened: it is a link to '/x' in the "
                                             r"file notes\.txt, which is missing or not an HDF5 file"):
        load_frames(tmp_path / "linked.h5", dataset="frames")
    shutil.copy(SAMPLE / "demo_folded.calibration.json", tmp_path / "cal.json")
    code = main(["reconstruct", str(tmp_path / "linked.h5"), "--dataset", "frames", "-c", str(tmp_path / "cal.json"),
                 "-o", str(tmp_path / "s.csv"), "-q"])
    err = capsys.readouterr().err
    assert code == 3 and "link to '/x' in the file notes.txt" in err and "internal error" not in err


def test_load_warnings_are_collected_once_per_problem(tmp_path):
    frames = np.random.default_rng(1).integers(100, 200, size=(3, 16, 16), dtype=np.uint16)
    frames[1] = 150
    tifffile.imwrite(tmp_path / "f.tif", frames, photometric="minisblack")
    with load_frames(tmp_path / "f.tif") as stack:
        with pytest.warns(LatticeReadWarning, match="frame 1 of f.tif is constant"):
            stack[1]
            stack[1]
        stack[0]
        assert stack.warnings == ["frame 1 of f.tif is constant (every pixel = 150): was the camera triggered?"]


@pytest.fixture()
def stack_with_a_constant_frame(tmp_path):
    frames = tifffile.imread(SAMPLE / "demo_folded.tif")[:2].copy()
    frames[1] = 300
    tifffile.imwrite(tmp_path / "f.tif", frames, photometric="minisblack")
    shutil.copy(SAMPLE / "demo_folded.calibration.json", tmp_path / "cal.json")
    return tmp_path


def test_reconstruct_stores_load_warnings_beside_the_table(stack_with_a_constant_frame):
    d = stack_with_a_constant_frame
    with pytest.warns(LatticeReadWarning):
        assert main(["reconstruct", str(d / "f.tif"), "-c", str(d / "cal.json"), "-o", str(d / "s.csv"), "-q"]) == 0
    text = (d / "s.csv.json").read_text()
    assert "frame 1 of f.tif is constant" in text
    assert json.loads(text)  # still plain JSON


def test_batch_stores_load_warnings_with_the_shot(stack_with_a_constant_frame):
    from latticeread.io.calibration_file import load_calibration
    from latticeread.io.run_file import ShotKey
    from latticeread.runs.batch import ShotReconstructor, hash_file

    d = stack_with_a_constant_frame
    rec = ShotReconstructor(load_calibration(d / "cal.json"))
    with pytest.warns(LatticeReadWarning):
        record = rec(ShotKey(str(d / "f.tif"), hash_file(d / "f.tif"), 1))
    good = rec(ShotKey(str(d / "f.tif"), hash_file(d / "f.tif"), 0))
    rec.close()
    assert any("frame 1 of f.tif is constant" in w for w in record.warnings)
    assert not any("constant" in w for w in good.warnings)


def test_batch_never_suggests_an_option_it_lacks(tmp_path, capsys):
    with h5py.File(tmp_path / "two.h5", "w") as f:
        f["a"] = np.zeros((2, 8, 8), np.uint16)
        f["b"] = np.zeros((2, 8, 8), np.uint16)
    shutil.copy(SAMPLE / "demo_folded.calibration.json", tmp_path / "cal.json")
    code = main(["batch", str(tmp_path / "two.h5"), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "r.h5"),
                 "--workers", "0", "-q"])
    out = capsys.readouterr().out
    assert code == 3
    assert "batch and watch need files holding a single frame dataset" in out


def test_calibrate_stores_load_warnings_in_the_calibration(stack_with_a_constant_frame, capsys):
    d = stack_with_a_constant_frame
    frames = tifffile.imread(SAMPLE / "demo_folded.tif").copy()
    frames[2] = 300
    tifffile.imwrite(d / "f4.tif", frames, photometric="minisblack")
    with pytest.warns(LatticeReadWarning):
        assert main(["calibrate", str(d / "f4.tif"), "-o", str(d / "new.json"), "--psf", "gaussian", "--fwhm", "2.7",
                     "--max-frames", "4"]) == 0
    notes = json.loads((d / "new.json").read_text())["notes"]
    assert any("frame 2 of f4.tif is constant" in w for w in notes["warnings"])
    assert "warning: frame 2 of f4.tif is constant" in capsys.readouterr().out
