"""Frame loading: every supported format reads back exactly, lazily, with checks.

Outside references: ``tifffile`` writes the TIFF files (TIFF 6.0 baseline, LZW compression
via imagecodecs, big-endian "MM" byte order), ``h5py`` the HDF5 files and ``numpy.save``/
``numpy.savez`` the NumPy files; the loader must return exactly the written arrays.
"""

from __future__ import annotations

import warnings

import h5py
import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from latticeread.errors import FrameError, FrameFileError, LatticeReadError, LatticeReadWarning
from latticeread.io.frames import check_frame, load_frames, load_mask


def stack(dtype, n=5, h=12, w=10, rng=0):
    rng = np.random.default_rng(rng)
    dtype = np.dtype(dtype)
    if dtype.kind == "f":
        return rng.normal(100, 10, (n, h, w)).astype(dtype)
    info = np.iinfo(dtype)
    return rng.integers(max(info.min, 0), min(info.max, 4000), (n, h, w), endpoint=False).astype(dtype)


@pytest.mark.parametrize("dtype", ["u1", "u2", "u4", "i2", "i4", "f4", "f8"])
@pytest.mark.parametrize("options", [{}, {"compression": "lzw"}, {"byteorder": ">"}])
def test_tiff_stacks_read_back_exactly(tmp_path, dtype, options):
    """tifffile-written multi-page TIFFs (8/16/32-bit, float, LZW, big-endian) load bit-exact."""
    data = stack(dtype)
    path = tmp_path / "run.tif"
    tifffile.imwrite(path, data, **options)
    with load_frames(path) as frames:
        assert frames.shape == data.shape and len(frames) == 5
        assert frames.dtype == data.dtype.newbyteorder("=")
        for i, frame in enumerate(frames):
            np.testing.assert_array_equal(frame, data[i])
            assert frame.dtype.isnative
        np.testing.assert_array_equal(frames[-1], data[-1])


def test_tiff_uncompressed_is_memory_mapped_and_compressed_is_paged(tmp_path):
    """Lazy reading: memory map for plain data; LZW pages decoded one at a time."""
    data = stack("u2", n=6)
    tifffile.imwrite(tmp_path / "plain.tif", data)
    tifffile.imwrite(tmp_path / "lzw.tif", data, compression="lzw")
    with load_frames(tmp_path / "plain.tif") as plain:
        assert isinstance(plain[2].base, np.memmap) or isinstance(plain[2], np.memmap)
        assert not plain[2].flags.writeable  # inputs are opened read-only
    with load_frames(tmp_path / "lzw.tif") as lzw:
        np.testing.assert_array_equal(lzw[4], data[4])
        assert lzw._reader._cache is None  # never decoded the whole stack


def test_tiff_pages_appended_one_by_one(tmp_path):
    data = stack("u2", n=5)
    for frame in data:
        tifffile.imwrite(tmp_path / "run.tif", frame, append=True)
    with load_frames(tmp_path / "run.tif") as frames:
        assert frames.shape == (5, 12, 10)
        np.testing.assert_array_equal(frames[:], data)


@pytest.mark.filterwarnings("ignore:<tifffile.TiffWriter.write> data with shape:DeprecationWarning")
@pytest.mark.parametrize("n", [1, 3, 4])
def test_small_tiff_stacks(tmp_path, n):
    """tifffile stores 3- or 4-frame stacks as separate sample planes; still frames for us."""
    data = stack("u2", n=n)
    tifffile.imwrite(tmp_path / "run.tif", data if n > 1 else data[0])
    with load_frames(tmp_path / "run.tif") as frames:
        assert frames.shape == data.shape
        np.testing.assert_array_equal(frames[:], data)


def test_hdf5_pick_dataset(tmp_path):
    data = stack("u2")
    with h5py.File(tmp_path / "run.h5", "w") as h5:
        h5["camera/frames"] = data
        h5["camera/dark"] = data[0]
        h5["notes"] = np.arange(3)
    with load_frames(tmp_path / "run.h5", dataset="camera/frames") as frames:
        np.testing.assert_array_equal(frames[:], data)
        assert frames.dataset == "/camera/frames"
    with pytest.raises(FrameFileError, match=r"several datasets that could be frames: /camera/dark, /camera/frames"):
        load_frames(tmp_path / "run.h5")


def test_hdf5_single_candidate_is_chosen(tmp_path):
    data = stack("f4")
    with h5py.File(tmp_path / "run.h5", "w") as h5:
        h5.create_dataset("images", data=data, chunks=(1, 12, 10), compression="gzip")
        h5["exposure_ms"] = 30.0
    with load_frames(tmp_path / "run.h5") as frames:
        np.testing.assert_array_equal(frames[1], data[1])


def test_npy_is_memory_mapped_and_npz_read(tmp_path):
    data = stack("u2")
    np.save(tmp_path / "run.npy", data)
    np.savez(tmp_path / "run.npz", frames=data)
    with load_frames(tmp_path / "run.npy") as frames:
        assert isinstance(frames[0], np.memmap) or isinstance(frames[0].base, np.memmap)
        np.testing.assert_array_equal(frames[:], data)
    with load_frames(tmp_path / "run.npz") as frames:
        np.testing.assert_array_equal(frames[:], data)
        assert frames.dataset == "frames"


def test_roi_crops_every_frame(tmp_path):
    data = stack("u2")
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy", roi=(2, 9, 1, 7)) as frames:
        assert frames.shape == (5, 7, 6)
        np.testing.assert_array_equal(frames[3], data[3, 2:9, 1:7])
    with pytest.raises(FrameError, match="does not fit inside the 12x10-pixel frames"):
        load_frames(tmp_path / "run.npy", roi=(0, 13, 0, 5))


def test_index_out_of_range(tmp_path):
    np.save(tmp_path / "run.npy", stack("u2"))
    with load_frames(tmp_path / "run.npy") as frames:
        with pytest.raises(IndexError, match=r"frame 5 does not exist: run.npy has 5 frame\(s\)"):
            frames[5]


def test_saturation_warning_names_frame_and_count(tmp_path):
    data = stack("u2")
    data[2, 3, 4] = 65535
    data[2, 5, 5] = 65535
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy") as frames:
        with pytest.warns(LatticeReadWarning, match=r"frame 2 of run.npy: 2 pixel\(s\)"):
            frames[2]
        report = frames.validate_frame(2)
        assert report.n_saturated == 2 and report.saturated_fraction == pytest.approx(2 / 120)
        assert frames.validate_frame(1).ok


def test_user_saturation_value(tmp_path):
    data = stack("f4")
    data[0, 0, 0] = 5000.0
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy", saturation=4095) as frames:
        assert frames.validate_frame(0).n_saturated == 1


def test_nonfinite_keep_policy(tmp_path):
    data = stack("f8")
    data[1, 2, 2] = np.nan
    np.save(tmp_path / "run.npy", data)
    with load_frames(tmp_path / "run.npy", nonfinite="keep") as frames:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            assert np.isnan(frames[1][2, 2])
        assert frames.validate_frame(1).n_nonfinite == 1


def test_check_frame_refuses_a_stack():
    with pytest.raises(FrameError, match="is a stack of 5 frames .* but one 2-D frame is expected"):
        check_frame(np.zeros((5, 8, 8)), where="the image")
    assert check_frame(np.zeros((8, 8))).shape == (8, 8)


def test_load_mask(tmp_path):
    mask = np.zeros((12, 10), np.uint8)
    mask[:, 3] = 1  # dead column
    mask[7, 8] = 1  # hot pixel
    np.save(tmp_path / "mask.npy", mask)
    got = load_mask(tmp_path / "mask.npy", frame_shape=(12, 10))
    assert got.dtype == bool and got.sum() == 13 and got[7, 8]
    with pytest.raises(FrameError, match="bad-pixel mask mask.npy is 12x10 but the frames are 16x16"):
        load_mask(tmp_path / "mask.npy", frame_shape=(16, 16))


# --- property test: either the exact array or our own error ---------------------------------

_dtypes = st.sampled_from(["u1", "u2", "i2", "u4", "i4", "f4", "f8", ">u2", ">f4", "?", "c8"])
_shapes = st.lists(st.integers(0, 5), min_size=1, max_size=4).map(tuple)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(dtype=_dtypes, shape=_shapes, fmt=st.sampled_from(["npy", "tif", "h5"]), seed=st.integers(0, 2**16))
def test_loaders_return_input_or_own_error(tmp_path_factory, dtype, shape, fmt, seed):
    """Random small arrays written by numpy/tifffile/h5py: equal stack or LatticeReadError."""
    rng = np.random.default_rng(seed)
    data = (rng.random(shape) * 200).astype(dtype)
    path = tmp_path_factory.mktemp("prop") / f"a.{fmt}"
    try:
        if fmt == "npy":
            np.save(path, data)
        elif fmt == "tif":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # tifffile's notes on zero-size or 3-plane data
                tifffile.imwrite(path, data)
        else:
            with h5py.File(path, "w") as h5:
                h5["frames"] = data
    except Exception:  # the writer itself refuses (e.g. TIFF of complex or empty data): nothing to load
        return
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LatticeReadWarning)
            with load_frames(path, nonfinite="keep") as frames:
                got = frames[:]
    except LatticeReadError:
        return
    expect = data.reshape((-1, *data.shape[-2:])) if data.ndim == 2 else data
    if fmt == "tif":  # tifffile drops leading length-1 axes of what it stores; compare contents
        expect = expect.reshape(got.shape)
    assert got.shape == expect.shape
    np.testing.assert_array_equal(got, expect)


def test_blocks_appended_as_separate_series(tmp_path):
    """Acquisition code that appends blocks of frames creates several TIFF series."""
    data = stack("u2", n=15)
    for block in (data[:5], data[5:12], data[12:13], data[13:]):
        tifffile.imwrite(tmp_path / "run.tif", block, append=True, photometric="minisblack")
    with load_frames(tmp_path / "run.tif") as frames:
        assert frames.shape == (15, 12, 10)
        np.testing.assert_array_equal(frames[:], data)


def test_tiff_pages_of_different_sizes(tmp_path):
    tifffile.imwrite(tmp_path / "run.tif", stack("u2", n=1)[0])
    tifffile.imwrite(tmp_path / "run.tif", stack("u2", n=1, h=11)[0], append=True)
    with pytest.raises(FrameFileError, match="holds images of different sizes or types: series 0 is 12x10 uint16, "
                                             "series 1 is 11x10 uint16"):
        load_frames(tmp_path / "run.tif")


def test_frame_shape_must_match_calibration(tmp_path):
    from latticeread.errors import CalibrationError

    np.save(tmp_path / "run_0042.npy", stack("u2"))
    with pytest.raises(CalibrationError, match="the frames of run_0042.npy are 12x10 pixels but the calibration "
                                               "was made for 12x12"):
        load_frames(tmp_path / "run_0042.npy", frame_shape=(12, 12))
    with load_frames(tmp_path / "run_0042.npy", roi=(0, 12, 0, 10), frame_shape=(12, 10)) as frames:
        assert len(frames) == 5
