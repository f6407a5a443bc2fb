"""Forward-model pieces of a real microscope, used by :func:`latticeread.core.simulate.simulate_frames`.

Each function draws one imperfection with a seeded generator and returns what it put in, so
the truth can be saved:

* :func:`hot_pixels`: pixels with a large dark charge, the same in every frame.
* :func:`cosmic_rays`: charge deposited by particles: short streaks and small round blobs.
* :func:`illumination`: a Gaussian imaging beam: atoms at the edge shine less.
* :func:`structured_background`: stray light that changes from frame to frame.
* :func:`distort`: radial (barrel or pincushion) lens distortion of the site positions.
* :func:`field_psfs`: a PSF that worsens toward the edge of the field (aberrations from the pupil).

The sizes are invented but of the usual order for scientific cameras (tens to thousands of
electrons per hit, a few hits per frame; common practice, no source).
"""

from __future__ import annotations

import numpy as np

__all__ = ["hot_pixels", "cosmic_rays", "illumination", "structured_background", "distort", "aberrated_psf",
           "field_psfs"]


def hot_pixels(frame_shape, *, n: int, electrons=(50.0, 3000.0), rng) -> tuple[np.ndarray, np.ndarray]:
    """Positions and mean dark charge of ``n`` hot pixels.

    Parameters
    ----------
    frame_shape : (int, int)
        ``(height, width)``, pixels.
    n : int
        Number of hot pixels (distinct).
    electrons : (float, float)
        Range of the mean dark charge per exposure, electrons (log-uniform).
    rng : numpy.random.Generator

    Returns
    -------
    index : (n,) ndarray of int
        Flat pixel indices ``row * width + col``.
    mean_electrons : (n,) ndarray of float
        Mean dark electrons per exposure (each frame draws a Poisson number).
    """
    h, w = (int(s) for s in frame_shape)
    n = int(n)
    if n < 0 or n > h * w:
        raise ValueError(f"the number of hot pixels must be between 0 and {h * w}, got {n}")
    lo, hi = (float(v) for v in electrons)
    if not 0 < lo <= hi:
        raise ValueError(f"hot-pixel charge range must be positive and ordered, got {electrons}")
    index = rng.choice(h * w, size=n, replace=False)
    mean = np.exp(rng.uniform(np.log(lo), np.log(hi), size=n))
    return index.astype(np.int64), mean


def cosmic_rays(frame_shape, *, rate: float, electrons=(500.0, 3000.0), rng):
    """Charge deposited by the cosmic-ray hits of one frame.

    Half of the hits are streaks (a particle crossing the sensor at a slant: 3-10 pixels long,
    charge spread over a Gaussian of 0.4 pixel across the track), half round blobs (Gaussian of
    0.5-1.0 pixel radius). The number of hits is Poisson with mean ``rate``.

    Parameters
    ----------
    frame_shape : (int, int)
        ``(height, width)``, pixels.
    rate : float
        Mean number of hits per frame.
    electrons : (float, float)
        Range of the total charge of one hit, electrons (log-uniform).
    rng : numpy.random.Generator

    Returns
    -------
    index : (m,) ndarray of int
        Flat pixel indices holding deposited charge.
    charge : (m,) ndarray of float
        Electrons in each of those pixels.
    hit : (m,) ndarray of int
        Which hit (0-based, within this frame) each pixel belongs to.
    """
    if not np.isfinite(rate) or rate < 0:
        raise ValueError(f"the cosmic-ray rate must be a number of hits per frame >= 0, got {rate}")
    lo, hi = (float(v) for v in electrons)
    if not 0 < lo <= hi:
        raise ValueError(f"cosmic-ray charge range must be positive and ordered, got {electrons}")
    h, w = (int(s) for s in frame_shape)
    n_hits = int(rng.poisson(rate))
    indices, charges, hits = [], [], []
    for k in range(n_hits):
        total = float(np.exp(rng.uniform(np.log(lo), np.log(hi))))
        cx, cy = rng.uniform(0, w - 1), rng.uniform(0, h - 1)
        if rng.random() < 0.5:  # streak
            length = rng.uniform(3.0, 10.0)
            angle = rng.uniform(0, np.pi)
            t = np.linspace(-length / 2, length / 2, int(np.ceil(length * 4)) + 1)
            px, py = cx + t * np.cos(angle), cy + t * np.sin(angle)
            width = 0.4
        else:
            px, py = np.array([cx]), np.array([cy])
            width = rng.uniform(0.5, 1.0)
        r = int(np.ceil(3 * width + 1))
        x0, x1 = int(np.floor(px.min())) - r, int(np.ceil(px.max())) + r
        y0, y1 = int(np.floor(py.min())) - r, int(np.ceil(py.max())) + r
        yy, xx = np.mgrid[max(0, y0):min(h, y1 + 1), max(0, x0):min(w, x1 + 1)]
        if yy.size == 0:
            continue
        dens = np.zeros(yy.shape)
        for qx, qy in zip(px, py):
            dens += np.exp(-((xx - qx) ** 2 + (yy - qy) ** 2) / (2 * width**2))
        dens *= total / dens.sum() if dens.sum() > 0 else 0.0
        keep = dens > 0.5  # charge below half an electron is not worth keeping
        indices.append((yy[keep] * w + xx[keep]).astype(np.int64))
        charges.append(dens[keep])
        hits.append(np.full(int(keep.sum()), k, np.int64))
    if not indices:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros(0, np.int64)
    return np.concatenate(indices), np.concatenate(charges), np.concatenate(hits)


def illumination(x, y, *, frame_shape, waist: float, centre=(0.0, 0.0)) -> np.ndarray:
    """Relative brightness of atoms at ``(x, y)`` in a Gaussian imaging beam.

    Parameters
    ----------
    x, y : (N,) ndarray
        Site positions, pixels.
    frame_shape : (int, int)
        ``(height, width)``, pixels.
    waist : float
        1/e^2 intensity radius of the beam in the atom plane, pixels.
    centre : (float, float)
        Beam centre relative to the frame centre, pixels ``(dx, dy)``.

    Returns
    -------
    (N,) ndarray
        ``exp(-2 r^2 / waist^2)``, 1 at the beam centre (Gaussian beam intensity profile;
        common practice, no source).
    """
    if not np.isfinite(waist) or waist <= 0:
        raise ValueError(f"the beam waist must be a positive number of pixels, got {waist}")
    h, w = frame_shape
    cx, cy = (w - 1) / 2 + float(centre[0]), (h - 1) / 2 + float(centre[1])
    r2 = (np.asarray(x, float) - cx) ** 2 + (np.asarray(y, float) - cy) ** 2
    return np.exp(-2.0 * r2 / float(waist) ** 2)


def structured_background(frame_shape, *, amplitude: float, rng) -> tuple[np.ndarray, dict]:
    """One frame's stray light: a linear gradient and two broad humps, photons per pixel.

    Parameters
    ----------
    frame_shape : (int, int)
    amplitude : float
        Peak photons per pixel of each part (the gradient spans 0..amplitude across the
        frame; the humps peak at 0.5-1.0 x amplitude, radius 1/8-1/4 of the frame).
    rng : numpy.random.Generator

    Returns
    -------
    background : (H, W) ndarray
        Photons per pixel (>= 0) to add to the uniform background.
    params : dict
        What was drawn (gradient direction, hump centres, radii and heights).
    """
    if not np.isfinite(amplitude) or amplitude < 0:
        raise ValueError(f"the structured background must be >= 0 photons per pixel, got {amplitude}")
    h, w = (int(s) for s in frame_shape)
    yy, xx = np.mgrid[0:h, 0:w].astype(float)
    angle = float(rng.uniform(0, 2 * np.pi))
    u = ((xx - (w - 1) / 2) * np.cos(angle) + (yy - (h - 1) / 2) * np.sin(angle)) / max(h, w)
    out = amplitude * (u - u.min()) / max(u.max() - u.min(), 1e-12)
    humps = []
    for _ in range(2):
        cx, cy = float(rng.uniform(0, w - 1)), float(rng.uniform(0, h - 1))
        radius = float(rng.uniform(1 / 8, 1 / 4) * min(h, w))
        height = float(rng.uniform(0.5, 1.0) * amplitude)
        out += height * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * radius**2))
        humps.append([cx, cy, radius, height])
    return out, {"gradient_angle": angle, "humps": humps}


def distort(x, y, *, frame_shape, k1: float, centre=(0.0, 0.0)) -> tuple[np.ndarray, np.ndarray]:
    """Radial lens distortion of positions: ``p' = c + (p - c)(1 + k1 |p - c|^2)``.

    ``k1 < 0`` is barrel, ``k1 > 0`` pincushion distortion (the lowest-order radial term of
    the usual lens-distortion model; common practice, no source).

    Parameters
    ----------
    x, y : ndarray
        Positions, pixels.
    frame_shape : (int, int)
    k1 : float
        Radial coefficient, 1 / pixels^2.
    centre : (float, float)
        Distortion centre relative to the frame centre, pixels.
    """
    h, w = frame_shape
    cx, cy = (w - 1) / 2 + float(centre[0]), (h - 1) / 2 + float(centre[1])
    dx, dy = np.asarray(x, float) - cx, np.asarray(y, float) - cy
    f = 1.0 + float(k1) * (dx**2 + dy**2)
    return cx + dx * f, cy + dy * f


def aberrated_psf(*, lambda_over_na: float, defocus: float = 0.0, astigmatism=(0.0, 0.0), coma=(0.0, 0.0),
                  supersample: int = 2, radius: int | None = None):
    """PSF of a circular pupil with Zernike aberrations (waves rms), as an empirical PSFModel.

    The intensity is ``|FT(P exp(2 pi i W))|^2`` with the pupil ``P`` and the wavefront
    ``W = defocus sqrt(3)(2 r^2 - 1) + astigmatism_0 sqrt(6) r^2 cos 2t + astigmatism_45
    sqrt(6) r^2 sin 2t + coma_x sqrt(8)(3 r^3 - 2 r) cos t + coma_y sqrt(8)(3 r^3 - 2 r) sin t``
    (Noll-normalised Zernike polynomials; Noll, J. Opt. Soc. Am. 66, 207 (1976); from memory).
    Without aberrations it is the Airy pattern of FWHM 0.5145 lambda/NA (Born & Wolf).

    Parameters
    ----------
    lambda_over_na : float
        Wavelength over numerical aperture in pixels of the atom plane.
    defocus, astigmatism, coma :
        Zernike coefficients, waves rms.
    supersample : int
        Kernel samples per pixel.
    radius : int, optional
        Stamp half-size in pixels (default: the Airy PSF's).
    """
    from latticeread.core.psf import airy_psf, empirical_psf

    s = int(supersample)
    n = 1 << int(np.ceil(np.log2(max(128.0, 8 * s * float(lambda_over_na)))))  # pupil >= 8 samples in radius
    pupil_radius = n / (s * float(lambda_over_na))  # pupil radius in FFT samples (sample = 1/s pixel)
    if pupil_radius < 6:
        raise ValueError("the PSF is too wide for the pupil grid; use a smaller supersample")
    v = (np.arange(n) - n // 2) / pupil_radius
    px, py = np.meshgrid(v, v)
    r2 = px**2 + py**2
    inside = r2 <= 1.0
    r = np.sqrt(r2)
    t = np.arctan2(py, px)
    wave = (defocus * np.sqrt(3) * (2 * r2 - 1) + astigmatism[0] * np.sqrt(6) * r2 * np.cos(2 * t) +
            astigmatism[1] * np.sqrt(6) * r2 * np.sin(2 * t) +
            coma[0] * np.sqrt(8) * (3 * r**3 - 2 * r) * np.cos(t) + coma[1] * np.sqrt(8) * (3 * r**3 - 2 * r) * np.sin(t))
    field = np.where(inside, np.exp(2j * np.pi * wave), 0.0)
    psf = np.abs(np.fft.fftshift(np.fft.fft2(np.fft.ifftshift(field)))) ** 2
    ideal = airy_psf(wavelength_nm=float(lambda_over_na), numerical_aperture=1.0, pixel_size_nm=1.0)
    r_px = int(radius) if radius is not None else int(ideal.radius)
    half = (r_px + 3) * s
    c = n // 2
    kernel = psf[c - half:c + half + 1, c - half:c + half + 1]
    return empirical_psf(kernel, supersample=s, fwhm=_kernel_fwhm(kernel, s), radius=r_px,
                         defocus=float(defocus), astigmatism=list(map(float, astigmatism)),
                         coma=list(map(float, coma)))


def _kernel_fwhm(kernel, s: int) -> float:
    """Mean FWHM (pixels) of a centred kernel: area above half maximum as a disk diameter."""
    area = np.count_nonzero(kernel >= 0.5 * kernel.max()) / s**2
    return float(2 * np.sqrt(area / np.pi))


def field_psfs(*, frame_shape, lambda_over_na: float, strength: float, zones: int = 4, supersample: int = 2):
    """PSFs in ``zones x zones`` tiles of the field, aberrations growing toward the edge.

    At normalised field height ``h`` (0 at the frame centre, 1 at a corner): defocus (field
    curvature) and astigmatism (oriented along the radius) grow as ``h^2``, coma as ``h``,
    all scaled by ``strength`` (waves rms at the corner; Seidel field dependence, common
    practice, no source).

    Returns
    -------
    psfs : list of PSFModel
        Row-major over the tiles.
    centres : (zones * zones, 2) ndarray
        Tile centres ``(x, y)``, pixels.
    """
    h, w = frame_shape
    psfs, centres = [], []
    half_diag = np.hypot((w - 1) / 2, (h - 1) / 2)
    for i in range(zones):
        for j in range(zones):
            cx, cy = (j + 0.5) * w / zones - 0.5, (i + 0.5) * h / zones - 0.5
            dx, dy = (cx - (w - 1) / 2) / half_diag, (cy - (h - 1) / 2) / half_diag
            hh = np.hypot(dx, dy)
            phi = np.arctan2(dy, dx)
            psfs.append(aberrated_psf(lambda_over_na=lambda_over_na, defocus=0.5 * strength * hh**2,
                                      astigmatism=(strength * hh**2 * np.cos(2 * phi), strength * hh**2 * np.sin(2 * phi)),
                                      coma=(0.7 * strength * hh * np.cos(phi), 0.7 * strength * hh * np.sin(phi)),
                                      supersample=supersample))
            centres.append((cx, cy))
    return psfs, np.array(centres)
