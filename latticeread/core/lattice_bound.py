"""How precisely one frame can fix the lattice: the Cramer-Rao bound on vectors and offset.

A frame's mean photon image is modelled as

    mu(p) = background + sum_k A_k * s(p - r_k),    r_k = offset + row_k * a1 + col_k * a2,

with ``s`` the pixel-integrated PSF stamp (the same model :mod:`latticeread.core.lattice_model`
fits). With Poisson photon noise the Fisher information of the parameters is
``F = J^T diag(1 / (excess * mu)) J`` (``J = d mu / d parameters``; ``excess`` = 2 for an EMCCD
at high gain, Robbins & Hadwen 2003), and no unbiased estimator has a covariance below
``F^-1`` (the Cramer-Rao bound; e.g. Kay, *Fundamentals of Statistical Signal Processing:
Estimation Theory*, 1993, ch. 3; for one emitter ``sigma_psf^2 / N`` without background and
pixels, Ober, Ram & Ward, Biophys. J. 86, 1185 (2004) -- quoted from memory). Parameters the
estimator must find but that are not asked about (background, atom brightnesses) are removed
with the Schur complement of ``F``.

The bound answers "is this precision target reachable from this frame at all?". Three
situations, from most to least known (``free=``):

``"none"``
    Occupation and brightness of every site known; only the geometry and the background are
    free. The floor for any method.
``"brightness"``
    Which sites hold an atom is known, each atom's brightness is free.
``"amplitudes"``
    Every site's amplitude is free and continuous: what a linear amplitude fit (least squares,
    weighted or not) faces, as does :func:`latticeread.core.lattice_model.refine_lattice_model`.

Units: pixels (x = column, y = row), photons, radians.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice_model import _PSFTable
from latticeread.core.psf import PSFModel

__all__ = ["LatticePrecision", "lattice_precision_bound", "FREE_PARAMETERS"]

#: Accepted values of ``free`` (see the module docstring).
FREE_PARAMETERS = ("none", "brightness", "amplitudes")


@dataclass(frozen=True)
class LatticePrecision:
    """Smallest 1-sigma errors any unbiased estimator can reach (Cramer-Rao).

    Attributes
    ----------
    spacing_relative : (float, float)
        Relative error of ``|a1|`` and ``|a2|`` (dimensionless).
    angle : (float, float)
        Error of the directions of ``a1`` and ``a2`` (radians).
    offset : float
        Error of the offset along its worst direction (pixels).
    covariance : (6, 6) ndarray
        Bound on the covariance of ``(a1x, a1y, a2x, a2y, offset_x, offset_y)`` (pixels^2).
    free : str
        Which nuisance parameters were free (see :data:`FREE_PARAMETERS`).
    n_frames : int
        Frames sharing the vectors (each with its own offset and amplitudes); the covariance
        is that of frame 0's offset.
    """

    spacing_relative: tuple[float, float]
    angle: tuple[float, float]
    offset: float
    covariance: np.ndarray = field(repr=False)
    free: str = "amplitudes"
    n_frames: int = 1


def _columns(geometry: LatticeGeometry, rows, cols, photons, psf: PSFModel, frame_shape):
    """Site stamps (sparse, pixels x sites) and the six geometric derivative columns."""
    table = _PSFTable(psf)
    r = table.radius
    height, width = frame_shape
    a1, a2, off = (np.asarray(v, float) for v in (geometry.a1, geometry.a2, geometry.offset))
    x = off[0] + rows * a1[0] + cols * a2[0]
    y = off[1] + rows * a1[1] + cols * a2[1]
    xi, yi = np.rint(x).astype(int), np.rint(y).astype(int)
    n_pix, n = height * width, len(rows)
    geo = np.zeros((n_pix, 6))
    data, pix, site = [], [], []
    oy, ox = np.mgrid[-r:r + 1, -r:r + 1]
    for start in range(0, n, 512):
        idx = np.arange(start, min(start + 512, n))
        s, sx, sy = table(x[idx] - xi[idx], y[idx] - yi[idx])
        py = yi[idx, None, None] + oy[None]
        px = xi[idx, None, None] + ox[None]
        inside = (py >= 0) & (py < height) & (px >= 0) & (px < width)
        flat = (py * width + px)[inside]
        data.append(s[inside])
        pix.append(flat)
        site.append(np.broadcast_to(idx[:, None, None], inside.shape)[inside])
        a = photons[idx, None, None]
        rw, cl = rows[idx, None, None], cols[idx, None, None]
        for j, val in enumerate((a * sx * rw, a * sy * rw, a * sx * cl, a * sy * cl, a * sx, a * sy)):
            geo[:, j] += np.bincount(flat, weights=np.broadcast_to(val, inside.shape)[inside], minlength=n_pix)
    basis = sp.csr_matrix((np.concatenate(data), (np.concatenate(pix), np.concatenate(site))), shape=(n_pix, n))
    return basis, geo


def lattice_precision_bound(geometry: LatticeGeometry, *, frame_shape, psf: PSFModel, rows, cols, photons,
                            background: float, excess_noise: float = 1.0, free: str = "amplitudes",
                            n_frames: int = 1) -> LatticePrecision:
    """Cramer-Rao bound on the lattice vectors and offset from the mean image of a frame.

    Parameters
    ----------
    geometry : LatticeGeometry
        The true geometry (pixels).
    frame_shape : (int, int)
        Frame height and width (pixels).
    psf : PSFModel
        Point-spread function (its pixel-integrated stamps, as the forward model draws them).
    rows, cols : array of int
        Lattice-site indices of the sites in the model (e.g. ``SiteGrid.rows``/``cols``).
    photons : array of float
        Mean detected photons of each site (0 for an empty site).
    background : float
        Mean background, photons per pixel (> 0).
    excess_noise : float
        Variance per detected photon: 1 for an ideal photon counter, 2 for an EMCCD at high
        gain (Robbins & Hadwen 2003); read noise is neglected.
    free : {"none", "brightness", "amplitudes"}
        Nuisance parameters estimated alongside the geometry (see the module docstring).
    n_frames : int
        Frames of the same mean image that share the vectors but each have their own offset,
        background and amplitudes (the information of a stack fitted jointly).

    Returns
    -------
    LatticePrecision

    Raises
    ------
    ValueError
        Unknown ``free``, non-positive background, or a layout that does not fix the vectors
        (fewer than three lit sites off one line).
    """
    if free not in FREE_PARAMETERS:
        raise ValueError(f"free must be one of {FREE_PARAMETERS}, got {free!r}")
    if not background > 0:
        raise ValueError(f"the background must be positive (photons per pixel), got {background}")
    rows, cols = np.asarray(rows, float).ravel(), np.asarray(cols, float).ravel()
    photons = np.asarray(photons, float).ravel()
    if not rows.shape == cols.shape == photons.shape:
        raise ValueError(f"rows, cols and photons must have one value per site, got {rows.shape}, {cols.shape}, "
                         f"{photons.shape}")
    basis, geo = _columns(geometry, rows, cols, photons, psf, tuple(frame_shape))
    mu = background + basis @ photons
    weight = 1.0 / (float(excess_noise) * mu)
    ones = sp.csr_matrix(np.ones((geo.shape[0], 1)))
    if free == "none":
        nuisance = ones
    elif free == "brightness":
        nuisance = sp.hstack([ones, basis[:, np.flatnonzero(photons > 0)]]).tocsr()
    else:
        nuisance = sp.hstack([ones, basis]).tocsr()
    wg = geo * weight[:, None]
    f_gg = geo.T @ wg
    f_gn = np.asarray((nuisance.T @ wg).T)
    f_nn = (nuisance.T @ nuisance.multiply(weight[:, None])).tocsc()
    # per frame: the geometric information left after its own nuisance parameters are fitted
    schur = f_gg - f_gn @ splu(f_nn).solve(np.ascontiguousarray(f_gn.T))
    schur = 0.5 * (schur + schur.T)
    n_frames = int(n_frames)
    if n_frames < 1:
        raise ValueError(f"n_frames must be at least 1, got {n_frames}")
    # frames share (a1, a2) and have their own offsets: assemble the joint information
    n_par = 4 + 2 * n_frames
    joint = np.zeros((n_par, n_par))
    for f in range(n_frames):
        idx = np.r_[0:4, 4 + 2 * f, 5 + 2 * f]
        joint[np.ix_(idx, idx)] += schur
    if np.linalg.cond(joint) > 1e14:
        raise ValueError("these sites do not fix both lattice vectors (too few lit sites, or all on one line)")
    cov = np.linalg.inv(joint)[:6, :6]
    a1, a2 = np.asarray(geometry.a1, float), np.asarray(geometry.a2, float)
    spacing, angle = [], []
    for k, a in enumerate((a1, a2)):
        g_len = np.zeros(6)
        g_ang = np.zeros(6)
        g_len[2 * k:2 * k + 2] = a / (a @ a)  # d|a| / |a|
        g_ang[2 * k:2 * k + 2] = np.array([-a[1], a[0]]) / (a @ a)  # d atan2(a_y, a_x)
        spacing.append(float(np.sqrt(g_len @ cov @ g_len)))
        angle.append(float(np.sqrt(g_ang @ cov @ g_ang)))
    offset = float(np.sqrt(np.max(np.linalg.eigvalsh(cov[4:, 4:]))))
    return LatticePrecision(spacing_relative=tuple(spacing), angle=tuple(angle), offset=offset, covariance=cov,
                            free=free, n_frames=n_frames)
