"""Loading camera frames from TIFF, HDF5, ``.npy`` and ``.npz`` files, lazily and checked.

:func:`load_frames` opens a file read-only and returns a :class:`FrameStack`: a sequence of
2-D frames (``height x width`` pixels, raw camera counts) that reads one frame at a time.
Uncompressed TIFF stacks and ``.npy`` files are memory-mapped; compressed TIFFs are decoded
page by page; HDF5 datasets are sliced frame by frame. Nothing is loaded until asked for.

Every frame handed out is checked (:meth:`FrameStack.validate_frame`): NaN/inf pixels raise
:class:`~latticeread.errors.FrameError` naming the frame and the count (or are kept with
``nonfinite="keep"``); saturated pixels and constant frames give a
:class:`~latticeread.errors.LatticeReadWarning`. Damaged files (truncated, lying header,
zero bytes, wrong extension, missing dataset) raise
:class:`~latticeread.errors.FrameFileError` naming the file and the problem.
"""

from __future__ import annotations

import contextlib
import logging
import os
import struct
import warnings
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from latticeread.errors import CalibrationError, FrameError, FrameFileError, LatticeReadWarning
from latticeread.io.limits import check_frame_memory

__all__ = [
    "FrameStack",
    "FrameReport",
    "load_frames",
    "load_mask",
    "check_frame",
    "check_stack",
    "sniff_format",
    "FRAME_SUFFIXES",
]

log = logging.getLogger(__name__)

#: Known file suffixes and the format each one promises.
FRAME_SUFFIXES = {".tif": "tiff", ".tiff": "tiff", ".btf": "tiff", ".h5": "hdf5", ".hdf5": "hdf5",
                  ".hdf": "hdf5", ".nxs": "hdf5", ".npy": "npy", ".npz": "npz"}
_FORMAT_NAMES = {"tiff": "TIFF", "hdf5": "HDF5", "npy": "NumPy .npy", "npz": "NumPy .npz"}
_MAGIC = [
    (b"II*\x00", "tiff"), (b"MM\x00*", "tiff"), (b"II+\x00", "tiff"), (b"MM\x00+", "tiff"),
    (b"\x89HDF\r\n\x1a\n", "hdf5"), (b"\x93NUMPY", "npy"), (b"PK\x03\x04", "npz"), (b"PK\x05\x06", "npz"),
]
#: How to pick one of several datasets, for every front end (batch and watch take whole files).
_CHOOSE_DATASET = ("name the one to use: --dataset for calibrate, reconstruct and camera, dataset=... in Python; "
                   "batch and watch need files holding a single frame dataset")
_OTHER_MAGIC = [(b"\x89PNG", "a PNG image"), (b"\xff\xd8\xff", "a JPEG image"), (b"%PDF", "a PDF document"),
                (b"GIF8", "a GIF image"), (b"SIMPLE  =", "a FITS file")]


def sniff_format(path) -> str | None:
    """Format of a file from its first bytes: "tiff", "hdf5", "npy", "npz" or None."""
    with open(path, "rb") as fh:
        head = fh.read(16)
    for magic, fmt in _MAGIC:
        if head.startswith(magic):
            return fmt
    return None


def _describe_other(path: Path) -> str:
    with open(path, "rb") as fh:
        head = fh.read(16)
    for magic, what in _OTHER_MAGIC:
        if head.startswith(magic):
            return what
    try:
        head.decode("ascii")
        return "text"
    except UnicodeDecodeError:
        return "an unknown binary format"


# --- checks on arrays ----------------------------------------------------------------------

def _shape_text(shape) -> str:
    return "x".join(str(int(s)) for s in shape) if len(shape) else "scalar"


def _check_dtype(dtype: np.dtype, where: str) -> None:
    if dtype.kind not in "uif":
        raise FrameError(f"{where} has data type {dtype} ({_kind_text(dtype)}); camera frames must be integer "
                         "or floating-point numbers")


def _kind_text(dtype: np.dtype) -> str:
    return {"b": "true/false values", "c": "complex numbers", "O": "Python objects", "U": "text",
            "S": "bytes", "V": "records", "M": "dates", "m": "time spans"}.get(dtype.kind, dtype.kind)


def check_stack(shape, dtype, *, where: str = "the data") -> tuple[int, int, int]:
    """Check that an array of ``shape`` is one 2-D frame or a 3-D stack of them.

    Parameters
    ----------
    shape : tuple of int
    dtype : numpy dtype
    where : str
        How to name the data in messages ("run_0042.tif", "dataset /frames of run.h5").

    Returns
    -------
    (n_frames, height, width) : tuple of int
        Pixels; a single 2-D frame gives ``n_frames == 1``.

    Raises
    ------
    FrameError
        1-D, 4-D or higher, empty, or a non-numeric data type.
    """
    shape = tuple(int(s) for s in shape)
    _check_dtype(np.dtype(dtype), where)
    if len(shape) < 2:
        raise FrameError(f"{where} holds a {len(shape)}-D array of shape {shape}; frames must be 2-D "
                         "(height x width pixels) or a 3-D stack (frames x height x width)")
    if len(shape) > 3:
        raise FrameError(f"{where} holds a {len(shape)}-D array of shape {shape}; expected a 3-D stack "
                         f"(frames x height x width). If the leading axes are shots x images, reshape it to "
                         f"({int(np.prod(shape[:-2]))}, {shape[-2]}, {shape[-1]}) first")
    if len(shape) == 2:
        shape = (1, *shape)
    if 0 in shape:
        raise FrameError(f"{where} is empty (shape {_shape_text(shape)}): no pixels to analyse")
    return shape


def check_frame(image, *, where: str = "the image") -> np.ndarray:
    """Return ``image`` as a 2-D array or raise a clear error.

    Parameters
    ----------
    image : array_like
        One camera frame, ``(height, width)`` pixels.
    where : str
        Name used in messages.

    Raises
    ------
    FrameError
        A 3-D stack where one frame was expected (the message says how many frames and how
        to pick one), another number of dimensions, or a non-numeric type.
    """
    image = np.asarray(image)
    if image.ndim == 3:
        raise FrameError(f"{where} is a stack of {image.shape[0]} frames ({_shape_text(image.shape)}) but "
                         "one 2-D frame is expected here; pick one frame (e.g. stack[0]) or process the "
                         "stack frame by frame")
    check_stack(image.shape, image.dtype, where=where)
    return image


@dataclass(frozen=True)
class FrameReport:
    """What is suspicious about one frame.

    Attributes
    ----------
    index : int
        Frame index in the stack (0-based).
    shape : (int, int)
        Height and width in pixels.
    n_nonfinite : int
        Number of NaN or infinite pixels.
    n_saturated : int
        Pixels at or above the saturation value (counts).
    saturated_fraction : float
        ``n_saturated / n_pixels``.
    constant : bool
        All finite pixels have the same value (camera not triggered, blank file...).
    minimum, maximum : float
        Range of the finite pixel values in counts (NaN when none is finite).
    problems : tuple of str
        Human-readable description of each issue; empty when the frame looks fine.
    """

    index: int
    shape: tuple[int, int]
    n_nonfinite: int
    n_saturated: int
    saturated_fraction: float
    constant: bool
    minimum: float
    maximum: float
    problems: tuple[str, ...]

    @property
    def ok(self) -> bool:
        return not self.problems


def _frame_report(frame: np.ndarray, index: int, *, saturation, where: str) -> FrameReport:
    problems = []
    n_pix = frame.size
    if frame.dtype.kind == "f":
        finite = np.isfinite(frame)
        n_bad = int(n_pix - np.count_nonzero(finite))
    else:
        finite, n_bad = None, 0
    values = frame if n_bad == 0 else frame[finite]
    if values.size:
        lo, hi = float(values.min()), float(values.max())
    else:
        lo = hi = float("nan")
    if n_bad:
        n_nan = int(np.count_nonzero(np.isnan(frame)))
        problems.append(f"frame {index} of {where} has {n_bad} non-finite pixel(s) "
                        f"({n_nan} NaN, {n_bad - n_nan} infinite) out of {n_pix}")
    n_sat = int(np.count_nonzero(values >= saturation)) if saturation is not None and values.size else 0
    frac = n_sat / n_pix
    if n_sat:
        problems.append(f"frame {index} of {where}: {n_sat} pixel(s) ({100 * frac:.3g}%) at or above the "
                        f"saturation value {saturation:g} counts; amplitudes of sites there are too low")
    constant = bool(values.size == 0 or lo == hi)
    if constant:
        what = "has no finite pixel" if values.size == 0 else f"is constant (every pixel = {lo:g})"
        problems.append(f"frame {index} of {where} {what}: was the camera triggered?")
    return FrameReport(index, (int(frame.shape[0]), int(frame.shape[1])), n_bad, n_sat, frac, constant, lo, hi,
                       tuple(problems))


# --- readers for each format -----------------------------------------------------------------

class _TiffCapture(logging.Handler):
    """Collects tifffile's complaints while a file is opened (it logs instead of raising)."""

    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.messages: list[str] = []

    def emit(self, record):
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def _capture_tifffile():
    handler = _TiffCapture()
    logger = logging.getLogger("tifffile")
    logger.addHandler(handler)
    try:
        yield handler
    finally:
        logger.removeHandler(handler)


class _TiffReader:
    def __init__(self, path: Path):
        import tifffile

        self.path = path
        self.memmap = None
        self._cache = None
        size = path.stat().st_size
        name = path.name
        with _capture_tifffile() as cap:
            try:
                self.tif = tifffile.TiffFile(path, mode="rb")
            except (tifffile.TiffFileError, ValueError, OSError, IndexError, KeyError, struct.error) as exc:
                raise FrameFileError(f"{name} is damaged or truncated (not a readable TIFF file): {exc}") from exc
            try:
                self._setup(size, cap)
            except BaseException:
                self.tif.close()
                raise

    def _setup(self, size: int, cap: _TiffCapture) -> None:
        import tifffile

        tif, name = self.tif, self.path.name
        try:
            all_series = tif.series
            pages = list(tif.pages)
        except (tifffile.TiffFileError, ValueError, IndexError, KeyError, struct.error) as exc:
            raise FrameFileError(f"{name} is damaged (truncated or corrupt TIFF structure): {exc}") from exc
        if not all_series or not pages:
            raise FrameFileError(f"{name} contains no images")
        first = pages[0]
        # interleaved samples (RGB pixels) are colour; separate planes (planar configuration 2,
        # which tifffile chooses for 3- or 4-frame stacks) are read as frames
        if getattr(first, "samplesperpixel", 1) > 1 and getattr(first, "planarconfig", 1) == 1:
            raise FrameFileError(f"{name} is a colour image ({first.samplesperpixel} samples per pixel); "
                                 "expected monochrome camera frames")
        for k, page in enumerate(pages):
            self._check_page(page, k, size)
        if cap.messages:
            raise FrameFileError(f"{name} is damaged (truncated or corrupt TIFF): {cap.messages[0]}")
        series = all_series[0]
        if len(all_series) > 1:
            # frames appended one by one or in blocks: several series, which must all agree
            for k, other in enumerate(all_series[1:], start=1):
                if tuple(other.shape[-2:]) != tuple(series.shape[-2:]) or other.dtype != series.dtype:
                    raise FrameFileError(
                        f"{name} holds images of different sizes or types: series 0 is "
                        f"{_shape_text(series.shape[-2:])} {np.dtype(series.dtype)}, series {k} is "
                        f"{_shape_text(other.shape[-2:])} {np.dtype(other.dtype)}")
            n_frames = sum(int(np.prod(s.shape[:-2])) for s in all_series)
            if n_frames != len(pages) or any(getattr(p, "samplesperpixel", 1) != 1 for p in pages):
                raise FrameFileError(f"{name} has a page layout latticeread cannot read as a stack of frames "
                                     f"({len(all_series)} series, {len(pages)} pages, {n_frames} images)")
            self.shape = (n_frames, *series.shape[-2:])
            self.dtype = np.dtype(series.dtype)
            self._pages = pages
            self._series = None
        else:
            shape = tuple(series.shape)
            while len(shape) > 2 and shape[0] == 1:  # leading singleton axes (e.g. one time point)
                shape = shape[1:]
            self.shape = shape
            self.dtype = np.dtype(series.dtype)
            self._series = series
            n = int(np.prod(shape[:-2])) if len(shape) > 2 else 1
            self._pages = None
            if series.dataoffset is not None and len(shape) <= 3:
                try:
                    mm = tifffile.memmap(self.path, series=0, mode="r")
                    self.memmap = mm.reshape((n, *shape[-2:]))
                except (ValueError, OSError):
                    self.memmap = None
            if self.memmap is None:
                spages = [p for p in series.pages if p is not None]
                self._pages = spages if len(spages) == n and len(shape) <= 3 else None

    def _check_page(self, page, k: int, size: int) -> None:
        name = self.path.name
        offsets = tuple(getattr(page, "dataoffsets", ()) or ())
        counts = tuple(getattr(page, "databytecounts", ()) or ())
        if offsets and counts:
            end = max(o + c for o, c in zip(offsets, counts))
            if end > size:
                raise FrameFileError(f"{name} is truncated: image {k} needs bytes up to {end} but the file has "
                                     f"only {size} bytes")
            shape = getattr(page, "shape", None)
            dtype = getattr(page, "dtype", None)
            if getattr(page, "compression", 1) == 1 and shape is not None and dtype is not None:
                need = int(np.prod(shape)) * np.dtype(dtype).itemsize
                have = int(sum(counts))
                if have < need:
                    raise FrameFileError(
                        f"{name} has an inconsistent header: image {k} is declared as {_shape_text(shape)} "
                        f"pixels of {np.dtype(dtype)} ({need} bytes) but stores only {have} bytes")

    def __len__(self):
        return 1 if len(self.shape) == 2 else int(np.prod(self.shape[:-2]))

    def read(self, i: int) -> np.ndarray:
        import tifffile

        try:
            if self.memmap is not None:
                return self.memmap[i]
            if self._pages is not None:
                return self._pages[i].asarray()
            if self._cache is None:  # several planes in one page: decode the page once
                check_frame_memory(self.shape[-2:], where=self.path.name, n_frames=len(self),
                                   itemsize=self.dtype.itemsize)
                self._cache = self._series.asarray().reshape((len(self), *self.shape[-2:]))
            return self._cache[i]
        except (tifffile.TiffFileError, ValueError, OSError, IndexError, struct.error) as exc:
            raise FrameFileError(f"frame {i} of {self.path.name} cannot be decoded: {exc}") from exc

    def close(self):
        self.memmap = None
        self._cache = None
        self.tif.close()


def _h5_candidates(h5) -> list[str]:
    import h5py

    found: list[str] = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.ndim in (2, 3) and obj.dtype.kind in "uif":
            found.append("/" + name)

    h5.visititems(visit)
    return found


def _describe_link(h5, dataset: str, exc: Exception) -> str:
    """Why an HDF5 path cannot be opened, naming the file an external link points to."""
    import h5py

    try:
        link = h5.get(dataset, getlink=True)
    except (KeyError, OSError, ValueError):
        link = None
    if isinstance(link, h5py.ExternalLink):
        return (f"it is a link to {link.path!r} in the file {link.filename}, which is missing or not an HDF5 "
                "file")
    return str(exc)


def _check_external_sources(ds, path: Path, dataset: str) -> None:
    """Refuse a dataset whose pixels live in other files that are missing.

    HDF5 reads the missing parts of a virtual dataset as its fill value without an error:
    the frames would look like blank images. Raw external storage is checked the same way.
    """
    folder = path.parent
    missing = []
    if getattr(ds, "is_virtual", False):
        for source in ds.virtual_sources():
            name = source.file_name
            if name == "." or "%" in name:  # the same file, or a pattern of file names
                continue
            if not any(p.exists() for p in (Path(name), folder / name)):
                missing.append(name)
    for entry in ds.external or ():
        name = entry[0].decode() if isinstance(entry[0], bytes) else str(entry[0])
        if not any(p.exists() for p in (Path(name), folder / name)):
            missing.append(name)
    if missing:
        files = ", ".join(sorted(set(missing)))
        raise FrameFileError(f"dataset {dataset} of {path.name} takes its pixels from other files that are missing "
                             f"({files}); HDF5 would read those frames as blank fill values. Put the files back "
                             "beside it or use the original data")


class _H5Reader:
    def __init__(self, path: Path, dataset: str | None):
        import h5py

        name = path.name
        try:
            self.h5 = h5py.File(path, "r")
        except OSError as exc:
            raise FrameFileError(f"{name} is not a readable HDF5 file (truncated or damaged): {exc}") from exc
        try:
            if dataset is None:
                cands = _h5_candidates(self.h5)
                if not cands:
                    raise FrameFileError(f"{name} contains no 2-D or 3-D numeric dataset that could hold frames")
                if len(cands) > 1:
                    raise FrameFileError(f"{name} holds several datasets that could be frames: "
                                         f"{', '.join(cands)}; {_CHOOSE_DATASET}")
                dataset = cands[0]
            if dataset not in self.h5:
                cands = _h5_candidates(self.h5)
                hint = f"; candidates: {', '.join(cands)}" if cands else "; it holds no frame-like dataset"
                raise FrameFileError(f"{name} has no dataset {dataset!r}{hint}")
            try:
                ds = self.h5[dataset]
            except (KeyError, OSError) as exc:
                raise FrameFileError(f"{dataset!r} in {name} cannot be opened: {_describe_link(self.h5, dataset, exc)}"
                                     ) from exc
            if not isinstance(ds, h5py.Dataset):
                raise FrameFileError(f"{dataset!r} in {name} is a group, not a dataset")
            _check_external_sources(ds, path, dataset)
            self.ds = ds
            self.dataset = ds.name
            self.shape = tuple(ds.shape)
            self.dtype = np.dtype(ds.dtype)
        except BaseException:
            self.h5.close()
            raise

    def __len__(self):
        return 1 if len(self.shape) == 2 else int(self.shape[0])

    def read(self, i: int) -> np.ndarray:
        try:
            return self.ds[()] if len(self.shape) == 2 else self.ds[i]
        except (OSError, ValueError) as exc:
            raise FrameFileError(f"frame {i} of {self.path_name} cannot be read: {exc}") from exc

    @property
    def path_name(self):
        return Path(self.h5.filename).name

    def close(self):
        self.h5.close()


def _npz_member_header(npz, key: str):
    """Declared ``(shape, dtype)`` of one array of an open ``.npz`` archive, without decompressing it."""
    names = npz.zip.namelist()
    with npz.zip.open(key if key in names else f"{key}.npy") as fh:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, _, dtype = np.lib.format.read_array_header_1_0(fh)
        else:
            shape, _, dtype = np.lib.format.read_array_header_2_0(fh)
    return tuple(shape), np.dtype(dtype)


class _ArrayReader:
    """``.npy`` (memory-mapped) or one array of a ``.npz`` archive."""

    def __init__(self, path: Path, fmt: str, dataset: str | None):
        name = path.name
        self.dataset = None
        try:
            if fmt == "npy":
                if dataset is not None:
                    raise FrameFileError(f"{name} is a .npy file holding one array; it has no dataset {dataset!r}")
                self.array = np.load(path, mmap_mode="r", allow_pickle=False)
            else:
                with np.load(path, allow_pickle=False) as npz:
                    keys = list(npz.keys())
                    if dataset is None:
                        if len(keys) != 1:
                            raise FrameFileError(
                                f"{name} holds {len(keys)} arrays ({', '.join(keys) or 'none'}); {_CHOOSE_DATASET}")
                        dataset = keys[0]
                    if dataset not in keys:
                        raise FrameFileError(f"{name} has no array {dataset!r}; it holds {', '.join(keys) or 'none'}")
                    # an .npz array is decompressed whole: check its declared size first
                    shape, dtype = _npz_member_header(npz, dataset)
                    where = f"array {dataset} of {name}"
                    n, h, w = check_stack(shape, dtype, where=where)
                    check_frame_memory((h, w), where=where, n_frames=n, itemsize=dtype.itemsize)
                    self.array = npz[dataset]
                    self.dataset = dataset
        except FrameFileError:
            raise
        except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
            raise FrameFileError(f"{name} is not a readable {_FORMAT_NAMES[fmt]} file (truncated or damaged): "
                                 f"{exc}") from exc
        self.shape = tuple(self.array.shape)
        self.dtype = np.dtype(self.array.dtype)

    def __len__(self):
        return 1 if self.array.ndim == 2 else int(self.shape[0])

    def read(self, i: int) -> np.ndarray:
        return self.array if self.array.ndim == 2 else self.array[i]

    def close(self):
        self.array = None


# --- the stack -----------------------------------------------------------------------------

class FrameStack:
    """Frames of one file, read lazily.

    Use :func:`load_frames` to create one. ``len(stack)`` frames of ``stack.shape[1:]``
    pixels; ``stack[i]`` is a 2-D array of raw counts (native byte order; read-only view
    when memory-mapped); iteration yields frames in order. Use as a context manager or
    call :meth:`close` to release the file.

    Attributes
    ----------
    source : Path
        The file the frames come from.
    dataset : str or None
        HDF5 dataset path or ``.npz`` array name.
    roi : (row_start, row_stop, col_start, col_stop) or None
        Pixel region kept from every frame (half-open, like numpy slicing).
    saturation : float or None
        Pixel value (counts) at or above which a pixel counts as saturated.
    nonfinite : {"raise", "keep"}
        What to do with NaN/inf pixels.
    warnings : list of str
        Problems found in the frames handed out so far (constant frame, saturated pixels),
        each once; also issued as :class:`~latticeread.errors.LatticeReadWarning`.
    """

    def __init__(self, reader, source: Path, *, dataset, roi, saturation, nonfinite, validate: bool):
        self._reader = reader
        self.source = source
        self.dataset = dataset
        where = source.name if dataset is None else f"dataset {dataset} of {source.name}"
        self._where = where
        n, h, w = check_stack(reader.shape, reader.dtype, where=where)
        # from the declared shape only, before any pixel is decoded
        check_frame_memory((h, w), where=where)
        if roi is not None:
            roi = _check_roi(roi, (h, w), where)
            h, w = roi[1] - roi[0], roi[3] - roi[2]
        self.roi = roi
        self._shape = (n, h, w)
        self._dtype = reader.dtype.newbyteorder("=")
        if saturation is None and self._dtype.kind in "ui":
            saturation = float(np.iinfo(self._dtype).max)
        self.saturation = saturation
        if nonfinite not in ("raise", "keep"):
            raise ValueError(f"nonfinite must be 'raise' or 'keep', got {nonfinite!r}")
        self.nonfinite = nonfinite
        self.validate = bool(validate)
        #: Warnings about the frames handed out so far (constant frames, saturated pixels),
        #: each once, in order: writers store them with the results.
        self.warnings: list[str] = []

    # sequence protocol
    def __len__(self) -> int:
        return self._shape[0]

    @property
    def shape(self) -> tuple[int, int, int]:
        """``(n_frames, height, width)``; pixels, after the region of interest."""
        return self._shape

    @property
    def frame_shape(self) -> tuple[int, int]:
        """``(height, width)`` of one frame in pixels."""
        return self._shape[1:]

    @property
    def dtype(self) -> np.dtype:
        """Data type of the frames as handed out (native byte order)."""
        return self._dtype

    def __repr__(self) -> str:
        return f"FrameStack({str(self.source)!r}, shape={self.shape}, dtype={self.dtype})"

    def _index(self, i) -> int:
        try:
            i = int(i)
        except TypeError:
            raise TypeError(f"frame index must be an integer, got {type(i).__name__}") from None
        n = len(self)
        if not -n <= i < n:
            raise IndexError(f"frame {i} does not exist: {self._where} has {n} frame(s) (0 to {n - 1})")
        return i % n

    def _raw(self, i: int) -> np.ndarray:
        if self._reader is None:
            raise FrameFileError(f"{self._where} has been closed")
        frame = np.asarray(self._reader.read(i))
        if frame.shape != self._reader.shape[-2:]:
            raise FrameFileError(f"frame {i} of {self._where} is {_shape_text(frame.shape)} but the file "
                                 f"declares {_shape_text(self._reader.shape[-2:])}")
        if self.roi is not None:
            r0, r1, c0, c1 = self.roi
            frame = frame[r0:r1, c0:c1]
        if not frame.dtype.isnative:
            frame = frame.astype(self._dtype)
        return frame

    def __getitem__(self, i):
        if isinstance(i, slice):
            picked = range(*i.indices(len(self)))
            if not len(picked):
                return np.empty((0, *self.frame_shape), self.dtype)
            # the frames are held together (and stacked: twice their size at the peak)
            check_frame_memory(self.frame_shape, where=self._where, n_frames=len(picked),
                               itemsize=2 * self._dtype.itemsize)
            return np.stack([self[k] for k in picked])
        i = self._index(i)
        frame = self._raw(i)
        if self.validate:
            self._apply_policy(_frame_report(frame, i, saturation=self.saturation, where=self._where))
        return frame

    def __iter__(self) -> Iterator[np.ndarray]:
        for i in range(len(self)):
            yield self[i]

    def _apply_policy(self, report: FrameReport) -> None:
        if report.n_nonfinite and self.nonfinite == "raise":
            raise FrameError(report.problems[0] + " (such frames cannot be analysed; in a script, load_frames(..., nonfinite='keep') masks the pixels instead)")
        for text in report.problems:
            if "non-finite" in text:
                continue
            if text not in self.warnings:
                self.warnings.append(text)
            warnings.warn(text, LatticeReadWarning, stacklevel=3)

    def validate_frame(self, i) -> FrameReport:
        """Check frame ``i`` without raising or warning; see :class:`FrameReport`."""
        i = self._index(i)
        return _frame_report(self._raw(i), i, saturation=self.saturation, where=self._where)

    def report(self) -> list[FrameReport]:
        """:meth:`validate_frame` for every frame (reads the whole file once, frame by frame)."""
        return [self.validate_frame(i) for i in range(len(self))]

    def read_all(self) -> np.ndarray:
        """All frames as one ``(n, height, width)`` array in memory (validated)."""
        return self[:]

    def close(self) -> None:
        """Release the file (further reads raise FrameFileError)."""
        if self._reader is not None:
            self._reader.close()
            self._reader = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _check_roi(roi, frame_shape, where):
    try:
        r0, r1, c0, c1 = (int(v) for v in roi)
    except (TypeError, ValueError):
        raise FrameError(f"region of interest must be (row_start, row_stop, col_start, col_stop) pixels, "
                         f"got {roi!r}") from None
    h, w = frame_shape
    if not (0 <= r0 < r1 <= h and 0 <= c0 < c1 <= w):
        raise FrameError(f"region of interest rows {r0}:{r1}, cols {c0}:{c1} does not fit inside the "
                         f"{h}x{w}-pixel frames of {where}")
    return (r0, r1, c0, c1)


def load_frames(path, *, dataset: str | None = None, roi=None, saturation: float | None = None,
                nonfinite: str = "raise", validate: bool = True, frame_shape=None) -> FrameStack:
    """Open a file of camera frames, read-only and lazily.

    Parameters
    ----------
    path : str or PathLike
        TIFF (single or multi-page; 8/16/32-bit integer or float; either byte order;
        compressed ones too), HDF5, ``.npy`` or ``.npz``. The format is recognised from the
        file's first bytes; the suffix must not contradict it.
    dataset : str, optional
        HDF5 dataset path or ``.npz`` array name; needed when the file holds several.
    roi : (row_start, row_stop, col_start, col_stop), optional
        Region of interest in pixels (half-open); frames are cropped to it, so pixel
        coordinates of results refer to the cropped frame.
    saturation : float, optional
        Saturation value in counts; defaults to the largest value of an integer type (e.g.
        65535 for 16-bit), none for floats.
    nonfinite : {"raise", "keep"}
        NaN/inf pixels raise FrameError (default) or are kept for the pipeline to flag.
    validate : bool
        Check every frame handed out (NaN/inf, saturation, constant frames).
    frame_shape : (int, int), optional
        Expected ``(height, width)`` in pixels after the region of interest, usually
        ``calibration.frame_shape``; a mismatch raises CalibrationError.

    Returns
    -------
    FrameStack

    Raises
    ------
    FrameFileError
        Missing, empty, damaged or unrecognised file; dataset missing or ambiguous.
    FrameError
        Array of the wrong dimensionality (1-D, 4-D...) or type.
    CalibrationError
        The frames do not have ``frame_shape``.
    """
    path = Path(os.fspath(path))
    if not path.exists():
        raise FrameFileError(f"frame file {path} does not exist")
    if path.is_dir():
        raise FrameFileError(f"{path} is a folder, not a frame file")
    size = path.stat().st_size
    if size == 0:
        raise FrameFileError(f"{path.name} is empty (0 bytes): the acquisition was probably interrupted")
    try:
        fmt = sniff_format(path)
    except OSError as exc:
        raise FrameFileError(f"cannot read {path}: {exc.strerror or exc}") from exc
    promised = FRAME_SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        what = _describe_other(path)
        if promised:
            raise FrameFileError(f"{path.name} is named like a {_FORMAT_NAMES[promised]} file but its content is "
                                 f"{what}; the file is damaged or not a frame file")
        raise FrameFileError(f"{path.name} is not a frame file latticeread can read (its content is {what}); "
                             "use TIFF, HDF5, .npy or .npz")
    if promised and promised != fmt:
        raise FrameFileError(f"{path.name} is named like a {_FORMAT_NAMES[promised]} file but holds "
                             f"{_FORMAT_NAMES[fmt]} data; rename it with the right extension")
    if fmt == "tiff":
        if dataset is not None:
            raise FrameFileError(f"{path.name} is a TIFF file; it has no dataset {dataset!r}")
        reader = _TiffReader(path)
    elif fmt == "hdf5":
        reader = _H5Reader(path, dataset)
        dataset = reader.dataset
    else:
        reader = _ArrayReader(path, fmt, dataset)
        dataset = reader.dataset
    try:
        stack = FrameStack(reader, path, dataset=dataset, roi=roi, saturation=saturation, nonfinite=nonfinite,
                           validate=validate)
        if frame_shape is not None and tuple(stack.frame_shape) != tuple(int(v) for v in frame_shape):
            h, w = stack.frame_shape
            raise CalibrationError(
                f"the frames of {stack._where} are {h}x{w} pixels but the calibration was made for "
                f"{int(frame_shape[0])}x{int(frame_shape[1])}; recalibrate or crop the frames (region of interest)")
        return stack
    except BaseException:
        reader.close()
        raise


def load_mask(path, *, dataset: str | None = None, frame_shape=None) -> np.ndarray:
    """Read a bad-pixel mask: a 2-D array where nonzero marks a BAD pixel.

    Parameters
    ----------
    path : str or PathLike
        Any format :func:`load_frames` reads, holding exactly one 2-D array.
    dataset : str, optional
        HDF5 dataset / ``.npz`` array name.
    frame_shape : (int, int), optional
        Expected ``(height, width)`` in pixels of the frames the mask applies to.

    Returns
    -------
    (height, width) ndarray of bool
        True for bad pixels (hot, dead, noisy).

    Raises
    ------
    FrameFileError, FrameError
        Unreadable file, more than one frame, or a shape different from ``frame_shape``.
    """
    with load_frames(path, dataset=dataset, validate=False) as stack:
        if len(stack) != 1:
            raise FrameError(f"bad-pixel mask {stack.source.name} holds {len(stack)} frames; expected one 2-D mask")
        mask = np.asarray(stack[0])
        if mask.dtype.kind == "f" and not np.isfinite(mask).all():
            raise FrameError(f"bad-pixel mask {stack.source.name} contains NaN or infinite values")
        mask = mask != 0
    if frame_shape is not None and mask.shape != tuple(frame_shape):
        raise FrameError(f"bad-pixel mask {Path(path).name} is {_shape_text(mask.shape)} but the frames are "
                         f"{_shape_text(frame_shape)}")
    return mask
