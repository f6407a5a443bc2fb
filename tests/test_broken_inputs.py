"""A corpus of broken inputs, made here, each with its own clear error and no partial output.

Outside references: the TIFF 6.0 specification (header "II*\\0", IFD entries of 12 bytes:
tag, type, count, value; tag 257 = ImageLength) is used to forge a file whose header lies
about the image size; files are written with tifffile, h5py and numpy themselves. Every
check is "common practice, no source" beyond that: a clear message naming the file and
the problem, and nothing half-written.
"""

from __future__ import annotations

import errno
import json
import os
import struct
import warnings

import h5py
import numpy as np
import pytest
import tifffile

from latticeread.core.calibration import Calibration
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import gaussian_psf
from latticeread.errors import CalibrationError, ExportError, FrameError, FrameFileError, LatticeReadWarning
from latticeread.io import load_calibration, load_frames, save_calibration, write_occupation_hdf5, write_sites_csv


def frames_u16(n=5, h=16, w=14, seed=1):
    return np.random.default_rng(seed).integers(100, 3000, (n, h, w)).astype(np.uint16)


def good_calibration():
    return Calibration(geometry=LatticeGeometry(a1=(4.0, 0.0), a2=(0.0, 4.0), offset=(2.0, 2.0)),
                       psf=gaussian_psf(fwhm=2.5), frame_shape=(64, 64), threshold=300.0)


# --- damaged files -------------------------------------------------------------------------

@pytest.mark.parametrize("compression", [None, "lzw"])
@pytest.mark.parametrize("keep", [0.5, 0.97])
def test_truncated_tiff(tmp_path, compression, keep):
    path = tmp_path / "run_0042.tif"
    tifffile.imwrite(path, frames_u16(), compression=compression)
    raw = path.read_bytes()
    path.write_bytes(raw[: int(len(raw) * keep)])
    with pytest.raises(FrameFileError, match=r"run_0042\.tif is (damaged|truncated)"):
        with load_frames(path) as frames:
            frames[:]


def test_tiff_with_lying_header(tmp_path):
    """TIFF 6.0: patch tag 257 (ImageLength) of the first IFD to claim twice the rows."""
    path = tmp_path / "run_0042.tif"
    tifffile.imwrite(path, frames_u16(n=1)[0])
    raw = bytearray(path.read_bytes())
    assert raw[:4] == b"II*\x00"
    ifd = struct.unpack_from("<I", raw, 4)[0]
    n_entries = struct.unpack_from("<H", raw, ifd)[0]
    for k in range(n_entries):
        entry = ifd + 2 + 12 * k
        tag, typ = struct.unpack_from("<HH", raw, entry)
        if tag == 257:
            fmt = "<H" if typ == 3 else "<I"
            struct.pack_into(fmt, raw, entry + 8, 32)  # 16 rows really stored
            break
    else:
        pytest.fail("no ImageLength tag found")
    path.write_bytes(bytes(raw))
    with pytest.raises(FrameFileError, match=r"inconsistent header: image 0 is declared as 32x14 pixels"):
        load_frames(path)


def test_zero_byte_file(tmp_path):
    (tmp_path / "run.tif").write_bytes(b"")
    with pytest.raises(FrameFileError, match=r"run\.tif is empty \(0 bytes\)"):
        load_frames(tmp_path / "run.tif")


def test_missing_file(tmp_path):
    with pytest.raises(FrameFileError, match="does not exist"):
        load_frames(tmp_path / "run_0043.tif")


def test_hdf5_named_tif(tmp_path):
    with h5py.File(tmp_path / "run.tif", "w") as h5:
        h5["frames"] = frames_u16()
    with pytest.raises(FrameFileError, match="named like a TIFF file but holds HDF5 data"):
        load_frames(tmp_path / "run.tif")


def test_png_named_tif(tmp_path):
    (tmp_path / "run.tif").write_bytes(b"\x89PNG\r\n\x1a\n" + b"\0" * 64)
    with pytest.raises(FrameFileError, match="named like a TIFF file but its content is a PNG image"):
        load_frames(tmp_path / "run.tif")


def test_unknown_extension_and_content(tmp_path):
    (tmp_path / "run.txt").write_text("frame,value\n0,1\n")
    with pytest.raises(FrameFileError, match="not a frame file latticeread can read .*text"):
        load_frames(tmp_path / "run.txt")


def test_hdf5_without_the_dataset(tmp_path):
    with h5py.File(tmp_path / "run.h5", "w") as h5:
        h5["camera/images"] = frames_u16()
    with pytest.raises(FrameFileError, match=r"run\.h5 has no dataset 'frames'; candidates: /camera/images"):
        load_frames(tmp_path / "run.h5", dataset="frames")


def test_hdf5_with_no_frame_like_dataset(tmp_path):
    with h5py.File(tmp_path / "run.h5", "w") as h5:
        h5["exposure_ms"] = np.arange(10.0)
    with pytest.raises(FrameFileError, match="contains no 2-D or 3-D numeric dataset"):
        load_frames(tmp_path / "run.h5")


def test_truncated_hdf5(tmp_path):
    path = tmp_path / "run.h5"
    with h5py.File(path, "w") as h5:
        h5["frames"] = frames_u16(n=40)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 3])
    with pytest.raises(FrameFileError, match=r"run\.h5 (is not a readable HDF5 file|.*cannot be read)"):
        with load_frames(path) as frames:
            frames[:]


def test_truncated_npy(tmp_path):
    path = tmp_path / "run.npy"
    np.save(path, frames_u16())
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) - 100])
    with pytest.raises(FrameFileError, match=r"run\.npy is not a readable NumPy \.npy file \(truncated or damaged\)"):
        load_frames(path)


# --- bad content ---------------------------------------------------------------------------

def test_nan_frame(tmp_path):
    data = frames_u16().astype(np.float32)
    data[3, 2, 2] = np.nan
    data[3, 4, 4] = np.inf
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy") as frames:
        frames[2]
        with pytest.raises(FrameError, match=r"frame 3 of run\.npy has 2 non-finite pixel\(s\) \(1 NaN, 1 infinite\)"):
            frames[3]


def test_all_zero_frame_warns(tmp_path):
    data = frames_u16()
    data[1] = 0
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy") as frames:
        with pytest.warns(LatticeReadWarning, match=r"frame 1 of run\.npy is constant \(every pixel = 0\)"):
            frames[1]


def test_all_saturated_frame_warns_twice(tmp_path):
    data = frames_u16()
    data[4] = 65535
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy") as frames:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            frames[4]
    texts = [str(w.message) for w in caught if issubclass(w.category, LatticeReadWarning)]
    assert any("224 pixel(s) (100%) at or above the saturation value 65535" in t for t in texts)
    assert any("is constant (every pixel = 65535)" in t for t in texts)


def test_one_dimensional_array(tmp_path):
    np.save(tmp_path / "trace.npy", np.arange(100, dtype=np.uint16))
    with pytest.raises(FrameError, match=r"holds a 1-D array of shape \(100,\); frames must be 2-D"):
        load_frames(tmp_path / "trace.npy")


def test_four_dimensional_array(tmp_path):
    np.save(tmp_path / "shots.npy", np.zeros((3, 2, 16, 14), np.uint16))
    with pytest.raises(FrameError, match=r"holds a 4-D array of shape \(3, 2, 16, 14\).*reshape it to \(6, 16, 14\)"):
        load_frames(tmp_path / "shots.npy")


def test_complex_array(tmp_path):
    np.save(tmp_path / "fft.npy", np.zeros((2, 8, 8), np.complex64))
    with pytest.raises(FrameError, match="complex numbers"):
        load_frames(tmp_path / "fft.npy")


def test_empty_stack(tmp_path):
    np.save(tmp_path / "none.npy", np.zeros((0, 8, 8), np.uint16))
    with pytest.raises(FrameError, match="is empty"):
        load_frames(tmp_path / "none.npy")


# --- calibration JSON ----------------------------------------------------------------------

def _cal_dict():
    return json.loads(json.dumps(good_calibration().to_dict()))


@pytest.mark.parametrize("remove, key", [
    (("geometry",), "geometry"),
    (("geometry", "a2"), "geometry.a2"),
    (("psf", "fwhm"), "psf.fwhm"),
    (("frame_shape",), "frame_shape"),
])
def test_calibration_missing_key(tmp_path, remove, key):
    data = _cal_dict()
    target = data
    for k in remove[:-1]:
        target = target[k]
    del target[remove[-1]]
    (tmp_path / "cal.json").write_text(json.dumps(data))
    with pytest.raises(CalibrationError, match=rf"cal\.json: key '{key}' is missing"):
        load_calibration(tmp_path / "cal.json")


@pytest.mark.parametrize("path, value, expected", [
    (("camera", "em_gain"), "high", "must be a number, got a string"),
    (("geometry", "a1"), [4.0], "must be a list of two numbers"),
    (("frame_shape",), [64.5, 64], "must be a list of two whole numbers"),
    (("psf", "radius"), True, "must be a whole number, got true/false"),
    (("threshold",), {"value": 3}, "must be a number, got an object"),
])
def test_calibration_wrong_type(tmp_path, path, value, expected):
    data = _cal_dict()
    target = data
    for k in path[:-1]:
        target = target[k]
    target[path[-1]] = value
    (tmp_path / "cal.json").write_text(json.dumps(data))
    with pytest.raises(CalibrationError, match=rf"key '{'.'.join(path)}' {expected}"):
        load_calibration(tmp_path / "cal.json")


def test_calibration_bad_value(tmp_path):
    data = _cal_dict()
    data["camera"]["em_gain"] = -3.0
    (tmp_path / "cal.json").write_text(json.dumps(data))
    with pytest.raises(CalibrationError, match="em_gain must be positive"):
        load_calibration(tmp_path / "cal.json")


def test_calibration_not_json(tmp_path):
    (tmp_path / "cal.json").write_text('{"geometry": {"a1": [4, 0],}')
    with pytest.raises(CalibrationError, match=r"cal\.json is not valid JSON \(line 1, column"):
        load_calibration(tmp_path / "cal.json")


def test_calibration_empty_and_missing(tmp_path):
    (tmp_path / "cal.json").write_text("")
    with pytest.raises(CalibrationError, match="is empty"):
        load_calibration(tmp_path / "cal.json")
    with pytest.raises(CalibrationError, match="does not exist"):
        load_calibration(tmp_path / "other.json")


def test_calibration_newer_format(tmp_path):
    data = _cal_dict()
    data["format_version"] = 7
    (tmp_path / "cal.json").write_text(json.dumps(data))
    with pytest.raises(CalibrationError, match="format version 7 is newer"):
        load_calibration(tmp_path / "cal.json")


# --- read-only output folder: both simulations, nothing left behind ------------------------

class _Result:
    def __init__(self):
        from latticeread.core.geometry import lattice_sites

        self.frame_index = 0
        self.geometry = good_calibration().geometry
        self.sites = lattice_sites(self.geometry, (16, 16))
        n = len(self.sites)
        self.amplitudes = np.linspace(0, 1000, n)
        self.occupied = (self.amplitudes > 500).astype(np.uint8)
        self.p_occupied = self.occupied.astype(float)
        self.flags = np.zeros(n, np.uint8)
        self.threshold = 500.0


WRITERS = {
    "csv": lambda p: write_sites_csv(p / "out.csv", [_Result()]),
    "hdf5": lambda p: write_occupation_hdf5(p / "out.h5", [_Result()]),
    "calibration": lambda p: save_calibration(p / "out.json", good_calibration()),
}


@pytest.mark.parametrize("writer", list(WRITERS))
def test_output_below_a_regular_file(tmp_path, writer):
    """As root chmod does not stop writes, so the 'folder' is a regular file."""
    blocker = tmp_path / "results"
    blocker.write_text("not a folder")
    with pytest.raises(ExportError, match=r"results is a file, not a folder"):
        WRITERS[writer](blocker)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results"]


@pytest.mark.parametrize("writer", list(WRITERS))
@pytest.mark.parametrize("code, text", [(errno.EACCES, "is read-only"), (errno.ENOSPC, "is full")])
def test_output_permission_denied_or_disk_full(tmp_path, monkeypatch, writer, code, text):
    """Monkeypatched os.replace fails at the very end: no output file, no temporary file."""
    def fail(src, dst):
        raise OSError(code, os.strerror(code), str(dst))

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(ExportError, match=text):
        WRITERS[writer](tmp_path)
    assert list(tmp_path.iterdir()) == []


# --- property test: the numerical core never fails with a foreign exception ------------------

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_KINDS = ["noise", "constant", "zero", "nan", "inf", "one_atom", "huge", "negative", "uint16"]


def _random_frame(kind, shape, seed):
    rng = np.random.default_rng(seed)
    img = rng.normal(100.0, 10.0, shape)
    if kind == "constant":
        img[:] = rng.uniform(-5, 70000)
    elif kind == "zero":
        img[:] = 0
    elif kind == "nan":
        img[rng.random(shape) < 0.1] = np.nan
    elif kind == "inf":
        img[rng.random(shape) < 0.05] = np.inf
    elif kind == "one_atom":
        img[rng.integers(0, shape[0]), rng.integers(0, shape[1])] += 5000
    elif kind == "huge":
        img *= 1e30
    elif kind == "negative":
        img -= 1e4
    elif kind == "uint16":
        img = img.astype(np.uint16)
    return img


@settings(max_examples=30, deadline=None)
@given(kind=st.sampled_from(_KINDS), seed=st.integers(0, 2**16),
       shape=st.one_of(st.just((32, 32)), st.tuples(st.integers(1, 40), st.integers(1, 40))))
def test_lattice_and_reconstruction_return_result_or_own_error(kind, shape, seed):
    """Random and degenerate frames (no atoms, no lattice, NaN, inf, wrong size):
    estimate_lattice and Reconstructor give a result or a LatticeReadError, nothing else."""
    from latticeread.core.camera import CameraModel
    from latticeread.core.geometry import LatticeGeometry
    from latticeread.core.lattice import estimate_lattice
    from latticeread.core.pipeline import FrameResult, Reconstructor
    from latticeread.errors import LatticeReadError

    cal = Calibration(geometry=LatticeGeometry(a1=(4.1, 0.2), a2=(-0.2, 4.1), offset=(15.5, 16.2)),
                      psf=gaussian_psf(fwhm=2.6), frame_shape=(32, 32), threshold=300.0,
                      camera=CameraModel(kind="emccd", em_gain=100, counts_per_electron=0.5, bias=100, read_noise=10))
    image = _random_frame(kind, shape, seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            geometry = estimate_lattice(image)
            assert isinstance(geometry, LatticeGeometry)
        except LatticeReadError:
            pass
        try:
            result = Reconstructor(cal)(image)
            assert isinstance(result, FrameResult)
            assert result.occupied.shape == result.amplitudes.shape == (len(result.sites),)
        except LatticeReadError:
            pass
