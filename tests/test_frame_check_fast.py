"""The light-outside check computed the quick way gives exactly the straightforward computation's value."""

import numpy as np
import pytest
from scipy import ndimage

from latticeread.core.camera import CameraModel
from latticeread.core.frame_check import outside_light


def _outside_light_reference(photons, *, crop, background, camera, exclude=None):
    """The straightforward computation (every pixel's median first, 4-D mean for the 2 x 2 bins)."""
    photons = np.asarray(photons, dtype=float)
    inside = np.zeros(photons.shape, bool)
    inside[crop] = True
    if inside.all():
        return 0.0
    bad = ~np.isfinite(photons)
    if exclude is not None:
        bad |= np.asarray(exclude, dtype=bool)
    h, w = (photons.shape[0] // 2) * 2, (photons.shape[1] // 2) * 2
    outside_pixels = photons[:h, :w][~inside[:h, :w] & ~bad[:h, :w]]
    ref = float(background)
    if outside_pixels.size:
        ref = min(ref, float(np.median(outside_pixels)))
    clean = np.where(bad, ref, photons)[:h, :w]
    binned = clean.reshape(h // 2, 2, w // 2, 2).mean(axis=(1, 3))
    smooth = ndimage.uniform_filter(binned, 3, mode="nearest")
    in_bins = inside[:h, :w].reshape(h // 2, 2, w // 2, 2).any(axis=(1, 3))
    if outside_pixels.size:
        out_bins = ~in_bins
        if out_bins.any():
            ref = min(float(background), float(np.median(smooth[out_bins])))
    sigma = np.sqrt(camera.photon_variance(np.array([max(ref, 0.0)]))[0] / 36.0)
    excess = smooth - ref
    significant = excess > 3 * max(sigma, 1e-9)
    out = float(np.sum(excess[significant & ~in_bins]))
    total_in = float(np.sum(excess[significant & in_bins]))
    return out / (out + total_in) if out + total_in > 0 else 0.0


CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


@pytest.mark.parametrize("case", ["clean", "nan and excluded", "region nearly the frame", "odd size"])
def test_outside_light_matches_the_straightforward_computation(case):
    rng = np.random.default_rng(7)
    shape = (121, 96) if case == "odd size" else (120, 96)
    photons = rng.poisson(2.0, shape).astype(float) * rng.uniform(0.5, 1.5, shape)
    photons[10:14, 70:74] += 60.0  # light outside the region
    photons[50:60, 40:50] += 30.0  # and inside
    crop = (slice(1, 119), slice(1, 95)) if case == "region nearly the frame" else (slice(30, 90), slice(20, 80))
    exclude = None
    if case == "nan and excluded":
        photons[5, 5] = np.nan
        exclude = np.zeros(shape, bool)
        exclude[100, 3] = exclude[40, 40] = True
    for background in (1.0, 3.0):
        fast = outside_light(photons, crop=crop, background=background, camera=CAMERA, exclude=exclude)
        slow = _outside_light_reference(photons, crop=crop, background=background, camera=CAMERA, exclude=exclude)
        assert fast == slow
    if case != "region nearly the frame":  # the check saw light on both sides
        assert 0.0 < fast < 1.0
