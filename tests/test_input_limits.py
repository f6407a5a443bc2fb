"""Input bombs and calibration values outside physical ranges are refused before allocation."""

import json
import shutil
import struct
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.cli import main
from latticeread.errors import CalibrationError, FrameFileError
from latticeread.io import limits
from latticeread.io.calibration_file import calibration_from_json, load_calibration
from latticeread.io.frames import load_frames

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"
GIB = 1 << 30


def _tiff_bomb(path: Path, side: int) -> Path:
    """A zlib TIFF of a few hundred bytes whose header declares side x side uint16 pixels."""
    tifffile.imwrite(path, np.zeros((64, 64), np.uint16), compression="zlib", metadata=None)
    raw = bytearray(path.read_bytes())
    with tifffile.TiffFile(path) as tif:
        tags = tif.pages[0].tags
        for name in ("ImageWidth", "ImageLength", "RowsPerStrip"):
            assert tags[name].dtype == 4  # LONG
            struct.pack_into("<I", raw, tags[name].valueoffset, side)
    path.write_bytes(bytes(raw))
    return path


@pytest.fixture()
def eight_gib(monkeypatch):
    monkeypatch.setattr(limits, "available_memory", lambda: 8 * GIB)


def test_tiny_tiff_declaring_huge_frames_is_refused_before_decoding(tmp_path, eight_gib):
    bomb = _tiff_bomb(tmp_path / "bomb.tif", 60000)
    assert bomb.stat().st_size < 400
    with pytest.raises(FrameFileError, match=r"bomb\.tif declares 60000x60000-pixel frame: analysing it would need "
                                             r"about 160\.9 GiB of memory but only 8\.0 GiB is available"):
        load_frames(bomb)


def test_frames_that_fit_are_read_as_before(tmp_path, eight_gib):
    frames = np.arange(3 * 40 * 50, dtype=np.uint16).reshape(3, 40, 50)
    tifffile.imwrite(tmp_path / "ok.tif", frames, compression="zlib", photometric="minisblack")
    with load_frames(tmp_path / "ok.tif", validate=False) as stack:
        np.testing.assert_array_equal(stack.read_all(), frames)


def test_reading_a_whole_stack_checks_the_total(tmp_path, monkeypatch):
    frames = np.zeros((20, 64, 64), np.uint16)
    tifffile.imwrite(tmp_path / "stack.tif", frames)
    # enough for one frame at work (64*64*48 B = 192 KiB) but not for 20 frames held twice
    monkeypatch.setattr(limits, "available_memory", lambda: 400_000)
    with load_frames(tmp_path / "stack.tif", validate=False) as stack:
        assert stack[0].shape == (64, 64)
        with pytest.raises(FrameFileError, match=r"declares 20 64x64-pixel frames: analysing them"):
            stack.read_all()


def test_npz_array_size_is_checked_before_decompressing(tmp_path, eight_gib, monkeypatch):
    np.savez_compressed(tmp_path / "f.npz", frames=np.zeros((5, 64, 64), np.uint16))
    monkeypatch.setattr(limits, "available_memory", lambda: 50_000)
    with pytest.raises(FrameFileError, match=r"array frames of f\.npz declares 5 64x64-pixel frames"):
        load_frames(tmp_path / "f.npz")


def test_calibrate_on_a_bomb_is_an_input_error_not_an_internal_error(tmp_path, capsys, eight_gib):
    bomb = _tiff_bomb(tmp_path / "bomb.tif", 60000)
    assert main(["calibrate", str(bomb), "-o", str(tmp_path / "cal.json")]) == 3
    err = capsys.readouterr().err
    assert "would need about" in err and "internal error" not in err
    assert not (tmp_path / "cal.json").exists()


def test_batch_records_a_bomb_as_a_failed_file_without_decoding_it(tmp_path, capsys, eight_gib):
    data = tmp_path / "data"
    data.mkdir()
    _tiff_bomb(data / "bomb.tif", 20000)
    shutil.copy(SAMPLE / "demo_folded.calibration.json", tmp_path / "cal.json")
    code = main(["batch", str(data), "-c", str(tmp_path / "cal.json"), "-o", str(tmp_path / "run.h5"),
                 "--workers", "0", "-q"])
    assert code == 3
    assert "would need about" in capsys.readouterr().out


# --- calibration values ----------------------------------------------------------------------

def _calibration(**changes) -> str:
    data = json.loads((SAMPLE / "demo_folded.calibration.json").read_text())
    for key, value in changes.items():
        parent, _, name = key.rpartition("__")
        (data[parent] if parent else data)[name] = value
    return json.dumps(data)


def test_the_sample_calibrations_are_inside_every_range():
    for path in SAMPLE.glob("*.calibration.json"):
        load_calibration(path)


@pytest.mark.parametrize("changes, message", [
    ({"geometry__a1": [0.3, 0.0]}, r"geometry\.a1 is 0\.3 pixels long; a lattice spacing must be between 2 pixels"),
    ({"geometry__a2": [9000.0, 0.0]}, r"geometry\.a2 is 9000 pixels long.*frame size \(256 pixels\)"),
    ({"geometry__a2": [6.29, 6.99]}, r"geometry\.a1 and geometry\.a2 are \(nearly\) parallel"),
    ({"psf__radius": 100000}, r"psf\.radius is 100000 pixels; the PSF kernel half-width must be between 1 and 200"),
    ({"psf__supersample": 0}, r"psf\.supersample is 0; the PSF is sampled 1 to 32 times per pixel"),
    ({"psf__supersample": 100000}, r"psf\.supersample is 100000"),
    ({"psf__radius": 200, "psf__supersample": 32}, r"asks for a kernel of 1\.64e\+08 samples"),
    ({"psf__fwhm": -1.0}, r"psf\.fwhm is -1\.0 pixels; it must be above 0"),
    ({"threshold": -1e9}, r"threshold is -1000000000\.0 photons; it must be a finite number between 0 and 1e\+07"),
    ({"threshold": "Infinity"}, r"threshold is inf photons"),
    ({"pixel_size_nm": 0.0}, r"pixel_size_nm is 0\.0; the camera pixel in the atom plane must be between 1"),
    ({"frame_shape": [0, 256]}, r"frame_shape 0x256 pixels is outside 1\.\.65535"),
])
def test_calibration_values_outside_physical_ranges_are_refused(changes, message):
    with pytest.raises(CalibrationError, match=message):
        calibration_from_json(_calibration(**changes), where="cal.json")


def test_deeply_nested_calibration_json_is_a_calibration_error():
    text = '{"notes": ' + "[" * 100000 + "]" * 100000 + "}"
    with pytest.raises(CalibrationError, match="nested too deeply"):
        calibration_from_json(text, where="cal.json")


def test_bad_calibration_values_exit_5_on_the_command_line(tmp_path, capsys):
    (tmp_path / "cal.json").write_text(_calibration(psf__supersample=0))
    shutil.copy(SAMPLE / "demo_folded.tif", tmp_path / "f.tif")
    assert main(["reconstruct", str(tmp_path / "f.tif"), "-c", str(tmp_path / "cal.json"),
                 "-o", str(tmp_path / "s.csv"), "-q"]) == 5
    assert "psf.supersample is 0" in capsys.readouterr().err


@pytest.mark.parametrize("value", ["-1e9", "nan", "inf", "2e7"])
def test_a_threshold_outside_the_range_is_a_usage_error(tmp_path, capsys, value):
    with pytest.raises(SystemExit) as exc:
        main(["reconstruct", str(tmp_path / "f.tif"), "-o", str(tmp_path / "s.csv"), f"--threshold={value}"])
    assert exc.value.code == 2
    assert "must be a finite number between 0 and 1e+07" in capsys.readouterr().err
