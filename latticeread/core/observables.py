"""Physics from occupation matrices: density, profiles, counting statistics, correlations, order.

Input is a stack of occupation matrices ``occupation[shot, row, col]`` (1 occupied, 0 empty,
255 outside the reconstructed region, as in every latticeread file), optionally a region
mask and per-site posteriors. Everything is a plain function on arrays returning a frozen
dataclass; :func:`compute_observables` runs them all.

Conventions
-----------
* Matrix element ``[i, j]`` is lattice site ``(origin[0] + i, origin[1] + j)``: rows run along
  ``a1``, columns along ``a2``.
* The analysed region is the set of sites inside the region in **every** shot (and inside
  ``mask``); sites read out in some shots only are left out and counted in the warnings.
* Distances are in lattice units: without lattice vectors the site indices are taken as a
  square grid of spacing 1; with ``vectors=(a1, a2)`` (pixels, ``(x, y)`` pairs) a
  displacement ``(di, dj)`` has length ``|di a1 + dj a2| / |a1|``.
* Statistical errors come from the shot-to-shot scatter (standard errors) or from a
  bootstrap over shots, the unit that is really independent; everything random takes
  ``rng=``.

Definitions
-----------
Connected correlator, averaged over the site pairs ``(i, i + d)`` of the region::

    C(d) = N/(N-1) * mean_i ( <n_i n_{i+d}> - <n_i><n_{i+d}> )

with ``<.>`` the mean over the ``N`` shots (the factor makes each site pair's covariance
unbiased). Structure factor on the pseudo-spin ``s = 2 n - 1`` of the ``N_s`` region sites::

    S(q) = < |sum_j s_j exp(-i q.r_j)|^2 > / N_s,   q.r_j = q1 i + q2 j  (rad per site)

so a perfect checkerboard gives ``S(pi, pi) = N_s``. Staggered order of one shot::

    m = sum_j (-1)^(i+j) s_j / N_s          (+-1 for a perfect checkerboard)

and ``S(pi, pi) = N_s <m^2>`` exactly.

Misread correction
------------------
Each site is read independently: an atom survives the image with probability ``1 - loss``
and then reads occupied with probability ``1 - false_negative``; an empty site (or a lost
atom) reads occupied with probability ``false_positive``. So ``P(1|1) = a = (1-l)(1-g) + l f``
and ``P(1|0) = b = f``. The mean occupation is then affine in the truth,
``<m> = b + (a - b) <n>``, and for ``d != 0`` the connected correlator scales as
``C_read(d) = (a - b)^2 C_true(d)``; at ``d = 0`` the read-out noise
``a(1-a) <n> + b(1-b)(1 - <n>)`` is subtracted first. Inverting these relations unbiases the
density and the correlator; the rates' uncertainties are propagated to first order (delta
method, central differences). A correction larger than the statistical error is flagged.
The model is the usual independent-site misread channel (common practice, no source); it
ignores hopping and pair loss.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as _fft
from scipy import sparse, stats

from latticeread.errors import LatticeReadError

__all__ = [
    "ObservablesError",
    "DensityMap",
    "Profile",
    "LineProfile",
    "GroupMoments",
    "AtomNumber",
    "Correlator",
    "StructureFactor",
    "StaggeredOrder",
    "MisreadRates",
    "CorrectedObservables",
    "Observables",
    "region_of",
    "density_map",
    "radial_profile",
    "azimuthal_profile",
    "line_profile",
    "moments_by_group",
    "atom_number",
    "select_shots",
    "group_shots",
    "correlator",
    "structure_factor",
    "staggered_order",
    "correct_misreads",
    "compute_observables",
]

log = logging.getLogger(__name__)

OUTSIDE = 255
#: Fewer shots than this make every error bar rough (common practice, no source).
FEW_SHOTS = 20


class ObservablesError(LatticeReadError, ValueError):
    """Occupation matrices, options or rates given to the observables are unusable."""

    exit_code = 3


# --- input -------------------------------------------------------------------------------

def _as_stack(occupation) -> np.ndarray:
    occ = np.asarray(occupation)
    if occ.ndim != 3:
        raise ObservablesError(
            f"occupation must be a stack of matrices (shots x rows x cols); got {occ.ndim}-D with shape {occ.shape}"
            + (" (wrap a single matrix as occupation[None])" if occ.ndim == 2 else ""))
    if occ.shape[0] < 1 or occ.shape[1] < 1 or occ.shape[2] < 1:
        raise ObservablesError(f"occupation stack is empty (shape {occ.shape})")
    return occ


def region_of(occupation, *, mask=None) -> tuple[np.ndarray, np.ndarray, int]:
    """Occupations as floats and the analysed region.

    Parameters
    ----------
    occupation : (N, R, C) array
        1 occupied, 0 empty, 255 outside the region (integers); or probabilities in [0, 1]
        with NaN outside the region (floats, e.g. posteriors).
    mask : (R, C) bool array, optional
        Sites to analyse (True); default all.

    Returns
    -------
    occ : (N, R, C) ndarray of float32
        Occupations, 0 outside the region.
    region : (R, C) ndarray of bool
        Sites inside the region in every shot and inside ``mask``.
    n_partial : int
        Sites inside the region in some shots but not all (left out).
    """
    occ = _as_stack(occupation)
    if np.issubdtype(occ.dtype, np.floating):
        inside = np.isfinite(occ)
        vals = occ[inside]
        if vals.size and (vals.min() < 0 or vals.max() > 1):
            raise ObservablesError("occupation probabilities must lie between 0 and 1 (NaN outside the region)")
    else:
        inside = occ != OUTSIDE
        if occ.dtype == np.uint8:
            bad = bool(np.bincount(occ.ravel(), minlength=256)[2:OUTSIDE].any())
        else:
            bad = bool(((occ != 0) & (occ != 1) & inside).any())
        if bad:
            raise ObservablesError("occupation matrices must hold only 0 (empty), 1 (occupied) and 255 (outside "
                                   "the region)")
    every = inside.all(axis=0)
    some = inside.any(axis=0)
    region = every.copy()
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != occ.shape[1:]:
            raise ObservablesError(f"the region mask has shape {m.shape} but the matrices are {occ.shape[1:]}")
        region &= m
        some &= m
    if not region.any():
        raise ObservablesError("no site is inside the region in every shot (and inside the mask): nothing to analyse")
    out = np.where(region[None], occ, 0).astype(np.float32)
    return out, region, int(np.count_nonzero(some & ~region))


def _need_shots(n: int, what: str) -> None:
    if n < 2:
        raise ObservablesError(f"{what} needs at least 2 shots for an error estimate; got {n}")


def _vectors(vectors):
    if vectors is None:
        return None
    v = np.asarray(vectors, dtype=float)
    if v.shape != (2, 2) or not np.isfinite(v).all():
        raise ObservablesError(f"lattice vectors must be two (x, y) pairs in pixels; got shape {v.shape}")
    if abs(v[0, 0] * v[1, 1] - v[0, 1] * v[1, 0]) < 1e-9 * (v ** 2).sum():
        raise ObservablesError("lattice vectors a1 and a2 are parallel; they cannot span a lattice")
    return v


def _lengths(di, dj, vectors) -> np.ndarray:
    """Length of displacements (di, dj) in lattice units (|a1| = 1)."""
    di = np.asarray(di, float)
    dj = np.asarray(dj, float)
    if vectors is None:
        return np.hypot(di, dj)
    a1, a2 = vectors
    x = di * a1[0] + dj * a2[0]
    y = di * a1[1] + dj * a2[1]
    return np.hypot(x, y) / np.hypot(*a1)


def _angles(di, dj, vectors) -> np.ndarray:
    """Direction of displacements in radians: in the image (x right, y down) with vectors, else (col, row)."""
    di = np.asarray(di, float)
    dj = np.asarray(dj, float)
    if vectors is None:
        return np.arctan2(di, dj)
    a1, a2 = vectors
    return np.arctan2(di * a1[1] + dj * a2[1], di * a1[0] + dj * a2[0])


# --- density -----------------------------------------------------------------------------

@dataclass(frozen=True)
class DensityMap:
    """Mean occupation per site over shots.

    Attributes
    ----------
    mean, stderr : (R, C) ndarray of float
        Mean occupation (atoms per site) and its standard error over shots; NaN outside the
        region.
    region : (R, C) ndarray of bool
        Analysed sites.
    n_shots : int
    filling, filling_err : float
        Mean occupation over the region (atoms per site) and its standard error over shots.
    centroid : (2,) tuple of float
        Density-weighted centre (row, col) in matrix indices (sites).
    """

    mean: np.ndarray
    stderr: np.ndarray
    region: np.ndarray
    n_shots: int
    filling: float
    filling_err: float
    centroid: tuple[float, float]


def density_map(occupation, *, mask=None) -> DensityMap:
    """Mean occupation map with its standard error over shots.

    Parameters
    ----------
    occupation : (N, R, C) array
        Occupation matrices (see :func:`region_of`), N >= 2 shots.
    mask : (R, C) bool array, optional

    Returns
    -------
    DensityMap
    """
    occ, region, _ = region_of(occupation, mask=mask)
    return _density(occ, region)


def _density(occ: np.ndarray, region: np.ndarray) -> DensityMap:
    n = occ.shape[0]
    _need_shots(n, "the density map")
    mean = occ.mean(axis=0, dtype=np.float64)
    sq = np.einsum("nij,nij->ij", occ, occ, dtype=np.float64) / n
    var = np.maximum(sq - mean ** 2, 0.0) * n / (n - 1)
    stderr = np.sqrt(var / n)
    per_shot = occ.reshape(n, -1).sum(axis=1, dtype=np.float64) / region.sum()
    total = mean[region].sum()
    rows, cols = np.nonzero(region)
    if total > 0:
        centroid = (float((mean[rows, cols] * rows).sum() / total), float((mean[rows, cols] * cols).sum() / total))
    else:
        centroid = (float(rows.mean()), float(cols.mean()))
    return DensityMap(mean=np.where(region, mean, np.nan), stderr=np.where(region, stderr, np.nan), region=region,
                      n_shots=n, filling=float(per_shot.mean()), filling_err=float(per_shot.std(ddof=1) / math.sqrt(n)),
                      centroid=centroid)


# --- profiles ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Profile:
    """A binned density profile (radial or azimuthal) with errors over shots.

    Attributes
    ----------
    kind : str
        ``"radial"`` or ``"azimuthal"``.
    coordinate : (B,) ndarray
        Bin centres: distance from the centre in lattice units (radial) or angle in
        radians (azimuthal).
    mean, stderr : (B,) ndarray
        Mean occupation (atoms per site) in each bin and its standard error over shots.
    n_sites : (B,) ndarray of int
        Region sites in each bin (bins without sites are dropped).
    centre : (2,) tuple of float
        Centre (row, col) in matrix indices.
    unit : str
        Unit of ``coordinate``.
    """

    kind: str
    coordinate: np.ndarray
    mean: np.ndarray
    stderr: np.ndarray
    n_sites: np.ndarray
    centre: tuple[float, float]
    unit: str


def _binned(occ, region, labels, n_bins, coordinate, kind, centre, unit) -> Profile:
    n = occ.shape[0]
    rows, cols = np.nonzero(region)
    lab = labels[rows, cols]
    keep = (lab >= 0) & (lab < n_bins)
    flat = rows[keep] * region.shape[1] + cols[keep]
    w = sparse.csr_matrix((np.ones(flat.size, np.float32), (flat, lab[keep])),
                          shape=(region.size, n_bins))
    counts = np.asarray(w.sum(axis=0)).ravel()
    per_shot = np.asarray((w.T @ occ.reshape(n, -1).T).T, dtype=np.float64)   # (N, B) atoms per bin
    used = counts > 0
    per_shot = per_shot[:, used] / counts[used]
    return Profile(kind=kind, coordinate=np.asarray(coordinate)[used], mean=per_shot.mean(axis=0),
                   stderr=per_shot.std(axis=0, ddof=1) / math.sqrt(n), n_sites=counts[used].astype(np.int64),
                   centre=centre, unit=unit)


def _centre(centre, occ, region) -> tuple[float, float]:
    if centre is None:
        return _density(occ, region).centroid if occ.shape[0] >= 2 else _single_centroid(occ, region)
    c = tuple(float(v) for v in np.ravel(centre))
    if len(c) != 2 or not all(math.isfinite(v) for v in c):
        raise ObservablesError(f"the centre must be a (row, col) pair of finite numbers in sites; got {centre!r}")
    return c


def _single_centroid(occ, region):
    m = occ.mean(axis=0)
    rows, cols = np.nonzero(region)
    t = m[rows, cols].sum()
    return (float((m[rows, cols] * rows).sum() / t), float((m[rows, cols] * cols).sum() / t)) if t else \
        (float(rows.mean()), float(cols.mean()))


def radial_profile(occupation, *, mask=None, centre=None, vectors=None, bin_width: float = 1.0) -> Profile:
    """Density versus distance from a centre, in lattice units.

    Parameters
    ----------
    occupation : (N, R, C) array
        Occupation matrices, N >= 2 shots.
    mask : (R, C) bool array, optional
    centre : (row, col), optional
        Centre in matrix indices (sites); default the density centroid.
    vectors : ((x, y), (x, y)), optional
        Lattice vectors a1, a2 in pixels, for physical distances on non-square lattices.
    bin_width : float
        Bin width in lattice units (|a1|); default 1.

    Returns
    -------
    Profile
        The mean over each shot's bin average, with the standard error over shots.
    """
    if not bin_width > 0:
        raise ObservablesError(f"the bin width must be positive (lattice units); got {bin_width}")
    occ, region, _ = region_of(occupation, mask=mask)
    return _radial(occ, region, centre=_centre(centre, occ, region), vectors=_vectors(vectors), bin_width=bin_width)


def _radial(occ, region, *, centre, vectors, bin_width) -> Profile:
    _need_shots(occ.shape[0], "a profile")
    c = centre
    ii, jj = np.indices(region.shape)
    r = _lengths(ii - c[0], jj - c[1], vectors)
    labels = np.floor(r / bin_width).astype(np.int64)
    n_bins = int(labels[region].max()) + 1
    return _binned(occ, region, labels, n_bins, (np.arange(n_bins) + 0.5) * bin_width, "radial", c,
                   "lattice units (|a1|)")


def azimuthal_profile(occupation, *, mask=None, centre=None, vectors=None, n_bins: int = 12,
                      r_min: float = 0.0, r_max: float | None = None) -> Profile:
    """Density versus direction about a centre, over an annulus.

    Parameters
    ----------
    occupation : (N, R, C) array
    mask : (R, C) bool array, optional
    centre : (row, col), optional
        Default: the density centroid.
    vectors : ((x, y), (x, y)), optional
        Lattice vectors in pixels; angles are then measured in the image (x right, y down),
        otherwise in the (col, row) index plane.
    n_bins : int
        Angular bins over [-pi, pi).
    r_min, r_max : float
        Annulus in lattice units (default: every site).

    Returns
    -------
    Profile
        ``coordinate`` is the bin-centre angle in radians.
    """
    if int(n_bins) < 1:
        raise ObservablesError(f"the number of angular bins must be at least 1; got {n_bins}")
    occ, region, _ = region_of(occupation, mask=mask)
    return _azimuthal(occ, region, centre=_centre(centre, occ, region), vectors=_vectors(vectors), n_bins=int(n_bins),
                      r_min=r_min, r_max=r_max)


def _azimuthal(occ, region, *, centre, vectors, n_bins, r_min=0.0, r_max=None) -> Profile:
    _need_shots(occ.shape[0], "a profile")
    c = centre
    ii, jj = np.indices(region.shape)
    r = _lengths(ii - c[0], jj - c[1], vectors)
    ang = _angles(ii - c[0], jj - c[1], vectors)
    labels = np.minimum(np.floor((ang + np.pi) / (2 * np.pi) * n_bins).astype(np.int64), n_bins - 1)
    outside = (r < r_min) | ((r > r_max) if r_max is not None else False)
    labels = np.where(outside, -1, labels)
    centres = -np.pi + (np.arange(n_bins) + 0.5) * 2 * np.pi / n_bins
    return _binned(occ, region, labels, n_bins, centres, "azimuthal", c, "radians")


@dataclass(frozen=True)
class LineProfile:
    """Density along a1 (rows) or a2 (columns), averaged across a band.

    Attributes
    ----------
    axis : str
        ``"a1"`` (profile along the rows) or ``"a2"`` (along the columns).
    position : (L,) ndarray
        Site index along the axis (matrix index, sites).
    mean, stderr : (L,) ndarray
        Occupation (atoms per site) averaged over the band, and its standard error over
        shots; NaN where the band holds no region site.
    band : (2,) tuple of int
        First and last matrix index across the axis that were averaged (inclusive).
    centre_of_mass, centre_of_mass_err : float
        Atom-weighted mean position (sites) per shot, averaged over shots, with the standard
        error over shots.
    width, width_err : float
        Atom-weighted RMS width (sites) per shot, averaged, with its standard error.
    per_shot_com, per_shot_width : (N,) ndarray
        Per-shot values (NaN for a shot without atoms in the band).
    """

    axis: str
    position: np.ndarray
    mean: np.ndarray
    stderr: np.ndarray
    band: tuple[int, int]
    centre_of_mass: float
    centre_of_mass_err: float
    width: float
    width_err: float
    per_shot_com: np.ndarray
    per_shot_width: np.ndarray


def line_profile(occupation, *, axis: str = "a1", mask=None, centre=None, half_width: int = 2) -> LineProfile:
    """1-D density profile along a lattice vector, for transport.

    Parameters
    ----------
    occupation : (N, R, C) array
        Occupation matrices, N >= 2.
    axis : {"a1", "a2"}
        Profile along a1 (matrix rows) or a2 (matrix columns).
    mask : (R, C) bool array, optional
    centre : (row, col), optional
        The band is centred on this site across the axis; default the density centroid.
    half_width : int
        The band spans ``centre +- half_width`` sites across the axis.

    Returns
    -------
    LineProfile
    """
    if axis not in ("a1", "a2"):
        raise ObservablesError(f"the profile axis must be 'a1' or 'a2'; got {axis!r}")
    if int(half_width) < 0:
        raise ObservablesError(f"the band half-width must be 0 or more sites; got {half_width}")
    occ, region, _ = region_of(occupation, mask=mask)
    return _line(occ, region, axis=axis, centre=_centre(centre, occ, region), half_width=int(half_width))


def _line(occ, region, *, axis, centre, half_width) -> LineProfile:
    n = occ.shape[0]
    _need_shots(n, "a line profile")
    c = centre
    if axis == "a2":
        occ = occ.transpose(0, 2, 1)
        region = region.T
        c = (c[1], c[0])
    lo = max(int(round(c[1])) - int(half_width), 0)
    hi = min(int(round(c[1])) + int(half_width), region.shape[1] - 1)
    if lo > hi:
        raise ObservablesError(f"the band around site {c[1]:.1f} lies outside the matrices")
    band_region = region[:, lo:hi + 1]
    counts = band_region.sum(axis=1)
    atoms = occ[:, :, lo:hi + 1].sum(axis=2, dtype=np.float64)              # (N, L) atoms per line
    with np.errstate(invalid="ignore", divide="ignore"):
        per_shot = atoms / counts
        pos = np.arange(region.shape[0], dtype=float)
        tot = atoms.sum(axis=1)
        com = (atoms * pos).sum(axis=1) / tot
        width = np.sqrt(np.maximum((atoms * (pos[None] - com[:, None]) ** 2).sum(axis=1) / tot, 0))
    ok = tot > 0
    mean = np.where(counts > 0, per_shot.mean(axis=0), np.nan)
    err = np.where(counts > 0, per_shot.std(axis=0, ddof=1) / math.sqrt(n), np.nan)

    def _m(v):
        v = v[ok]
        return (float(v.mean()), float(v.std(ddof=1) / math.sqrt(v.size))) if v.size > 1 else (float("nan"),) * 2

    (cm, cme), (w, we) = _m(com), _m(width)
    return LineProfile(axis=axis, position=pos, mean=mean, stderr=err, band=(lo, hi), centre_of_mass=cm,
                       centre_of_mass_err=cme, width=w, width_err=we, per_shot_com=com, per_shot_width=width)


@dataclass(frozen=True)
class GroupMoments:
    """Centre of mass and width of the 1-D profile in each group of shots.

    Attributes
    ----------
    labels : tuple
        Group values (e.g. hold times), in the order given.
    n_shots : (G,) ndarray of int
    centre_of_mass, centre_of_mass_err, width, width_err : (G,) ndarray
        Sites; standard errors over the group's shots.
    delta_com, delta_com_err, delta_width, delta_width_err : (G,) ndarray
        Change relative to the first group (sites), errors added in quadrature.
    """

    axis: str
    labels: tuple
    n_shots: np.ndarray
    centre_of_mass: np.ndarray
    centre_of_mass_err: np.ndarray
    width: np.ndarray
    width_err: np.ndarray
    delta_com: np.ndarray
    delta_com_err: np.ndarray
    delta_width: np.ndarray
    delta_width_err: np.ndarray


def moments_by_group(occupation, groups: Mapping, *, axis: str = "a1", mask=None, centre=None,
                     half_width: int = 2) -> GroupMoments:
    """Transport: centre of mass and width of the line profile per parameter group.

    Parameters
    ----------
    occupation : (N, R, C) array
    groups : mapping label -> shot indices
        E.g. from :func:`group_shots`; each group needs at least 2 shots.
    axis, mask, half_width :
        As for :func:`line_profile`.
    centre : (row, col), optional
        One band for every group; default the density centroid of all shots.

    Returns
    -------
    GroupMoments
    """
    if not groups:
        raise ObservablesError("no groups of shots given")
    occ_all, region, _ = region_of(occupation, mask=mask)
    c = _centre(centre, occ_all, region)
    res = []
    for label, idx in groups.items():
        idx = np.asarray(idx, dtype=np.int64)
        if idx.size < 2:
            raise ObservablesError(f"group {label!r} holds {idx.size} shot(s); each group needs at least 2")
        res.append(line_profile(np.asarray(occupation)[idx], axis=axis, mask=region, centre=c,
                                half_width=half_width))
    com = np.array([r.centre_of_mass for r in res])
    come = np.array([r.centre_of_mass_err for r in res])
    wid = np.array([r.width for r in res])
    wide = np.array([r.width_err for r in res])
    return GroupMoments(axis=axis, labels=tuple(groups), n_shots=np.array([len(v) for v in groups.values()]),
                        centre_of_mass=com, centre_of_mass_err=come, width=wid, width_err=wide,
                        delta_com=com - com[0], delta_com_err=np.hypot(come, come[0]) * (np.arange(com.size) > 0),
                        delta_width=wid - wid[0], delta_width_err=np.hypot(wide, wide[0]) * (np.arange(wid.size) > 0))


# --- counting statistics -----------------------------------------------------------------

@dataclass(frozen=True)
class AtomNumber:
    """Atoms per shot in the region.

    Attributes
    ----------
    per_shot : (N,) ndarray of float
        Atoms counted in each shot.
    mean, mean_err : float
        Mean atom number and its standard error.
    variance, variance_err : float
        Sample variance (ddof=1) and its standard error (from the fourth central moment).
    bin_edges, histogram : ndarray
        Histogram of atoms per shot: integer-centred bins, shots per bin.
    """

    per_shot: np.ndarray
    mean: float
    mean_err: float
    variance: float
    variance_err: float
    bin_edges: np.ndarray
    histogram: np.ndarray


def atom_number(occupation, *, mask=None) -> AtomNumber:
    """Atom number per shot, its histogram, mean and variance.

    Parameters
    ----------
    occupation : (N, R, C) array
        N >= 2 shots.
    mask : (R, C) bool array, optional

    Returns
    -------
    AtomNumber

    Notes
    -----
    The standard error of the sample variance is ``sqrt((m4 - (N-3)/(N-1) s^4) / N)``
    with ``m4`` the fourth central moment (the textbook variance of the sample variance,
    e.g. Kendall & Stuart; written from memory).
    """
    occ, region, _ = region_of(occupation, mask=mask)
    return _atom_number(occ)


def _atom_number(occ) -> AtomNumber:
    n = occ.shape[0]
    _need_shots(n, "the atom-number statistics")
    per = occ.reshape(n, -1).sum(axis=1, dtype=np.float64)
    mean = float(per.mean())
    var = float(per.var(ddof=1))
    m4 = float(((per - mean) ** 4).mean())
    var_err = math.sqrt(max(m4 - (n - 3) / (n - 1) * var ** 2, 0.0) / n)
    lo, hi = math.floor(per.min()), math.ceil(per.max())
    step = max(1, int(math.ceil((hi - lo + 1) / 60)))
    edges = np.arange(lo - 0.5, hi + step + 0.5, step, dtype=float)
    hist, edges = np.histogram(per, bins=edges)
    return AtomNumber(per_shot=per, mean=mean, mean_err=float(per.std(ddof=1) / math.sqrt(n)), variance=var,
                      variance_err=var_err, bin_edges=edges, histogram=hist)


def select_shots(atoms, *, min_atoms: float | None = None, max_atoms: float | None = None,
                 parameter=None, low: float | None = None, high: float | None = None) -> np.ndarray:
    """Post-selection: shots whose atom number and parameter lie in the given ranges.

    Parameters
    ----------
    atoms : (N,) array
        Atoms per shot (e.g. ``AtomNumber.per_shot``).
    min_atoms, max_atoms : float, optional
        Inclusive atom-number range.
    parameter : (N,) array, optional
        A per-shot parameter (e.g. a hold time).
    low, high : float, optional
        Inclusive range of ``parameter``.

    Returns
    -------
    (N,) ndarray of bool
        True for kept shots.
    """
    atoms = np.asarray(atoms, dtype=float)
    if atoms.ndim != 1:
        raise ObservablesError(f"atoms per shot must be a 1-D array; got shape {atoms.shape}")
    if min_atoms is not None and max_atoms is not None and min_atoms > max_atoms:
        raise ObservablesError(f"min_atoms ({min_atoms}) is larger than max_atoms ({max_atoms})")
    keep = np.ones(atoms.shape, bool)
    if min_atoms is not None:
        keep &= atoms >= min_atoms
    if max_atoms is not None:
        keep &= atoms <= max_atoms
    if low is not None or high is not None:
        if parameter is None:
            raise ObservablesError("a parameter range was given without the per-shot parameter values")
        p = np.asarray(parameter, dtype=float)
        if p.shape != atoms.shape:
            raise ObservablesError(f"the parameter has {p.size} values but there are {atoms.size} shots")
        if low is not None:
            keep &= p >= low
        if high is not None:
            keep &= p <= high
    return keep


def group_shots(values: Sequence) -> dict:
    """Group shot indices by the value of a per-shot parameter.

    Parameters
    ----------
    values : (N,) sequence
        One value per shot (numbers or text); NaN and None values are left out.

    Returns
    -------
    dict
        value -> (k,) ndarray of shot indices, values in ascending order.
    """
    vals = list(values)
    if not vals:
        raise ObservablesError("no per-shot parameter values to group by")
    groups: dict = {}
    for i, v in enumerate(vals):
        if v is None or (isinstance(v, float) and math.isnan(v)):
            continue
        v = v.item() if isinstance(v, np.generic) else v
        groups.setdefault(v, []).append(i)
    try:
        keys = sorted(groups)
    except TypeError:
        keys = sorted(groups, key=str)
    return {k: np.asarray(groups[k], dtype=np.int64) for k in keys}


# --- correlations ------------------------------------------------------------------------

@dataclass(frozen=True)
class Correlator:
    """Connected two-point correlator with bootstrap errors over shots.

    Attributes
    ----------
    displacement : (2K+1,) ndarray of int
        Displacements along each matrix axis, ``-K..K`` (sites); ``map[a, b]`` is
        ``C(d = (displacement[a], displacement[b]))`` (rows along a1, columns along a2).
    map, err : (2K+1, 2K+1) ndarray
        C(d) (atoms^2 per site pair) and its bootstrap standard error; NaN without pairs.
    n_pairs : (2K+1, 2K+1) ndarray of int
        Site pairs (i, i+d) in the region.
    distance, radial, radial_err : (D,) ndarray
        C averaged over displacements of equal length (lattice units), with bootstrap error.
    chi2, dof, p_value : float
        Chi-square of C(d != 0) against zero with the bootstrap errors, over the half-plane
        of independent displacements (C(d) = C(-d)); p from ``scipy.stats.chi2``.
    mean_density : float
        Mean occupation over the region (atoms per site), used by the misread correction.
    n_shots, n_bootstrap : int
    replicates : (B, 2K+1, 2K+1) ndarray
        The bootstrap replicates of the map (for the misread correction).
    """

    displacement: np.ndarray
    map: np.ndarray
    err: np.ndarray
    n_pairs: np.ndarray
    distance: np.ndarray
    radial: np.ndarray
    radial_err: np.ndarray
    chi2: float
    dof: int
    p_value: float
    mean_density: float
    n_shots: int
    n_bootstrap: int
    replicates: np.ndarray = field(repr=False)


def _window(full: np.ndarray, k: int) -> np.ndarray:
    """Circular autocorrelation arrays (..., P0, P1) -> window of displacements -k..k."""
    d = np.arange(-k, k + 1)
    return full[..., d[:, None] % full.shape[-2], d[None, :] % full.shape[-1]]


def _autocorr(a: np.ndarray, shape) -> np.ndarray:
    """sum_x a(x) a(x + d) for every d (circular on ``shape``), batched over leading axes."""
    f = _fft.rfft2(a, s=shape, workers=-1)
    power = np.square(f.real)
    power += np.square(f.imag)
    return _fft.irfft2(power, s=shape, workers=-1)


def correlator(occupation, *, mask=None, max_distance: int = 4, vectors=None, n_bootstrap: int = 200,
               rng=None) -> Correlator:
    """Connected correlator C(d) as a map and versus |d|, with bootstrap errors over shots.

    Parameters
    ----------
    occupation : (N, R, C) array
        Occupation matrices, N >= 2 shots.
    mask : (R, C) bool array, optional
    max_distance : int
        Largest displacement K along each axis (sites).
    vectors : ((x, y), (x, y)), optional
        Lattice vectors a1, a2 in pixels, for |d| on non-square lattices.
    n_bootstrap : int
        Bootstrap replicates over shots (at least 10).
    rng : int or numpy Generator, optional

    Returns
    -------
    Correlator

    Notes
    -----
    Sums over site pairs are autocorrelations computed by FFT on zero-padded matrices (no
    wrap-around for ``|d| <= K``); they equal ``scipy.signal.correlate`` (the reference used
    in the tests).
    """
    occ, region, _ = region_of(occupation, mask=mask)
    return _correlator(occ, region, max_distance=max_distance, vectors=_vectors(vectors), n_bootstrap=n_bootstrap,
                       rng=rng)


def _correlator(occ, region, *, max_distance, vectors, n_bootstrap, rng) -> Correlator:
    n, R, C = occ.shape
    _need_shots(n, "the correlator")
    k = int(max_distance)
    if k < 1 or k >= max(R, C):
        raise ObservablesError(f"max_distance must be between 1 and {max(R, C) - 1} sites for {R} x {C} matrices; "
                               f"got {max_distance}")
    if int(n_bootstrap) < 10:
        raise ObservablesError(f"use at least 10 bootstrap replicates for the correlator errors; got {n_bootstrap}")
    b = int(n_bootstrap)
    rng = np.random.default_rng(rng)
    shape = (_fft.next_fast_len(R + k, real=True), _fft.next_fast_len(C + k, real=True))
    m = region.astype(np.float32)
    pairs = np.rint(_window(_autocorr(m, shape), k)).astype(np.int64)
    per_shot = _window(_autocorr(occ, shape), k).reshape(n, -1)                  # (N, W) sum n_i n_{i+d}
    inside = np.flatnonzero(region.ravel())
    flat = occ.reshape(n, -1)[:, inside]                                           # region sites only
    weights = rng.multinomial(n, np.full(n, 1.0 / n), size=b).astype(np.float32) / n   # (B, N)
    g_all = np.vstack([per_shot.mean(axis=0, dtype=np.float64)[None], weights @ per_shot])
    nbar = np.zeros((b + 1, R * C), np.float32)
    nbar[0, inside] = flat.mean(axis=0, dtype=np.float64)
    nbar[1:, inside] = weights @ flat
    p_all = _window(_autocorr(nbar.reshape(-1, R, C), shape), k).reshape(b + 1, -1)
    with np.errstate(invalid="ignore", divide="ignore"):
        c_all = (n / (n - 1)) * (g_all - p_all) / pairs.reshape(1, -1)
    c_all = np.where(pairs.reshape(1, -1) > 0, c_all, np.nan).reshape(b + 1, 2 * k + 1, 2 * k + 1)
    cmap, reps = c_all[0], c_all[1:]
    err = reps.std(axis=0, ddof=1)
    d = np.arange(-k, k + 1)
    di, dj = np.meshgrid(d, d, indexing="ij")
    length = np.round(_lengths(di, dj, vectors), 6)
    dist = np.unique(length[pairs > 0])
    lab = np.searchsorted(dist, length)
    ok = (pairs > 0).ravel()
    wts = np.where(ok, pairs.ravel(), 0).astype(float)
    norm = np.bincount(lab.ravel(), weights=wts, minlength=dist.size)

    def radial(cm):
        return np.bincount(lab.ravel(), weights=np.nan_to_num(cm.ravel()) * wts, minlength=dist.size) / norm

    rad = radial(cmap)
    rad_reps = np.array([radial(r) for r in reps])
    half = ((di > 0) | ((di == 0) & (dj > 0))) & (pairs > 0) & (err > 0)
    chi2 = float(np.sum((cmap[half] / err[half]) ** 2))
    dof = int(half.sum())
    return Correlator(displacement=d, map=cmap, err=err, n_pairs=pairs, distance=dist, radial=rad,
                      radial_err=rad_reps.std(axis=0, ddof=1), chi2=chi2, dof=dof,
                      p_value=float(stats.chi2.sf(chi2, dof)) if dof else float("nan"),
                      mean_density=float(nbar[0].sum(dtype=np.float64) / region.sum()), n_shots=n, n_bootstrap=b,
                      replicates=reps)


@dataclass(frozen=True)
class StructureFactor:
    """Static structure factor of the pseudo-spin s = 2n - 1 over the region.

    Attributes
    ----------
    q1, q2 : (R,), (C,) ndarray
        Wave numbers in radians per site along a1 (rows) and a2 (columns), ascending
        (``numpy.fft.fftshift`` order).
    s, err : (R, C) ndarray
        S(q) (dimensionless; N_s for perfect order at q) and its standard error over shots.
    n_sites : int
        Region sites N_s.
    """

    q1: np.ndarray
    q2: np.ndarray
    s: np.ndarray
    err: np.ndarray
    n_sites: int


def structure_factor(occupation, *, mask=None) -> StructureFactor:
    """S(q) by FFT of the matrices, averaged over shots.

    Parameters
    ----------
    occupation : (N, R, C) array
        N >= 2 shots.
    mask : (R, C) bool array, optional

    Returns
    -------
    StructureFactor
        ``S(q) = <|sum_j s_j exp(-i q.r_j)|^2> / N_s`` on the FFT grid
        ``q = 2 pi (k / R, l / C)``.
    """
    occ, region, _ = region_of(occupation, mask=mask)
    return _structure_factor(occ, region)


def _structure_factor(occ, region) -> StructureFactor:
    n, R, C = occ.shape
    _need_shots(n, "the structure factor")
    s = 2 * occ - region.astype(np.float32)[None]                 # +-1 inside the region, 0 outside
    f = _fft.rfft2(s, workers=-1)                                  # (N, R, C//2 + 1): S(-q) = S(q) for real s
    ns = int(region.sum())
    power = np.square(f.real)
    power += np.square(f.imag)
    half_mean = power.mean(axis=0, dtype=np.float64) / ns
    half_sq = np.einsum("nij,nij->ij", power, power, dtype=np.float64) / (n * ns * ns)
    half_err = np.sqrt(np.maximum(half_sq - half_mean ** 2, 0.0) * n / (n - 1) / n)
    mean = _fft.fftshift(_full_spectrum(half_mean, C))
    err = _fft.fftshift(_full_spectrum(half_err, C))
    return StructureFactor(q1=_fft.fftshift(2 * np.pi * _fft.fftfreq(R)), q2=_fft.fftshift(2 * np.pi * _fft.fftfreq(C)),
                           s=mean, err=err, n_sites=ns)


def _full_spectrum(half: np.ndarray, n_cols: int) -> np.ndarray:
    """Full (R, C) grid from the rfft half of a symmetric function, S(-q) = S(q)."""
    full = np.empty((half.shape[0], n_cols), half.dtype)
    m = half.shape[1]
    full[:, :m] = half
    if n_cols > m:
        cols = np.arange(m, n_cols)
        rows = (-np.arange(half.shape[0])) % half.shape[0]
        full[:, m:] = half[rows[:, None], (n_cols - cols)[None, :]]
    return full


def _box_sum(a: np.ndarray, w: int) -> np.ndarray:
    """Sum over a w x w window centred on each element of the last two axes (zeros beyond the edge)."""
    h = w // 2
    out = a
    for axis in (-2, -1):
        pad = [(0, 0)] * out.ndim
        pad[axis] = (h + 1, h)
        c = np.cumsum(np.pad(out, pad), axis=axis, dtype=np.float32)
        n = out.shape[axis]
        out = np.take(c, np.arange(w, w + n), axis=axis) - np.take(c, np.arange(0, n), axis=axis)
    return out


# --- order -------------------------------------------------------------------------------

@dataclass(frozen=True)
class StaggeredOrder:
    """Checkerboard order.

    Attributes
    ----------
    per_shot : (N,) ndarray
        Staggered order m of each shot (-1..1; sign = which sublattice is filled, with
        the sign convention of lattice site (0, 0) even).
    mean_abs, mean_abs_err : float
        Mean |m| over shots and its standard error.
    s_pi_pi, s_pi_pi_err : float
        S(pi, pi) = N_s <m^2> and its standard error.
    bin_edges, histogram : ndarray
        Distribution of m over shots (bins over [-1, 1]).
    local : (R, C) ndarray
        Local staggered order: the shot average of |m| in a window of ``window`` x
        ``window`` sites around each site (NaN outside the region).
    window : int
    n_sites : int
    """

    per_shot: np.ndarray
    mean_abs: float
    mean_abs_err: float
    s_pi_pi: float
    s_pi_pi_err: float
    bin_edges: np.ndarray
    histogram: np.ndarray
    local: np.ndarray
    window: int
    n_sites: int


def staggered_order(occupation, *, mask=None, origin=(0, 0), window: int = 3, n_bins: int = 40) -> StaggeredOrder:
    """Checkerboard (staggered) order parameter per shot, its distribution, S(pi, pi), local map.

    Parameters
    ----------
    occupation : (N, R, C) array
        N >= 2 shots.
    mask : (R, C) bool array, optional
    origin : (row, col)
        Lattice indices of matrix element [0, 0] (sets the sign convention).
    window : int
        Odd side (sites) of the window of the local order map.
    n_bins : int
        Histogram bins over [-1, 1].

    Returns
    -------
    StaggeredOrder
    """
    if int(window) < 1 or int(window) % 2 == 0:
        raise ObservablesError(f"the local-order window must be an odd number of sites; got {window}")
    occ, region, _ = region_of(occupation, mask=mask)
    return _staggered(occ, region, origin=origin, window=int(window), n_bins=int(n_bins))


def _staggered(occ, region, *, origin, window, n_bins) -> StaggeredOrder:
    n, R, C = occ.shape
    _need_shots(n, "the staggered order")
    ii, jj = np.indices((R, C))
    sign = np.where((ii + jj + int(origin[0]) + int(origin[1])) % 2 == 0, 1.0, -1.0).astype(np.float32)
    z = np.where(region[None], (2 * occ - 1) * sign, 0).astype(np.float32)
    ns = int(region.sum())
    m = z.reshape(n, -1).sum(axis=1, dtype=np.float64) / ns
    s_pp = ns * m ** 2
    local_sum = _box_sum(z, window)
    norm = _box_sum(region.astype(np.float32), window)
    with np.errstate(invalid="ignore", divide="ignore"):
        local = np.abs(local_sum / norm[None]).mean(axis=0)
    hist, edges = np.histogram(m, bins=n_bins, range=(-1, 1))
    return StaggeredOrder(per_shot=m, mean_abs=float(np.abs(m).mean()),
                          mean_abs_err=float(np.abs(m).std(ddof=1) / math.sqrt(n)), s_pi_pi=float(s_pp.mean()),
                          s_pi_pi_err=float(s_pp.std(ddof=1) / math.sqrt(n)), bin_edges=edges, histogram=hist,
                          local=np.where(region, local, np.nan), window=window, n_sites=ns)


# --- misread correction ------------------------------------------------------------------

@dataclass(frozen=True)
class MisreadRates:
    """Per-site misread and loss probabilities with their standard uncertainties.

    Attributes
    ----------
    false_positive, false_negative, loss : float
        Probabilities per site and image (empty read occupied; atom read empty; atom lost
        during the image).
    false_positive_err, false_negative_err, loss_err : float
        Standard uncertainties (0 when unknown).
    """

    false_positive: float
    false_negative: float
    loss: float = 0.0
    false_positive_err: float = 0.0
    false_negative_err: float = 0.0
    loss_err: float = 0.0

    def __post_init__(self):
        for name in ("false_positive", "false_negative", "loss"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float, np.floating)) and 0 <= v < 1):
                raise ObservablesError(f"the {name.replace('_', '-')} rate must be a probability in [0, 1); got {v!r}")
            e = getattr(self, name + "_err")
            if not (math.isfinite(e) and e >= 0):
                raise ObservablesError(f"the uncertainty of the {name.replace('_', '-')} rate must be 0 or more; "
                                       f"got {e!r}")
        a, b = self.channel()
        if a - b < 0.05:
            raise ObservablesError(
                f"with these rates an atom reads occupied with probability {a:.3f} and an empty site with {b:.3f}: "
                "the read-out carries too little information to correct (P(1|1) - P(1|0) < 0.05)")

    def channel(self, f=None, g=None, l=None) -> tuple[float, float]:
        """(P(read 1 | atom), P(read 1 | empty)) for these rates (or the ones given)."""
        f = self.false_positive if f is None else f
        g = self.false_negative if g is None else g
        l = self.loss if l is None else l
        return (1 - l) * (1 - g) + l * f, f


@dataclass(frozen=True)
class CorrectedObservables:
    """Density and connected correlator unbiased for misreads.

    Attributes
    ----------
    rates : MisreadRates
    density, density_stat_err, density_rate_err, density_err : (R, C) ndarray
        Corrected mean occupation; its statistical error, its error from the rates'
        uncertainties, and both in quadrature.
    density_flag : (R, C) ndarray of bool
        True where the correction is larger than the statistical error of the read density
        (at least the binomial error of ``(k + 1/2) / (N + 1)`` for ``k`` of ``N`` shots read
        occupied, so that a site read empty in every shot is not flagged for a zero error).
        The corrected density of such a site is slightly negative: the unbiased estimate.
    filling, filling_stat_err, filling_rate_err : float
        Corrected mean occupation over the region.
    correlator, correlator_stat_err, correlator_rate_err, correlator_err : (2K+1, 2K+1) ndarray
        Corrected C(d) and its errors (as above).
    correlator_flag : (2K+1, 2K+1) ndarray of bool
        True where the correction is larger than the bootstrap error of the read C(d).
    warnings : tuple of str
        Plain statements of where the correction matters.
    """

    rates: MisreadRates
    density: np.ndarray
    density_stat_err: np.ndarray
    density_rate_err: np.ndarray
    density_err: np.ndarray
    density_flag: np.ndarray
    filling: float
    filling_stat_err: float
    filling_rate_err: float
    correlator: np.ndarray
    correlator_stat_err: np.ndarray
    correlator_rate_err: np.ndarray
    correlator_err: np.ndarray
    correlator_flag: np.ndarray
    warnings: tuple[str, ...]


def _unbias(density, filling, cmap, centre_mask, a, b):
    dens = (density - b) / (a - b)
    fill = (filling - b) / (a - b)
    cor = cmap / (a - b) ** 2
    noise = a * (1 - a) * fill + b * (1 - b) * (1 - fill)
    cor = np.where(centre_mask, (cmap - noise) / (a - b) ** 2, cor)
    return dens, fill, cor


def correct_misreads(density: DensityMap, corr: Correlator | None = None, *, rates: MisreadRates,
                     step: float = 1e-5) -> CorrectedObservables:
    """Unbias the mean density and the connected correlator for misreads and loss.

    Parameters
    ----------
    density : DensityMap
        The read density (:func:`density_map`).
    corr : Correlator, optional
        The read correlator (:func:`correlator`); without it only the density is corrected
        (the correlator fields are empty arrays).
    rates : MisreadRates
        False-positive, false-negative and loss probabilities with uncertainties.
    step : float
        Step of the central differences for the rates' error propagation.

    Returns
    -------
    CorrectedObservables

    Notes
    -----
    The channel model and its inversion are in the module docstring. Statistical errors
    scale by ``1/(a-b)`` (density) and ``1/(a-b)^2`` (correlator); the rates' errors are
    propagated to first order, treating the three rates as independent.
    """
    if not isinstance(rates, MisreadRates):
        raise ObservablesError("rates must be a MisreadRates (false-positive, false-negative, loss)")
    if corr is not None:
        cmap = corr.map
        k = (cmap.shape[0] - 1) // 2
        centre = np.zeros(cmap.shape, bool)
        centre[k, k] = True
        c_stat = corr.err
    else:
        cmap = np.zeros((0, 0))
        centre = np.zeros((0, 0), bool)
        c_stat = cmap
    a, b = rates.channel()
    dens, fill, cor = _unbias(density.mean, density.filling, cmap, centre, a, b)
    var_d = np.zeros_like(dens)
    var_f = 0.0
    var_c = np.zeros_like(cor)
    base = {"f": rates.false_positive, "g": rates.false_negative, "l": rates.loss}
    for key, sigma in (("f", rates.false_positive_err), ("g", rates.false_negative_err), ("l", rates.loss_err)):
        if sigma <= 0:
            continue
        outs = []
        for sgn in (1, -1):
            kw = dict(base)
            kw[key] = max(kw[key] + sgn * step, 0.0)
            outs.append(_unbias(density.mean, density.filling, cmap, centre, *rates.channel(**kw)))
        h = (base[key] + step) - max(base[key] - step, 0.0)
        var_d += ((outs[0][0] - outs[1][0]) / h * sigma) ** 2
        var_f += ((outs[0][1] - outs[1][1]) / h * sigma) ** 2
        var_c += ((outs[0][2] - outs[1][2]) / h * sigma) ** 2
    d_stat = density.stderr / (a - b)
    d_rate = np.sqrt(var_d)
    c_stat_corr = c_stat / (a - b) ** 2
    c_rate = np.sqrt(var_c)
    # a site read empty (or occupied) in every shot has a zero sample error; compare with the
    # binomial error of a regularised estimate (k + 1/2) / (N + 1) instead
    n = density.n_shots
    p_reg = (density.mean * n + 0.5) / (n + 1)
    d_floor = np.maximum(density.stderr, np.sqrt(p_reg * (1 - p_reg) / n))
    d_flag = np.abs(dens - density.mean) > d_floor
    c_flag = np.abs(cor - cmap) > c_stat
    d_flag &= density.region
    warns = []
    if rates.false_positive_err == 0 and rates.false_negative_err == 0 and rates.loss_err == 0:
        warns.append("the misread rates were given without uncertainties: the corrected errors hold the "
                     "statistical part only")
    fill_change = fill - density.filling
    if abs(fill_change) > density.filling_err:
        warns.append(f"the misread correction changes the mean density by {fill_change:+.4f} atoms per site, more "
                     f"than its statistical error ({density.filling_err:.4f})")
    if d_flag.any():
        warns.append(f"the correction exceeds the statistical error of the density on {int(d_flag.sum())} of "
                     f"{int(density.region.sum())} sites")
    if c_flag.size and c_flag.any():
        warns.append(f"the correction exceeds the bootstrap error of C(d) at {int(c_flag.sum())} of {c_flag.size} "
                     "displacements")
    return CorrectedObservables(
        rates=rates, density=dens, density_stat_err=d_stat, density_rate_err=d_rate,
        density_err=np.hypot(d_stat, d_rate), density_flag=d_flag, filling=float(fill),
        filling_stat_err=float(density.filling_err / (a - b)), filling_rate_err=float(math.sqrt(var_f)),
        correlator=cor, correlator_stat_err=c_stat_corr, correlator_rate_err=c_rate,
        correlator_err=np.hypot(c_stat_corr, c_rate), correlator_flag=c_flag, warnings=tuple(warns))


# --- everything at once ------------------------------------------------------------------

@dataclass(frozen=True)
class Observables:
    """Every observable of one set of shots (see :func:`compute_observables`)."""

    density: DensityMap
    radial: Profile
    azimuthal: Profile
    line_a1: LineProfile
    line_a2: LineProfile
    atoms: AtomNumber
    correlator: Correlator
    structure: StructureFactor
    order: StaggeredOrder
    corrected: CorrectedObservables | None
    posterior_density: np.ndarray | None
    settings: dict
    warnings: tuple[str, ...]


def compute_observables(occupation, *, mask=None, p_occupied=None, vectors=None, origin=(0, 0), centre=None,
                        max_distance: int = 4, bin_width: float = 1.0, half_width: int = 2, window: int = 3,
                        n_bootstrap: int = 200, rates: MisreadRates | None = None, rng=None) -> Observables:
    """All observables of a stack of occupation matrices.

    Parameters
    ----------
    occupation : (N, R, C) array
        1 occupied, 0 empty, 255 outside the region; N >= 2 shots.
    mask : (R, C) bool array, optional
        Sites to analyse.
    p_occupied : (N, R, C) float array, optional
        Posterior of occupation per site (NaN outside); gives the posterior-mean density and
        the fraction of uncertain sites.
    vectors : ((x, y), (x, y)), optional
        Lattice vectors in pixels (physical distances on non-square lattices).
    origin : (row, col)
        Lattice indices of matrix element [0, 0].
    centre : (row, col), optional
        Profile centre in matrix indices; default the density centroid.
    max_distance, bin_width, half_width, window, n_bootstrap :
        See :func:`correlator`, :func:`radial_profile`, :func:`line_profile`,
        :func:`staggered_order`.
    rates : MisreadRates, optional
        When given, the density and correlator are also corrected for misreads.
    rng : int or numpy Generator, optional
        Seed of the bootstrap.

    Returns
    -------
    Observables
    """
    occ, region, n_partial = region_of(occupation, mask=mask)
    n = occ.shape[0]
    _need_shots(n, "the observables")
    vec = _vectors(vectors)
    warns = []
    if n < FEW_SHOTS:
        warns.append(f"only {n} shots: error bars from fewer than {FEW_SHOTS} shots are rough")
    if n_partial:
        warns.append(f"{n_partial} site(s) outside the region in some shots were left out of every observable")
    dens = _density(occ, region)
    c = dens.centroid if centre is None else _centre(centre, occ, region)
    if not bin_width > 0:
        raise ObservablesError(f"the bin width must be positive (lattice units); got {bin_width}")
    if int(window) < 1 or int(window) % 2 == 0:
        raise ObservablesError(f"the local-order window must be an odd number of sites; got {window}")
    radial = _radial(occ, region, centre=c, vectors=vec, bin_width=bin_width)
    azim = _azimuthal(occ, region, centre=c, vectors=vec, n_bins=12)
    la1 = _line(occ, region, axis="a1", centre=c, half_width=int(half_width))
    la2 = _line(occ, region, axis="a2", centre=c, half_width=int(half_width))
    corr = _correlator(occ, region, max_distance=max_distance, vectors=vec, n_bootstrap=n_bootstrap, rng=rng)
    post = None
    if p_occupied is not None:
        p = np.asarray(p_occupied, dtype=float)
        if p.shape != occ.shape:
            raise ObservablesError(f"posteriors have shape {p.shape} but the occupation matrices {occ.shape}")
        inside = p[:, region]
        if not np.isfinite(inside).all():
            raise ObservablesError("posteriors are missing (NaN) on sites inside the region")
        post = np.where(region, p.mean(axis=0), np.nan)
        uncertain = float(((inside > 0.05) & (inside < 0.95)).mean())
        if uncertain > 0.01:
            warns.append(f"{100 * uncertain:.1f} % of site readings have a posterior between 0.05 and 0.95")
    corrected = correct_misreads(dens, corr, rates=rates) if rates is not None else None
    if corrected is not None:
        warns.extend(corrected.warnings)
    settings = {"n_shots": n, "n_region_sites": int(region.sum()), "centre": list(c), "origin": list(origin),
                "max_distance": int(max_distance), "bin_width": float(bin_width), "half_width": int(half_width),
                "window": int(window), "n_bootstrap": int(n_bootstrap),
                "vectors": None if vec is None else vec.tolist(),
                "distance_unit": "lattice units (|a1|)" if vec is not None else "sites (square index grid)"}
    return Observables(density=dens, radial=radial, azimuthal=azim, line_a1=la1, line_a2=la2,
                       atoms=_atom_number(occ), correlator=corr, structure=_structure_factor(occ, region),
                       order=_staggered(occ, region, origin=origin, window=int(window), n_bins=40),
                       corrected=corrected, posterior_density=post, settings=settings, warnings=tuple(warns))
