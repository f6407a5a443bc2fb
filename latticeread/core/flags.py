"""Per-site quality flags, defined once and decoded by one function.

Flags are bits of a ``uint8`` per site; 0 means the site is reliable.
"""

from __future__ import annotations

import numpy as np

__all__ = ["SITE_FLAGS", "EDGE", "MASKED", "SATURATED", "NONFINITE", "UNCERTAIN", "POOR_FIT", "ARTEFACT", "EXCLUDED",
           "decode_flags"]

EDGE = 1        #: the PSF window of the site is cut by the frame border
MASKED = 2      #: the site touches bad pixels or lies outside the region of interest
SATURATED = 4   #: a pixel under the site reached the camera's saturation value
NONFINITE = 8   #: NaN or inf pixels under the site (they were ignored)
UNCERTAIN = 16  #: posterior probability between 0.1 and 0.9: the classification may be wrong
POOR_FIT = 32   #: the lattice fit of this frame was of poor quality
ARTEFACT = 64   #: a cosmic-ray hit or hot pixel under the site was left out of the fit
EXCLUDED = 128  #: outside the analysed region or excluded by the user: fitted, not analysed (no result)

SITE_FLAGS = {
    EDGE: "edge: PSF window cut by the frame border",
    MASKED: "masked: touches bad pixels or lies outside the region of interest",
    SATURATED: "saturated: a pixel reached the camera's saturation value",
    NONFINITE: "nonfinite: NaN or inf pixels under the site were ignored",
    UNCERTAIN: "uncertain: posterior between 0.1 and 0.9",
    POOR_FIT: "poor lattice fit in this frame",
    ARTEFACT: "artefact: a cosmic-ray hit or hot pixel under the site was left out of the fit",
    EXCLUDED: "excluded: outside the analysed region or excluded by the user (no result)",
}


def decode_flags(flags) -> list[str]:
    """Names of the flags set in one integer ``flags`` value."""
    flags = int(flags)
    return [text.split(":")[0] for bit, text in SITE_FLAGS.items() if flags & bit]


def count_flags(flags) -> dict[str, int]:
    """How many sites carry each flag, for summaries."""
    flags = np.asarray(flags, dtype=np.uint8)
    return {text.split(":")[0]: int(np.count_nonzero(flags & bit)) for bit, text in SITE_FLAGS.items()}
