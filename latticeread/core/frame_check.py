"""Does the site model explain the frame? Three numbers per frame, and warnings when it does not.

1. **Light outside the analysed region**: photons above the fitted background outside the
   region the fit reads, as a share of all photons above background in the frame. Atoms
   outside the region (a region drawn around the wrong patch, a cloud larger than the
   calibration's) are never counted.
2. **Residual against the camera's noise**: in boxes around the brightest spot of each of
   3 x 3 zones of the region, the mean of ``(data - model)^2 / variance(model)`` with the
   variance from :meth:`CameraModel.photon_variance` (a reduced chi-square; 1 when the model
   is right and the camera description too; common practice, no source). A wrong PSF,
   background or camera description shows as a ratio well above 1, in one zone (a PSF
   that changes across the field) or everywhere.
3. **Bright light accounted for**: in the same boxes, the share of the light above
   background in bright pixels (more than 5 noise standard deviations above it) that the
   model puts there.

Only meaningful when amplitudes are photons (a camera description was given): with the
default camera (1 count = 1 photon) the noise check is skipped and said so.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from latticeread.core.camera import CameraModel

__all__ = ["FrameCheck", "check_frame", "limits_text", "OUTSIDE_WARN", "OUTSIDE_REFUSE", "RESIDUAL_WARN", "EXPLAINED_WARN",
           "camera_is_described", "amplitude_unit"]

#: Share of the light outside the analysed region above which a frame is flagged.
OUTSIDE_WARN = 0.2
#: Share of the light outside the region above which calibration refuses the region.
OUTSIDE_REFUSE = 0.5
#: Reduced chi-square (whole region, or one zone) above which a frame is flagged.
RESIDUAL_WARN = 2.0
#: Share of bright light the model must account for.
EXPLAINED_WARN = 0.8
#: Start of every warning written by :func:`check_frame`.
WARNING_PREFIX = "image model"

_BOX = 8  # half-size of the sampled boxes, pixels


def camera_is_described(camera: CameraModel) -> bool:
    """True when counts are converted to photons by a camera description (not 1 count = 1 photon)."""
    return camera != CameraModel()


def limits_text() -> str:
    """What the numbers of :meth:`FrameCheck.describe` mean and when a frame is warned about."""
    return (f"outside: share of the light above background outside the analysed region (warning above "
            f"{100 * OUTSIDE_WARN:.0f} %); residual: the image model's residual over the camera's expected noise "
            f"(1 = as expected; warning above {RESIDUAL_WARN:g}); explains: share of the bright light the site "
            f"model accounts for (warning below {100 * EXPLAINED_WARN:.0f} %)")


def amplitude_unit(camera: CameraModel) -> str:
    """``"photons"`` when the camera description makes amplitudes photons, else ``"counts"``."""
    return "photons" if camera_is_described(camera) else "counts"


@dataclass(frozen=True)
class FrameCheck:
    """How well the site model explains one frame.

    Attributes
    ----------
    outside_fraction : float
        Share of the light above background that lies outside the analysed region (0..1).
    residual_ratio : float
        Mean squared residual over the camera's expected variance in the sampled boxes
        (1 = as expected); NaN without a camera description.
    zone_ratios : (3, 3) ndarray
        The same per zone of the region (rows, columns); NaN where nothing was sampled.
    explained_fraction : float
        Share of the bright light in the sampled boxes that the model accounts for (0..1).
    warnings : tuple of str
    """

    outside_fraction: float
    residual_ratio: float
    zone_ratios: np.ndarray
    explained_fraction: float
    warnings: tuple[str, ...] = ()

    def describe(self) -> str:
        """One short line for the window: the three numbers (their warning levels are in
        :func:`limits_text`)."""
        parts = [f"outside {100 * self.outside_fraction:.0f} %"]
        parts.append(f"residual {self.residual_ratio:.2f}× noise" if np.isfinite(self.residual_ratio)
                     else "residual not compared (no camera description)")
        if np.isfinite(self.explained_fraction):
            parts.append(f"explains {100 * self.explained_fraction:.0f} %")
        return f"{WARNING_PREFIX}: " + " · ".join(parts)

    def to_dict(self) -> dict:
        return {"outside_fraction": self.outside_fraction, "residual_ratio": self.residual_ratio,
                "zone_ratios": np.round(self.zone_ratios, 4).tolist(),
                "explained_fraction": self.explained_fraction}


def outside_light(photons, *, crop, background: float, camera: CameraModel | None = None, exclude=None) -> float:
    """Share of the significant light above background that lies outside ``crop`` (0..1).

    The frame is binned 2 x 2 and smoothed over 3 x 3 bins (6 x 6 pixels) so that its noise is
    nearly Gaussian; the reference level is the smaller of ``background`` (the fit's, photons
    per pixel) and the median outside the region (a fit that absorbs unmodelled atoms raises
    its background); only bins more than 3 noise standard deviations above it count.
    Pixels in ``exclude`` (hot pixels, hits, NaN) are replaced by the reference.
    """
    photons = np.asarray(photons, dtype=float)
    camera = camera or CameraModel()
    inside = np.zeros(photons.shape, bool)
    inside[crop] = True
    if inside.all():
        return 0.0
    bad = ~np.isfinite(photons)
    if exclude is not None:
        bad |= np.asarray(exclude, dtype=bool)
    h, w = (photons.shape[0] // 2) * 2, (photons.shape[1] // 2) * 2
    if h == 0 or w == 0:
        return 0.0
    usable_outside = ~inside[:h, :w] & ~bad[:h, :w]
    any_outside = bool(usable_outside.any())
    # 2 x 2 bins holding a pixel of the region: those of its rows times those of its columns
    # (the region is a rectangle)
    in_bins = np.outer(inside[:h, :w].any(axis=1).reshape(h // 2, 2).any(axis=1),
                       inside[:h, :w].any(axis=0).reshape(w // 2, 2).any(axis=1))
    out_bins = ~in_bins
    any_out_bins = bool(out_bins.any())
    ref = float(background)
    bad_here = bool(bad[:h, :w].any())
    # the pixels' median is the fill value of excluded pixels, and the reference when no bin lies
    # wholly outside the region; otherwise it is not needed (the bins' median replaces it)
    if any_outside and (bad_here or not any_out_bins):
        ref = min(ref, float(np.median(photons[:h, :w][usable_outside])))
    clean = np.where(bad, ref, photons)[:h, :w] if bad_here else photons[:h, :w]
    # 2 x 2 means, summed in the order of ``mean(axis=(1, 3))`` on the (h/2, 2, w/2, 2) view
    # (pairs along a row first): the same values, without the slow strided reduction
    binned = ((clean[0::2, 0::2] + clean[0::2, 1::2]) + (clean[1::2, 0::2] + clean[1::2, 1::2])) / 4
    smooth = ndimage.uniform_filter(binned, 3, mode="nearest")
    if any_outside and any_out_bins:  # the smoothed median is nearly unbiased
        ref = min(float(background), float(np.median(smooth[out_bins])))
    sigma = np.sqrt(camera.photon_variance(np.array([max(ref, 0.0)]))[0] / 36.0)
    excess = smooth - ref
    significant = excess > 3 * max(sigma, 1e-9)
    out = float(np.sum(excess[significant & ~in_bins]))
    total_in = float(np.sum(excess[significant & in_bins]))
    return out / (out + total_in) if out + total_in > 0 else 0.0


def check_frame(photons, *, crop, x, y, amplitudes, background: float, model, camera: CameraModel,
                exclude=None, unit: str = "photons") -> FrameCheck:
    """The three checks of the module notes for one fitted frame.

    Parameters
    ----------
    photons : (H, W) ndarray
        The whole frame in photons (or counts) per pixel.
    crop : (slice, slice)
        The region the fit reads.
    x, y, amplitudes : (N,) ndarray
        Fitted sites (pixels) and their amplitudes.
    background : float
        Fitted background per pixel.
    model : latticeread.core.artefacts.PixelModel
        The PSF tabulated for evaluating the site model at pixels.
    camera : CameraModel
    exclude : (H, W) ndarray of bool, optional
        Pixels left out of the fit (hot pixels, cosmic-ray hits, NaN).
    unit : str
        Unit of ``photons`` for the messages.

    Returns
    -------
    FrameCheck
    """
    photons = np.asarray(photons, dtype=float)
    bad = ~np.isfinite(photons)
    if exclude is not None:
        bad |= np.asarray(exclude, dtype=bool)
    warnings = []
    frac = outside_light(photons, crop=crop, background=background, camera=camera, exclude=bad)
    if frac > OUTSIDE_WARN:
        warnings.append(f"{WARNING_PREFIX}: {100 * frac:.0f} % of the light above background lies outside the "
                        "analysed region; atoms there are not counted (recalibrate on frames like this one)")
    described = camera_is_described(camera)
    zones = np.full((3, 3), np.nan)
    sub = photons[crop]
    h, w = sub.shape
    if h < 2 * _BOX + 1 or w < 2 * _BOX + 1:
        return FrameCheck(frac, float("nan"), zones, float("nan"), tuple(warnings))
    y0, x0 = crop[0].start or 0, crop[1].start or 0
    smooth = ndimage.uniform_filter(np.where(bad[crop], background, sub), 5, mode="nearest")
    chi_all, n_all, bright_data, bright_model = 0.0, 0, 0.0, 0.0
    sigma_bg = float(np.sqrt(camera.photon_variance(np.array([max(background, 0.0)]))[0]))
    x, y, amplitudes = (np.asarray(v, dtype=float) for v in (x, y, amplitudes))
    for i in range(3):
        for j in range(3):
            r0, r1 = i * h // 3, (i + 1) * h // 3
            c0, c1 = j * w // 3, (j + 1) * w // 3
            zone = smooth[r0:r1, c0:c1]
            if zone.size == 0:
                continue
            pr, pc = np.unravel_index(int(np.argmax(zone)), zone.shape)
            cr = int(np.clip(r0 + pr, _BOX, h - _BOX - 1))
            cc = int(np.clip(c0 + pc, _BOX, w - _BOX - 1))
            rows, cols = np.mgrid[cr - _BOX:cr + _BOX + 1, cc - _BOX:cc + _BOX + 1]
            rows, cols = rows.ravel() + y0, cols.ravel() + x0
            keep = ~bad[rows, cols]
            rows, cols = rows[keep], cols[keep]
            if rows.size == 0:
                continue
            data = photons[rows, cols]
            pred = model(rows, cols, x=x, y=y, amplitudes=amplitudes, background=background)
            if described:
                var = camera.photon_variance(np.maximum(pred, 0.0))
                ratio = (data - pred) ** 2 / np.maximum(var, 1e-12)
                zones[i, j] = float(np.mean(ratio))
                chi_all += float(np.sum(ratio))
                n_all += ratio.size
            bright = data > background + 5 * sigma_bg
            bright_data += float(np.sum(data[bright] - background))
            bright_model += float(np.sum(pred[bright] - background))
    ratio_all = chi_all / n_all if n_all else float("nan")
    explained = min(1.0, bright_model / bright_data) if bright_data > 0 else float("nan")
    if described and np.isfinite(ratio_all) and ratio_all > RESIDUAL_WARN:
        warnings.append(f"{WARNING_PREFIX}: the residual is {ratio_all:.1f} times the camera's expected noise "
                        "(wrong PSF, background or camera description?)")
    elif described and np.nanmax(zones) > 1.5 * RESIDUAL_WARN:
        i, j = np.unravel_index(int(np.nanargmax(zones)), zones.shape)
        where = ("top", "middle", "bottom")[i] + "-" + ("left", "centre", "right")[j]
        warnings.append(f"{WARNING_PREFIX}: in the {where} of the region the residual is {zones[i, j]:.1f} times "
                        "the camera's expected noise (a PSF that changes across the field?)")
    if np.isfinite(explained) and explained < EXPLAINED_WARN:
        warnings.append(f"{WARNING_PREFIX}: the site model accounts for only {100 * explained:.0f} % of the bright "
                        f"light ({unit}) near the brightest spots")
    return FrameCheck(frac, float(ratio_all), zones, float(explained), tuple(warnings))
