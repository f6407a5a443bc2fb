"""Size and value limits checked before anything large is allocated.

Two kinds of input can make the program allocate far more memory than the file is large:

- a frame file whose header declares huge frames (a compressed TIFF of a few hundred bytes
  can declare 60000 x 60000 pixels); :func:`check_frame_memory` compares what analysing
  such frames would need with the memory available, from the declared shape and type only,
  before a single pixel is decoded;
- a calibration file with values outside any physical imaging setting (a lattice spacing
  of 0.3 pixel, a PSF radius of 100000 pixels, a supersampling of 0); such values would
  make the program build enormous kernels or divide by zero. :func:`check_calibration_values`
  refuses them with a message naming the key and the allowed range.

The ranges are deliberately wide: they exclude only values no camera image of lattice
atoms can have. Where a range has a source it is named beside it.
"""

from __future__ import annotations

import math
import os

from latticeread.core.classify import MAX_THRESHOLD_PHOTONS, check_threshold  # noqa: F401 - the one threshold check
from latticeread.errors import CalibrationError, FrameFileError

__all__ = ["available_memory", "check_frame_memory", "memory_shortfall", "describe_bytes", "check_calibration_values", "check_threshold",
           "BYTES_PER_PIXEL_AT_WORK", "MEMORY_FRACTION", "MIN_SPACING_PX", "MAX_PSF_FWHM_PX", "PIXEL_SIZE_NM_RANGE"]

#: Memory the analysis of one frame takes per pixel: the frame as float64 plus the model,
#: residual, weights and a few temporaries of the same size (about six float64 images).
#: Estimated from the pipeline's arrays, no source.
BYTES_PER_PIXEL_AT_WORK = 48
#: Fraction of the available memory one frame (or one stack read at once) may take.
MEMORY_FRACTION = 0.5

#: Smallest lattice spacing in pixels: sampling a periodic pattern needs at least two samples
#: per period (Nyquist-Shannon sampling theorem), otherwise sites alias onto each other.
MIN_SPACING_PX = 2.0
#: Largest PSF radius (kernel half-width) in pixels; common practice, no source: a kernel
#: truncated at 3 FWHM covers PSFs up to about 65 pixels FWHM, far beyond any microscope here.
MAX_PSF_RADIUS_PX = 200
#: Largest PSF FWHM in pixels: with the kernel cut at about 3 FWHM it stays within
#: MAX_PSF_RADIUS_PX (common practice, no source).
MAX_PSF_FWHM_PX = 60.0
#: Supersampling of the PSF per pixel (the program's default is 5); common practice, no source.
SUPERSAMPLE_RANGE = (1, 32)
#: Largest supersampled kernel (elements) built from a calibration: 4096 x 4096 float64 = 128 MiB.
MAX_KERNEL_ELEMENTS = 4096 * 4096
#: Largest frame side in pixels stored in a calibration (TIFF and camera sensors stay below).
MAX_FRAME_SIDE = 65535
#: Pixel size projected into the atom plane, nm: from a few nm to 0.1 mm covers every
#: microscope objective and magnification (common practice, no source).
PIXEL_SIZE_NM_RANGE = (1.0, 1e5)


def available_memory() -> int:
    """Bytes of memory available to a new allocation (``MemAvailable`` on Linux).

    Falls back to the physical memory (``os.sysconf``) where ``/proc/meminfo`` does not
    exist, and to 4 GiB when neither is known.
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_AVPHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        return 4 << 30


def _gib(n: float) -> str:
    return f"{n / (1 << 30):.1f} GiB" if n >= (1 << 30) else f"{n / (1 << 20):.0f} MiB"


def check_frame_memory(frame_shape, *, where: str, n_frames: int = 1, itemsize: int | None = None,
                       available: int | None = None) -> None:
    """Refuse frames whose analysis would not fit in memory, from their declared shape only.

    Parameters
    ----------
    frame_shape : (int, int)
        Declared ``(height, width)`` in pixels.
    where : str
        The file (and dataset) for the message.
    n_frames : int
        Frames held in memory at once (1 when frames are read one at a time).
    itemsize : int, optional
        Bytes per pixel when the frames are only held, not analysed (a whole stack read at
        once); default: the working memory of the analysis, :data:`BYTES_PER_PIXEL_AT_WORK`.
    available : int, optional
        Bytes available (default: :func:`available_memory`).

    Raises
    ------
    FrameFileError
        The frames would need more than :data:`MEMORY_FRACTION` of the available memory.
    """
    h, w = (int(v) for v in frame_shape)
    short = memory_shortfall(frame_shape, n_frames=n_frames, itemsize=itemsize, available=available)
    if short is not None:
        need, have = short
        count = "" if n_frames <= 1 else f"{int(n_frames)} "
        raise FrameFileError(
            f"{where} declares {count}{h}x{w}-pixel frame{'s' if n_frames > 1 else ''}: analysing "
            f"{'them' if n_frames > 1 else 'it'} would need about {_gib(need)} of memory but only {_gib(have)} is "
            "available; the file is damaged or not a camera frame file, or crop the frames first")


def memory_shortfall(frame_shape, *, n_frames: int = 1, itemsize: int | None = None,
                     available: int | None = None) -> tuple[float, int] | None:
    """``(bytes needed, bytes available)`` when frames would not fit, else None.

    See :func:`check_frame_memory` for the parameters.
    """
    h, w = (int(v) for v in frame_shape)
    per_pixel = BYTES_PER_PIXEL_AT_WORK if itemsize is None else int(itemsize)
    need = float(h) * float(w) * float(max(1, int(n_frames))) * per_pixel
    have = available_memory() if available is None else int(available)
    return (need, have) if need > MEMORY_FRACTION * have else None


def describe_bytes(n: float) -> str:
    """``"1.5 GiB"`` or ``"300 MiB"``."""
    return _gib(n)


def _spacing(v) -> float:
    return math.hypot(float(v[0]), float(v[1]))


def check_calibration_values(data: dict, *, where: str = "calibration") -> None:
    """Refuse calibration values outside the physical ranges of lattice imaging.

    ``data`` is the calibration as a JSON object whose keys have already been checked for
    presence and type (lengths in pixels, thresholds in photons). Checked: lattice vector
    lengths (at least :data:`MIN_SPACING_PX`, at most the frame size) and that they are not
    parallel; PSF FWHM, radius and supersampling; frame size; threshold; pixel size.

    Raises
    ------
    CalibrationError
        The first value out of range, naming the key, the value and the allowed range.
    """
    shape = data.get("frame_shape")
    if shape is not None:
        h, w = (int(v) for v in shape)
        if not (1 <= h <= MAX_FRAME_SIDE and 1 <= w <= MAX_FRAME_SIDE):
            raise CalibrationError(f"{where}: frame_shape {h}x{w} pixels is outside 1..{MAX_FRAME_SIDE} pixels per side")
        side = max(h, w)
    else:
        side = MAX_FRAME_SIDE
    geometry = data.get("geometry") or {}
    vectors = [geometry.get(k) for k in ("a1", "a2")]
    for key, v in zip(("a1", "a2"), vectors):
        if v is None:
            continue
        d = _spacing(v)
        if not math.isfinite(d) or d < MIN_SPACING_PX or d > side:
            raise CalibrationError(
                f"{where}: lattice vector geometry.{key} is {d:.4g} pixels long; a lattice spacing must be "
                f"between {MIN_SPACING_PX:g} pixels (two samples per period, the Nyquist limit) and the frame size "
                f"({side} pixels)")
    if all(v is not None for v in vectors):
        a1, a2 = vectors
        cross = abs(float(a1[0]) * float(a2[1]) - float(a1[1]) * float(a2[0]))
        if not cross > 0.1 * _spacing(a1) * _spacing(a2):
            raise CalibrationError(
                f"{where}: lattice vectors geometry.a1 and geometry.a2 are (nearly) parallel; they must span the "
                "plane (angle between them 6 to 174 degrees)")
    psf = data.get("psf") or {}
    fwhm = psf.get("fwhm")
    if fwhm is not None and not (math.isfinite(float(fwhm)) and 0 < float(fwhm) <= MAX_PSF_FWHM_PX):
        raise CalibrationError(f"{where}: psf.fwhm is {fwhm!r} pixels; it must be above 0 and at most "
                               f"{MAX_PSF_FWHM_PX:g} pixels")
    radius = psf.get("radius")
    if radius is not None and not (1 <= int(radius) <= MAX_PSF_RADIUS_PX):
        raise CalibrationError(f"{where}: psf.radius is {radius!r} pixels; the PSF kernel half-width must be "
                               f"between 1 and {MAX_PSF_RADIUS_PX} pixels")
    supersample = psf.get("supersample")
    lo, hi = SUPERSAMPLE_RANGE
    if supersample is not None and not (lo <= int(supersample) <= hi):
        raise CalibrationError(f"{where}: psf.supersample is {supersample!r}; the PSF is sampled {lo} to {hi} times "
                               "per pixel")
    if radius is not None and supersample is not None:
        n = (2 * int(radius) * int(supersample) + 1) ** 2
        if n > MAX_KERNEL_ELEMENTS:
            raise CalibrationError(
                f"{where}: psf.radius {radius} with psf.supersample {supersample} asks for a kernel of {n:.3g} "
                f"samples (at most {MAX_KERNEL_ELEMENTS:.3g}); lower the radius or the supersampling")
    if data.get("threshold") is not None:
        check_threshold(data["threshold"], where=f"{where}: threshold")
    pixel = data.get("pixel_size_nm")
    lo_nm, hi_nm = PIXEL_SIZE_NM_RANGE
    if pixel is not None and not (math.isfinite(float(pixel)) and lo_nm <= float(pixel) <= hi_nm):
        raise CalibrationError(f"{where}: pixel_size_nm is {pixel!r}; the camera pixel in the atom plane must be "
                               f"between {lo_nm:g} and {hi_nm:g} nm")
