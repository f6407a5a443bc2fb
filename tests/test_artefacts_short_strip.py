"""The cosmic-ray search on frames whose height leaves a short last strip of rows (crashed before)."""

import numpy as np
import pytest

from latticeread.core import artefacts
from latticeread.core.artefacts import bounds, find_artefacts
from latticeread.core.camera import CameraModel
from latticeread.core.psf import gaussian_psf


@pytest.mark.parametrize("height", [531, 53, 100])
def test_search_on_a_frame_with_a_short_last_strip(height, monkeypatch):
    # strips of 48 rows: 531 = 11 * 48 + 3 leaves a 3-row strip at the bottom edge
    rng = np.random.default_rng(1)
    image = rng.poisson(2.0, (height, 40)).astype(float)
    image[height - 2, 20] += 400.0  # a single bright pixel on the last rows: a hit, not a PSF
    camera = CameraModel()
    ks = bounds(gaussian_psf(fwhm=3.0))
    fast = find_artefacts(image, camera=camera, ks=ks)
    assert fast.mask[height - 2, 20]
    # the same mask as the whole-frame computation
    monkeypatch.setattr(artefacts, "_excess_windows", artefacts._excess_reference)
    slow = find_artefacts(image, camera=camera, ks=ks)
    assert np.array_equal(fast.mask, slow.mask)
