"""The site-level model of one imaging step: loss, hopping, pair loss, misreads.

This private module holds the three pieces that :mod:`latticeread.core.fidelity` builds on:

* :func:`neighbour_offsets` -- which sites count as neighbours (index offsets);
* :func:`simulate_occupations` -- a small generator of occupation matrices that follows the
  model exactly (used by the tests and the benchmark, and handy for users who want to see
  what a given loss or hopping rate looks like);
* :func:`pattern_table` and :func:`negative_log_likelihood` -- the statistics of site
  patterns and the approximate likelihood that is maximised to recover the rates.

The model (per atom, per image, all atoms independent)
------------------------------------------------------
Between image ``n`` and image ``n + 1`` every atom that is really present is

* lost with probability ``loss`` (leaves the lattice, e.g. heated out);
* moved with probability ``hop`` to one of the ``K`` neighbour sites, each chosen with
  probability ``1 / K`` (an atom that hops out of the observed region is not seen again);
* left in place otherwise.

Afterwards, a site that holds two or more atoms loses them in a light-assisted collision
with probability ``pair_loss`` (parity projection when ``pair_loss = 1``) and otherwise
keeps one. Every image reads an occupied site as empty with probability
``false_negative`` and an empty site as occupied with probability ``false_positive``,
independently. Sites outside the region of interest hold no atoms.

The likelihood
--------------
The exact likelihood couples every site to its neighbours. We maximise a composite
(conditional) likelihood instead: for every site ``s`` and image pair, the probability of
its observed pattern ``(o_n, o_{n+1})`` given how many of its neighbours show each of the
four patterns ``00, 01, 10, 11``. A neighbour ``j`` showing pattern ``y`` has sent its atom
to ``s`` with probability

    a(y) = f * hop / K * P(o_n = y_0 | atom) * P(o_{n+1} = y_1 | atom left j) / P(y),

where ``f`` is the filling and ``P(y)`` the mean-field probability of pattern ``y`` for a
site in the bulk. The number of atoms arriving at ``s`` is then a sum of independent
Bernoulli variables (Poisson-binomial), which together with the fate of the atom of ``s``
itself gives ``P(o_n, o_{n+1} | neighbours)``. Mixing neighbour information in this way
is what separates a hop (an appearance next to a site that emptied) from a false positive
(an appearance anywhere) and a loss (a disappearance with no appearance nearby).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "neighbour_offsets",
    "simulate_occupations",
    "PatternTable",
    "pattern_table",
    "negative_log_likelihood",
    "PARAMETERS",
]

#: Order of the model parameters in a parameter vector.
PARAMETERS = ("filling", "loss", "hop", "pair_loss", "false_positive", "false_negative")

_EPS = 1e-300


def neighbour_offsets(*, neighbour_radius: float = 2 ** 0.5, geometry=None) -> np.ndarray:
    """Index offsets ``(d_row, d_col)`` of the sites an atom can hop to.

    Parameters
    ----------
    neighbour_radius : float, optional
        Largest hop distance. Without ``geometry`` it is measured in lattice index space
        (``sqrt(d_row**2 + d_col**2)``), so the default ``sqrt(2)`` gives the 4 nearest
        plus the 4 diagonal (next-nearest) neighbours of a square lattice. With
        ``geometry`` it is measured in real space in units of the shorter lattice spacing,
        which gives the right neighbours for oblique or triangular lattices.
    geometry : LatticeGeometry, optional
        Lattice vectors (pixels) used to measure distances in real space.

    Returns
    -------
    (K, 2) ndarray of int
        The offsets, sorted by distance then by (d_row, d_col).
    """
    radius = float(neighbour_radius)
    if not np.isfinite(radius) or radius < 1.0:
        raise ValueError(f"neighbour_radius must be at least 1 lattice spacing, got {neighbour_radius}")
    reach = int(np.ceil(radius * 4)) + 1
    dr, dc = np.meshgrid(np.arange(-reach, reach + 1), np.arange(-reach, reach + 1), indexing="ij")
    dr, dc = dr.ravel(), dc.ravel()
    if geometry is None:
        dist = np.hypot(dr, dc)
    else:
        a1, a2 = np.asarray(geometry.a1, float), np.asarray(geometry.a2, float)
        vec = dr[:, None] * a1 + dc[:, None] * a2
        dist = np.hypot(vec[:, 0], vec[:, 1]) / min(np.hypot(*a1), np.hypot(*a2))
    keep = (dist > 0) & (dist <= radius + 1e-9)
    order = np.lexsort((dc[keep], dr[keep], np.round(dist[keep], 9)))
    return np.stack([dr[keep][order], dc[keep][order]], axis=1).astype(int)


def _shift(a: np.ndarray, dr: int, dc: int, fill=0) -> np.ndarray:
    """``out[..., r, c] = a[..., r + dr, c + dc]`` with ``fill`` outside the array."""
    out = np.full_like(a, fill)
    R, C = a.shape[-2:]
    rs, re = max(0, -dr), min(R, R - dr)
    cs, ce = max(0, -dc), min(C, C - dc)
    if rs < re and cs < ce:
        out[..., rs:re, cs:ce] = a[..., rs + dr:re + dr, cs + dc:ce + dc]
    return out


def simulate_occupations(
    *,
    n_shots: int,
    n_images: int = 2,
    shape: tuple[int, int] = (40, 40),
    region: np.ndarray | None = None,
    filling: float = 0.3,
    loss: float = 0.0,
    hop: float = 0.0,
    pair_loss: float = 1.0,
    false_positive: float = 0.0,
    false_negative: float = 0.0,
    neighbour_radius: float = 2 ** 0.5,
    fill_value: int = 255,
    rng=None,
) -> tuple[np.ndarray, np.ndarray]:
    """Draw occupation matrices of repeated images from the model of this module.

    Parameters
    ----------
    n_shots : int
        Number of independent shots (new atoms each shot).
    n_images : int, optional
        Consecutive images per shot (at least 2).
    shape : (int, int), optional
        ``(n_rows, n_cols)`` of the occupation matrices, lattice sites.
    region : (n_rows, n_cols) bool ndarray, optional
        Sites that are loaded and read out; others are empty and hold ``fill_value``.
        Default: every site.
    filling : float, optional
        Probability that a site of the region holds an atom in the first image.
    loss, hop : float, optional
        Per-atom probabilities, per imaging step, of being lost and of hopping to a
        neighbour (chosen uniformly among the ``K`` offsets of :func:`neighbour_offsets`).
    pair_loss : float, optional
        Probability that two atoms meeting on one site are both lost (1 = parity projection).
    false_positive, false_negative : float, optional
        Probability that an image reads an empty site as occupied / an occupied one as empty.
    neighbour_radius : float, optional
        Hop range, lattice sites (see :func:`neighbour_offsets`).
    fill_value : int, optional
        Value written for sites outside ``region``.
    rng : int or numpy.random.Generator, optional
        Seed or generator.

    Returns
    -------
    observed : (n_shots, n_images, n_rows, n_cols) uint8 ndarray
        What the images read: 0 empty, 1 occupied, ``fill_value`` outside the region.
    true : (n_shots, n_images, n_rows, n_cols) uint8 ndarray
        The real occupations before misreading (same fill).
    """
    rng = np.random.default_rng(rng)
    if n_images < 2:
        raise ValueError(f"n_images must be at least 2 to see loss or hopping, got {n_images}")
    if loss < 0 or hop < 0 or loss + hop > 1:
        raise ValueError(f"loss={loss} and hop={hop} must be non-negative with loss + hop <= 1")
    R, C = int(shape[0]), int(shape[1])
    region = np.ones((R, C), bool) if region is None else np.asarray(region, bool)
    if region.shape != (R, C):
        raise ValueError(f"region shape {region.shape} does not match shape {(R, C)}")
    offsets = neighbour_offsets(neighbour_radius=neighbour_radius)
    K = len(offsets)
    true = np.zeros((n_shots, n_images, R, C), np.uint8)
    state = (rng.random((n_shots, R, C)) < filling) & region
    true[:, 0] = state
    for n in range(1, n_images):
        u = rng.random(state.shape)
        stays = state & (u >= loss + hop)
        hops = state & (u >= loss) & (u < loss + hop)
        counts = stays.astype(np.int32)
        s_idx, r_idx, c_idx = np.nonzero(hops)
        k = rng.integers(0, K, size=s_idx.size)
        r_new = r_idx + offsets[k, 0]
        c_new = c_idx + offsets[k, 1]
        inside = (r_new >= 0) & (r_new < R) & (c_new >= 0) & (c_new < C)
        s_idx, r_new, c_new = s_idx[inside], r_new[inside], c_new[inside]
        inside = region[r_new, c_new]
        np.add.at(counts, (s_idx[inside], r_new[inside], c_new[inside]), 1)
        crowded = counts >= 2
        state = (counts == 1) | (crowded & (rng.random(state.shape) >= pair_loss))
        state &= region
        true[:, n] = state
    flip = rng.random(true.shape)
    observed = np.where(true == 1, flip >= false_negative, flip < false_positive).astype(np.uint8)
    observed[:, :, ~region] = fill_value
    true[:, :, ~region] = fill_value
    return observed, true


class PatternTable:
    """Counts of site patterns with their neighbourhood, per shot.

    Attributes
    ----------
    own : (M,) ndarray of int
        Pattern of the site itself: ``2 * o_n + o_{n+1}`` (0 = 00, 1 = 01, 2 = 10, 3 = 11).
    neighbours : (M, 4) ndarray of int
        Number of valid neighbours showing each of the four patterns.
    counts : (n_shots, n_pairs, M) ndarray of int
        How often each distinct (own, neighbours) combination occurs, per shot and pair.
    n_neighbours : int
        ``K``, the number of hop targets of an atom.
    """

    def __init__(self, own, neighbours, counts, n_neighbours):
        self.own = own
        self.neighbours = neighbours
        self.counts = counts
        self.n_neighbours = int(n_neighbours)


def pattern_table(observed: np.ndarray, *, valid: np.ndarray, offsets: np.ndarray) -> PatternTable:
    """Tabulate the (own pattern, neighbour patterns) combinations of every site pair.

    Parameters
    ----------
    observed : (n_shots, n_images, n_rows, n_cols) ndarray of {0, 1}
        Occupations read from the images (values at invalid sites are ignored).
    valid : same shape, bool
        True where the site was read out (inside the region, not masked).
    offsets : (K, 2) ndarray of int
        Neighbour index offsets.

    Returns
    -------
    PatternTable
    """
    n_shots, n_images = observed.shape[:2]
    K = len(offsets)
    base = K + 1
    a, b = observed[:, :-1].astype(np.int64), observed[:, 1:].astype(np.int64)
    ok = valid[:, :-1] & valid[:, 1:]
    cls = np.where(ok, 2 * a + b, -1)
    key = np.where(ok, cls * base ** 4, -1)
    for c in range(4):
        ind = (cls == c).astype(np.int64)
        n_c = np.zeros_like(ind)
        for dr, dc in offsets:
            n_c += _shift(ind, int(dr), int(dc))
        key = np.where(ok, key + n_c * base ** (3 - c), -1)
    n_pairs = n_images - 1
    unit = np.broadcast_to(np.arange(n_shots * n_pairs).reshape(n_shots, n_pairs, 1, 1), key.shape)
    sel = key >= 0
    uniq, inv = np.unique(key[sel], return_inverse=True)
    M = uniq.size
    counts = np.bincount(unit[sel] * M + inv, minlength=n_shots * n_pairs * M).reshape(n_shots, n_pairs, M)
    own = uniq // base ** 4
    neighbours = np.stack([(uniq // base ** (3 - c)) % base for c in range(4)], axis=1)
    return PatternTable(own.astype(int), neighbours.astype(int), counts, K)


def pattern_probabilities(theta, *, neighbours: np.ndarray, n_neighbours: int) -> np.ndarray:
    """Model probability of each own pattern given the neighbour pattern counts.

    Parameters
    ----------
    theta : sequence of float
        ``(filling, loss, hop, pair_loss, false_positive, false_negative)``, probabilities.
    neighbours : (M, 4) ndarray of int
        Neighbours showing patterns 00, 01, 10, 11.
    n_neighbours : int
        ``K``.

    Returns
    -------
    (M, 4) ndarray
        ``P(own pattern = 00, 01, 10, 11 | neighbours)``; rows sum to 1.
    """
    f, L, H, beta, fp, fn = (float(v) for v in theta)
    K = int(n_neighbours)
    # emission e[t, o] = P(read o | true t)
    e = np.array([[1 - fp, fp], [fn, 1 - fn]])
    g2 = 1.0 - beta                 # P(site ends occupied | two or more atoms met there)
    stay = max(1.0 - L - H, 0.0)    # the site's own atom is still there

    def final_occupied(p0, p1, p2):
        """P(final occupied | own atom present) and (| own atom absent), arrivals p0/p1/p2+."""
        with_atom = stay * (p0 + (p1 + p2) * g2) + (1 - stay) * (p1 + p2 * g2)
        without = p1 + p2 * g2
        return with_atom, without

    # Mean-field pattern probabilities of a bulk neighbour j.
    p = f * H / K
    q0 = (1 - p) ** K
    q1 = K * p * (1 - p) ** (K - 1)
    q2 = max(1.0 - q0 - q1, 0.0)
    w1, w0 = final_occupied(q0, q1, q2)
    prior = np.array([1 - f, f])
    pf = np.array([w0, w1])          # P(final occupied | t)
    py = np.empty(4)
    for o1 in (0, 1):
        for o2 in (0, 1):
            py[2 * o1 + o2] = np.sum(prior * e[:, o1] * (pf * e[1, o2] + (1 - pf) * e[0, o2]))
    # a(y): P(j sent its atom to s | j shows y)
    a = np.empty(4)
    for o1 in (0, 1):
        for o2 in (0, 1):
            after = w0 * e[1, o2] + (1 - w0) * e[0, o2]
            a[2 * o1 + o2] = f * H / K * e[1, o1] * after / max(py[2 * o1 + o2], _EPS)
    a = np.clip(a, 0.0, 1.0 - 1e-12)
    # r(y): how much more likely j shows y when the atom of s hopped onto it.
    v_with = stay * g2 + (1 - stay) * (q0 + (1 - q0) * g2)   # P(final occ | own atom, +1 arrival)
    v_without = q0 + (1 - q0) * g2
    pr = np.array([v_without, v_with])
    r = np.empty(4)
    for o1 in (0, 1):
        for o2 in (0, 1):
            r[2 * o1 + o2] = np.sum(prior * e[:, o1] * (pr * e[1, o2] + (1 - pr) * e[0, o2])) / max(
                py[2 * o1 + o2], _EPS)
    n = np.asarray(neighbours, float)
    logp0 = n @ np.log1p(-a)
    p0 = np.exp(logp0)
    p1 = p0 * (n @ (a / (1 - a)))
    p2 = np.clip(1.0 - p0 - p1, 0.0, 1.0)
    k_in = n.sum(axis=1)
    # Weight of "the atom of s hopped": the target is one of the K offsets; targets inside
    # the region change that neighbour's pattern (factor r), targets outside are unseen.
    hop_weight = H * ((n @ r) + (K - k_in)) / K
    with_atom = p0 + (p1 + p2) * g2          # own atom stayed
    without = p1 + p2 * g2                   # own atom gone (or never there)
    branches_1 = ((stay, with_atom), (L, without), (hop_weight, without))
    out = np.zeros((n.shape[0], 4))
    for o1 in (0, 1):
        for o2 in (0, 1):
            col = (1 - f) * e[0, o1] * (without * e[1, o2] + (1 - without) * e[0, o2])
            for w, occ in branches_1:
                col = col + f * e[1, o1] * w * (occ * e[1, o2] + (1 - occ) * e[0, o2])
            out[:, 2 * o1 + o2] = col
    out /= out.sum(axis=1, keepdims=True)
    return out


def negative_log_likelihood(theta, *, own, neighbours, counts, n_neighbours) -> float:
    """Composite negative log-likelihood of pattern counts (dimensionless).

    Parameters
    ----------
    theta : sequence of float
        Model parameters in the order of :data:`PARAMETERS`.
    own : (M,) ndarray of int
        Own pattern of each table entry.
    neighbours : (M, 4) ndarray of int
        Neighbour pattern counts of each table entry.
    counts : (M,) ndarray
        Number of site pairs in each entry (may be bootstrap-weighted).
    n_neighbours : int
        ``K``.
    """
    probs = pattern_probabilities(theta, neighbours=neighbours, n_neighbours=n_neighbours)
    p = probs[np.arange(own.size), own]
    return float(-np.sum(counts * np.log(np.maximum(p, _EPS))))
