"""Forward-model pieces of a real microscope, used by :func:`latticeread.core.simulate.simulate_frames`.

Each function draws one imperfection with a seeded generator and returns what it put in, so
the truth can be saved:

* :func:`hot_pixels`: pixels with a large dark charge, the same in every frame.
* :func:`cosmic_rays`: charge deposited by particles: short streaks and small round blobs.

The sizes are invented but of the usual order for scientific cameras (tens to thousands of
electrons per hit, a few hits per frame; common practice, no source).
"""

from __future__ import annotations

import numpy as np

__all__ = ["hot_pixels", "cosmic_rays"]


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
