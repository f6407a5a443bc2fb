"""argparse value types shared by the commands: numbers checked against their allowed range.

A value outside its range is a usage error (exit code 2) with a message that names the
range and the unit, before any file is read.
"""

from __future__ import annotations

import argparse
import math


def number(*, low: float | None = None, high: float | None = None, low_open: bool = False,
           integer: bool = False, unit: str = ""):
    """An argparse ``type`` accepting a finite number in ``[low, high]`` (``(low, high]`` if ``low_open``)."""
    if integer:
        kind = "a whole number"
    else:
        kind = "a number"
    if low is not None and high is not None:
        bounds = f"{'above' if low_open else 'from'} {low:g} {'up to' if low_open else 'to'} {high:g}"
    elif low is not None:
        bounds = f"{'above' if low_open else 'at least'} {low:g}"
    elif high is not None:
        bounds = f"at most {high:g}"
    else:
        bounds = ""
    what = f"{kind} {bounds}".strip() + (f" {unit}" if unit else "")

    def parse(text: str):
        try:
            value = int(text) if integer else float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be {what}, got {text!r}") from None
        ok = math.isfinite(value)
        if ok and low is not None:
            ok = value > low if low_open else value >= low
        if ok and high is not None:
            ok = value <= high
        if not ok:
            raise argparse.ArgumentTypeError(f"must be {what}, got {text!r}")
        return value

    parse.__name__ = "number"  # argparse shows the type name in some messages
    return parse


def psf_fwhm(text: str) -> float:
    """``--fwhm``: PSF full width at half maximum in pixels, within the calibration limits."""
    from latticeread.io.limits import MAX_PSF_FWHM_PX

    return number(low=0, high=MAX_PSF_FWHM_PX, low_open=True, unit="pixels")(text)


def lattice_spacing(text: str) -> float:
    """``--lattice-spacing``: at least the Nyquist limit of two pixels per site."""
    from latticeread.io.limits import MIN_SPACING_PX

    return number(low=MIN_SPACING_PX, high=65535, unit="pixels (two pixels per site at least: Nyquist)")(text)


def pixel_size_nm(text: str) -> float:
    """``--pixel-size-nm``: the camera pixel in the atom plane, within the calibration limits."""
    from latticeread.io.limits import PIXEL_SIZE_NM_RANGE

    lo, hi = PIXEL_SIZE_NM_RANGE
    return number(low=lo, high=hi, unit="nm")(text)
