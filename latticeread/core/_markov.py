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
its observed pattern ``(o_n, o_{n+1})`` given how many of its neighbours fall in each of six
classes: the four patterns ``00, 01, 10, 11``, with ``01`` (appeared) and ``10``
(vacated) split by whether another site next to that neighbour offers a competing
explanation (see :data:`NEIGHBOUR_CLASSES`). A neighbour ``j`` of class ``c`` has sent its
atom to ``s`` with probability ``a(c)``, and the atom of ``s`` hopping onto ``j`` makes
``j``'s class ``r(c)`` times more likely (mean-field expressions for a site in the bulk, in
:func:`pattern_probabilities`). The number of atoms arriving at ``s`` is a sum of independent
Bernoulli variables (Poisson-binomial), which together with the fate of the atom of ``s``
itself gives ``P(o_n, o_{n+1} | neighbours)``. Mixing neighbour information in this way is
what separates a hop (an appearance next to a site that emptied) from a false positive (an
appearance anywhere) and a loss (a disappearance with no appearance nearby).

Approximations: neighbours of ``s`` are treated as independent given their classes, two
events of one atom pair in one image (a swap) are neglected, and sites outside the region
are taken as empty. With the figures of the issue (1 % loss, 0.5 % hopping, filling 0.3,
200 shots of 40x40 sites) the remaining bias is a few thousandths of a percentage point
(see bench/bench_fidelity.py); it grows at higher hopping rates and fillings.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "neighbour_offsets",
    "simulate_occupations",
    "PatternTable",
    "NEIGHBOUR_CLASSES",
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
        which gives the right neighbours for oblique or triangular lattices (the default
        then keeps the 4 + 4 neighbours of a square lattice and the 6 nearest of a
        triangular one, whose next-nearest sites lie at sqrt(3) spacings).
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


#: Classes of a neighbour ``j`` of site ``s``: its pattern in the two images, and for the
#: patterns 01 and 10 whether another site next to ``j`` offers a competing explanation
#: ("shared": an appearance at ``j`` next to another vacated site, or a vacated ``j`` next to
#: another appearance) or not ("clear").
NEIGHBOUR_CLASSES = ("00", "01 clear", "01 shared", "10 clear", "10 shared", "11")
C00, C01C, C01S, C10C, C10S, C11 = range(6)


class PatternTable:
    """Counts of site patterns with their neighbourhood, per shot.

    Attributes
    ----------
    own : (M,) ndarray of int
        Pattern of the site itself: ``2 * o_n + o_{n+1}`` (0 = 00, 1 = 01, 2 = 10, 3 = 11).
    neighbours : (M, 6) ndarray of int
        Number of valid neighbours in each of the :data:`NEIGHBOUR_CLASSES`.
    counts : (n_shots, n_pairs, M) ndarray of int
        How often each distinct (own, neighbours) combination occurs, per shot and pair.
    n_neighbours : int
        ``K``, the number of hop targets of an atom.
    site_entry : (n_shots, n_pairs, n_rows, n_cols) ndarray of int or None
        Table entry of every site and image pair (-1 where the site was not read out in
        both images); used to resample blocks of sites.
    """

    def __init__(self, own, neighbours, counts, n_neighbours, site_entry=None):
        self.own = own
        self.neighbours = neighbours
        self.counts = counts
        self.n_neighbours = int(n_neighbours)
        self.site_entry = site_entry

    def block_counts(self, block: int) -> np.ndarray:
        """Pattern counts per (shot, block of ``block x block`` sites), image pairs summed.

        Parameters
        ----------
        block : int
            Side of a square block of sites (sites).

        Returns
        -------
        (n_units, M) ndarray of int
            One row per (shot, block) that holds at least one read-out site pair.
        """
        entry = self.site_entry
        n_shots, _, R, C = entry.shape
        b = max(int(block), 1)
        nbr, nbc = -(-R // b), -(-C // b)
        blk = (np.arange(R)[:, None] // b) * nbc + (np.arange(C)[None, :] // b)
        unit = np.arange(n_shots)[:, None, None, None] * (nbr * nbc) + blk[None, None]
        unit = np.broadcast_to(unit, entry.shape)
        sel = entry >= 0
        M = self.own.size
        out = np.bincount(unit[sel] * M + entry[sel], minlength=n_shots * nbr * nbc * M)
        out = out.reshape(n_shots * nbr * nbc, M)
        return out[out.sum(axis=1) > 0]

    @property
    def vacated(self) -> np.ndarray:
        """(M,) number of neighbours that read occupied then empty (pattern 10)."""
        return self.neighbours[:, C10C] + self.neighbours[:, C10S]


def pattern_table(observed: np.ndarray, *, valid: np.ndarray, offsets: np.ndarray) -> PatternTable:
    """Tabulate the (own pattern, neighbour classes) combinations of every site pair.

    Parameters
    ----------
    observed : (n_shots, n_images, n_rows, n_cols) ndarray of {0, 1}
        Occupations read from the images (values at invalid sites are ignored).
    valid : same shape, bool
        True where the site was read out (inside the region, not masked).
    offsets : (K, 2) ndarray of int
        Neighbour index offsets (a symmetric set: ``d`` and ``-d``).

    Returns
    -------
    PatternTable
    """
    n_shots, n_images = observed.shape[:2]
    K = len(offsets)
    base = K + 1
    nc = len(NEIGHBOUR_CLASSES)
    a, b = observed[:, :-1].astype(np.int64), observed[:, 1:].astype(np.int64)
    ok = valid[:, :-1] & valid[:, 1:]
    cls = np.where(ok, 2 * a + b, -1)
    is01 = (cls == 1).astype(np.int64)
    is10 = (cls == 2).astype(np.int64)
    n01 = np.zeros_like(is01)
    n10 = np.zeros_like(is10)
    for dr, dc in offsets:
        n01 += _shift(is01, int(dr), int(dc))
        n10 += _shift(is10, int(dr), int(dc))
    per_class = np.zeros(cls.shape + (nc,), np.int64)
    for dr, dc in offsets:
        cj = _shift(cls, int(dr), int(dc), fill=-1)
        other10 = _shift(n10, int(dr), int(dc)) - is10     # vacated sites next to j, s excluded
        other01 = _shift(n01, int(dr), int(dc)) - is01     # appearances next to j, s excluded
        per_class[..., C00] += cj == 0
        per_class[..., C01C] += (cj == 1) & (other10 == 0)
        per_class[..., C01S] += (cj == 1) & (other10 > 0)
        per_class[..., C10C] += (cj == 2) & (other01 == 0)
        per_class[..., C10S] += (cj == 2) & (other01 > 0)
        per_class[..., C11] += cj == 3
    key = np.where(ok, cls, 0) * base ** nc
    for c in range(nc):
        key = key + per_class[..., c] * base ** (nc - 1 - c)
    key = np.where(ok, key, -1)
    n_pairs = n_images - 1
    unit = np.broadcast_to(np.arange(n_shots * n_pairs).reshape(n_shots, n_pairs, 1, 1), key.shape)
    sel = key >= 0
    uniq, inv = np.unique(key[sel], return_inverse=True)
    M = uniq.size
    counts = np.bincount(unit[sel] * M + inv, minlength=n_shots * n_pairs * M).reshape(n_shots, n_pairs, M)
    own = uniq // base ** nc
    neighbours = np.stack([(uniq // base ** (nc - 1 - c)) % base for c in range(nc)], axis=1)
    site_entry = np.full(key.shape, -1, np.int64)
    site_entry[sel] = inv
    return PatternTable(own.astype(int), neighbours.astype(int), counts, K, site_entry=site_entry)


def pattern_probabilities(theta, *, neighbours: np.ndarray, n_neighbours: int) -> np.ndarray:
    """Model probability of each own pattern given the neighbour classes.

    Parameters
    ----------
    theta : sequence of float
        ``(filling, loss, hop, pair_loss, false_positive, false_negative)``, probabilities.
    neighbours : (M, 6) ndarray of int
        Neighbours in each of the :data:`NEIGHBOUR_CLASSES`.
    n_neighbours : int
        ``K``.

    Returns
    -------
    (M, 4) ndarray
        ``P(own pattern = 00, 01, 10, 11 | neighbours)``; rows sum to 1.

    Notes
    -----
    Mean-field quantities of a bulk site ``j`` (``K`` neighbours, each occupied with
    probability ``f``, so an atom arrives from a given neighbour with ``p = f hop / K``):

    * ``P(y)``: probability of pattern ``y``;
    * ``T(y)``: probability that ``j`` shows ``y`` and sent its atom to one given neighbour;
    * ``R(y)``: probability that ``j`` shows ``y`` when one extra atom arrived.

    For a neighbour of class ``c`` the chance that it sent its atom to ``s`` is
    ``a(c) = T / P`` and the likelihood ratio of "the atom of ``s`` hopped onto it" is
    ``r(c) = R / P``; for the split classes (01/10, clear/shared) numerator and denominator
    are multiplied by the probability that no / some other site next to ``j`` shows the
    competing pattern, with the neighbours of ``j`` taken as independent bulk sites.
    """
    f, L, H, beta, fp, fn = (float(v) for v in theta)
    K = int(n_neighbours)
    e = np.array([[1 - fp, fp], [fn, 1 - fn]])     # e[t, o] = P(read o | true t)
    g2 = 1.0 - beta                                 # P(site ends occupied | two or more atoms met)
    stay = max(1.0 - L - H, 0.0)                    # the site's own atom is still there
    prior = np.array([1 - f, f])
    p = f * H / K
    q0 = (1 - p) ** K
    q1 = K * p * (1 - p) ** (K - 1)
    q2 = max(1.0 - q0 - q1, 0.0)

    def pattern(o1, o2, occupied_at_end):
        """P(read o1 then o2) given P(occupied at the end | t) for t = 0, 1."""
        return float(np.sum(prior * e[:, o1] * (occupied_at_end * e[1, o2] + (1 - occupied_at_end) * e[0, o2])))

    after_left = q1 + q2 * g2                       # j's own atom gone: occupied only by arrivals
    end = np.array([after_left, stay * (q0 + (q1 + q2) * g2) + (1 - stay) * after_left])
    end_plus_one = np.array([q0 + (1 - q0) * g2, stay * g2 + (1 - stay) * (q0 + (1 - q0) * g2)])
    py = np.array([pattern(o1, o2, end) for o1 in (0, 1) for o2 in (0, 1)])
    R = np.array([pattern(o1, o2, end_plus_one) for o1 in (0, 1) for o2 in (0, 1)])
    T = np.array([f * H / K * e[1, o1] * (after_left * e[1, o2] + (1 - after_left) * e[0, o2])
                  for o1 in (0, 1) for o2 in (0, 1)])
    P01, P10 = py[1], py[2]
    # Split of pattern 01 (appearance): "clear" = no other vacated site next to j.
    p01_quiet = q0 * pattern(0, 1, np.array([0.0, stay]))       # appeared without an arrival (misread)
    per_source = max(P01 - p01_quiet, 0.0) / K                  # appeared by an arrival from one neighbour
    sender_vacated = T[2] / max(T.sum(), _EPS)                  # a sender reads 10
    c0 = (1 - P10) ** (K - 1)
    p01_clear = min(P01, (per_source + p01_quiet) * c0
                    + (K - 1) * per_source * (1 - sender_vacated) * (1 - P10) ** max(K - 2, 0))
    p01_shared = max(P01 - p01_clear, _EPS)
    # Split of pattern 10 (vacated): "clear" = no other appearance next to j.
    receiver_appears = (1 - f) * e[0, 0] * e[1, 1]              # an empty target reads 01 after a hop
    d0 = (1 - P01) ** (K - 1)
    p10_clear = min(P10, T[2] * d0 + (K - 1) * T[2] * (1 - receiver_appears) * (1 - P01) ** max(K - 2, 0)
                    + max(P10 - K * T[2], 0.0) * d0)
    p10_shared = max(P10 - p10_clear, _EPS)
    a = np.empty(len(NEIGHBOUR_CLASSES))
    r = np.empty(len(NEIGHBOUR_CLASSES))
    for c, y in ((C00, 0), (C11, 3)):
        a[c] = T[y] / max(py[y], _EPS)
        r[c] = R[y] / max(py[y], _EPS)
    a[C01C] = a[C01S] = T[1] / max(P01, _EPS)
    r[C01C] = R[1] * c0 / max(p01_clear, _EPS)
    r[C01S] = R[1] * (1 - c0) / p01_shared
    a[C10C] = T[2] * d0 / max(p10_clear, _EPS)
    a[C10S] = T[2] * (1 - d0) / p10_shared
    r[C10C] = R[2] * d0 / max(p10_clear, _EPS)
    r[C10S] = R[2] * (1 - d0) / p10_shared
    a = np.clip(a, 0.0, 1.0 - 1e-12)
    n = np.asarray(neighbours, float)
    # arrivals at s: Poisson-binomial over the neighbours
    p0 = np.exp(n @ np.log1p(-a))
    p1 = p0 * (n @ (a / (1 - a)))
    p2 = np.clip(1.0 - p0 - p1, 0.0, 1.0)
    # weight of "the atom of s hopped": targets inside the region change that neighbour's
    # pattern (factor r), targets outside the region (K - k_in of them) are unseen
    hop_weight = H * ((n @ r) + (K - n.sum(axis=1))) / K
    with_atom = p0 + (p1 + p2) * g2          # own atom stayed
    without = p1 + p2 * g2                   # own atom gone (or never there)
    out = np.zeros((n.shape[0], 4))
    for o1 in (0, 1):
        for o2 in (0, 1):
            col = (1 - f) * e[0, o1] * (without * e[1, o2] + (1 - without) * e[0, o2])
            for w, occ in ((stay, with_atom), (L, without), (hop_weight, without)):
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
    neighbours : (M, 6) ndarray of int
        Neighbour class counts of each table entry.
    counts : (M,) ndarray
        Number of site pairs in each entry (may be bootstrap-weighted).
    n_neighbours : int
        ``K``.
    """
    probs = pattern_probabilities(theta, neighbours=neighbours, n_neighbours=n_neighbours)
    p = probs[np.arange(own.size), own]
    return float(-np.sum(counts * np.log(np.maximum(p, _EPS))))
