"""Every broken input of the I/O corpus, fed to the window: a clear message, no crash, no
file written, and the window opens good data afterwards.

The corpus is made here: a truncated TIFF, a TIFF whose header promises more pages than it
holds, a zero-byte file, a PNG named .tif, an HDF5 file without frames, NaN / inf frames,
1-D and 4-D arrays, and calibration JSON with a missing key or a wrong type.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile

pytest.importorskip("pytestqt")

from latticeread.gui.app import make_app  # noqa: E402
from latticeread.gui.main_window import MainWindow  # noqa: E402
from latticeread.gui.settings import AppSettings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def _frames(n=3, h=32, w=32):
    return np.random.default_rng(0).integers(100, 400, size=(n, h, w), dtype=np.uint16)


def _truncated_tiff(folder: Path) -> Path:
    path = folder / "truncated.tif"
    tifffile.imwrite(path, _frames(), photometric="minisblack")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path


def _zero_bytes(folder: Path) -> Path:
    path = folder / "empty.tif"
    path.write_bytes(b"")
    return path


def _png_named_tif(folder: Path) -> Path:
    path = folder / "picture.tif"
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 64)
    return path


def _hdf5_without_frames(folder: Path) -> Path:
    path = folder / "nothing.h5"
    with h5py.File(path, "w") as h5:
        h5.attrs["note"] = "no datasets"
    return path


def _npy(folder: Path, name: str, array) -> Path:
    path = folder / name
    np.save(path, array)
    return path


def _calibration(folder: Path, change) -> Path:
    data = json.loads((ROOT / "sample_data" / "demo_square.calibration.json").read_text())
    change(data)
    path = folder / "bad.calibration.json"
    path.write_text(json.dumps(data))
    return path


CORPUS = {
    "truncated TIFF": (_truncated_tiff, None),
    "zero-byte file": (_zero_bytes, None),
    "PNG named .tif": (_png_named_tif, None),
    "HDF5 without frames": (_hdf5_without_frames, None),
    "NaN frame": (lambda d: _npy(d, "nan.npy", np.full((2, 32, 32), np.nan)), None),
    "inf frame": (lambda d: _npy(d, "inf.npy", np.where(np.eye(32, dtype=bool), np.inf, 1.0)[None]), None),
    "1-D array": (lambda d: _npy(d, "line.npy", np.arange(100.0)), None),
    "4-D array": (lambda d: _npy(d, "hyper.npy", np.zeros((2, 2, 16, 16))), None),
    "calibration missing a key": (lambda d: _calibration(d, lambda c: c.pop("psf")), "psf"),
    "calibration with a wrong type": (lambda d: _calibration(d, lambda c: c["camera"].update(em_gain="high")),
                                      "em_gain"),
}


#: files whose problem is inside a frame: found when the frame is read, not when the file opens
LAZY = {"NaN frame", "inf frame"}


@pytest.fixture()
def window(qtbot, tmp_path):
    make_app()
    w = MainWindow(settings=AppSettings(tmp_path / "settings.ini"), synchronous=True, offer_restore=False,
                   autosave_interval_s=0)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


@pytest.mark.parametrize("name", list(CORPUS))
def test_broken_input_gives_a_message_and_the_window_stays_usable(window, tmp_path, name):
    folder = tmp_path / "data"
    folder.mkdir()
    make, expected_word = CORPUS[name]
    if expected_word is not None:  # calibrations need frames of the right size first
        assert window.open_path(ROOT / "sample_data" / "demo_triangular.tif")
    bad = make(folder)
    before = sorted(os.listdir(folder))
    opened = window.open_path(bad)
    window.flush()
    if name in LAZY:
        # frames are read lazily: the file opens, and the bad frame is named as soon as it is shown
        # NaN pixels are kept (they flag their sites); a frame with no finite pixel is named as such
        assert any(w in window.status_label.text() for w in ("non-finite pixel", "no finite pixel", "is constant"))
        window.calibrate()
        window.flush()
    else:
        assert opened is False
    message = window.last_error or ""
    assert message, f"no message for {name}"
    assert "This is a bug" not in message, f"{name} was not caught as a known problem: {message}"
    assert bad.name in message or (expected_word is not None and expected_word in message) \
        or "frame" in message.lower(), message
    assert sorted(os.listdir(folder)) == before, "a file was written next to the broken input"
    # still usable: good data opens, with its calibration
    assert window.open_path(ROOT / "sample_data" / "demo_folded.tif")
    assert window.session.n_frames == 4
    assert window.session.calibration is not None
