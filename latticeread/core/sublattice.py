"""Is the lattice found too fine? Atoms that all sit on one sublattice of it.

A lattice read from a few atom positions can come out finer than the real one: every atom
still sits on one of its sites (a lattice of index ``n`` holds the real one as a sublattice,
e.g. sqrt(2) finer and turned by 45 degrees for a square lattice, index 2), so the positions
fit it just as well, and its spacing is reported as precisely as the real one's. The sites it
adds are never occupied. This module tests that: the atoms' site indices are sorted into the
cosets of every sublattice of index 2 to :data:`MAX_INDEX`, and when nearly all of them fall
into one coset of one sublattice (random loading puts ``1 / n`` of them there), that coarser
lattice is the one the atoms show.

The sublattices of index ``n`` of the integer lattice Z^2 are the column spans of the Hermite
normal forms ``[[a, b], [0, d]]`` with ``a d = n`` and ``0 <= b < a`` (one matrix per
sublattice; there are sigma(n) of them, the sum of the divisors of n: 3 for n = 2, 4 for 3, 7
for 4). Standard lattice algebra (Cohen, *A Course in Computational Algebraic Number Theory*,
section 2.4.2, quoted from memory).

A real pattern of atoms on one sublattice only (a checkerboard loading, a superlattice) looks
the same in an image: the caller says so in its warning and the lab's lattice spacing decides.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice import canonical_geometry

__all__ = ["MAX_INDEX", "MIN_ATOMS", "MIN_SHARE", "SublatticeTest", "coarsest_lattice", "sublattice_forms"]

#: Largest index tested: 4 covers a lattice sqrt(2) finer (index 2), sqrt(3) finer (3, the
#: triangular lattice's rotated one), and twice finer along one or both axes (2, 4).
MAX_INDEX = 4
#: Share of the atoms on one coset needed to call the lattice too fine. By chance (atoms
#: loaded at random on the real lattice) it is 1/n of them; 0.95 leaves room for a few
#: atoms misplaced by noise or a neighbour's light.
MIN_SHARE = 0.95
#: Fewest atoms for the test: with 20 atoms a share of 0.95 on one of two cosets happens by
#: chance with probability 21 / 2^20 = 2e-5 (binomial tail).
MIN_ATOMS = 20


@dataclass(frozen=True)
class SublatticeTest:
    """Outcome of :func:`coarsest_lattice`.

    Attributes
    ----------
    geometry : LatticeGeometry
        The coarsest lattice the atoms show (the input when ``index`` is 1), pixels.
    index : int
        How many sites of the input lattice make one site of ``geometry`` (1: not too fine).
    share : float
        Share of the atoms on the chosen coset (1.0 when ``index`` is 1).
    n_atoms : int
        Atoms that entered the test (within a quarter spacing of a site).
    """

    geometry: LatticeGeometry
    index: int
    share: float
    n_atoms: int

    @property
    def too_fine(self) -> bool:
        return self.index > 1


def sublattice_forms(index: int) -> list[np.ndarray]:
    """Hermite normal forms of the sublattices of Z^2 of the given index, as 2x2 int arrays.

    The columns span the sublattice; there are sigma(index) of them.
    """
    forms = []
    for a in range(1, index + 1):
        if index % a:
            continue
        d = index // a
        for b in range(a):
            forms.append(np.array([[a, b], [0, d]], dtype=int))
    return forms


def _site_indices(geometry: LatticeGeometry, x, y, frame):
    """Integer site indices (N, 2) of the atoms near a site, per frame after its own shift."""
    u = np.linalg.solve(geometry.basis, np.vstack([x - geometry.offset[0], y - geometry.offset[1]])).T
    keep = np.zeros(len(u), bool)
    out = np.zeros_like(u)
    for f in np.unique(frame):
        m = frame == f
        # each frame's own offset, in lattice units (circular mean of the fractional parts):
        # a stack that drifted by a spacing still gives consistent cosets within each frame
        frac = u[m] - np.rint(u[m])
        shift = np.angle(np.exp(2j * np.pi * frac).mean(axis=0)) / (2 * np.pi)
        v = u[m] - shift
        near = np.all(np.abs(v - np.rint(v)) < 0.25, axis=1)
        out[m] = np.rint(v)
        keep[m] = near
    return out.astype(int), keep


def coarsest_lattice(geometry: LatticeGeometry, x, y, *, frame=None, max_index: int = MAX_INDEX,
                     min_share: float = MIN_SHARE, min_atoms: int = MIN_ATOMS) -> SublatticeTest:
    """The coarsest lattice on which (nearly) all the located atoms sit.

    Parameters
    ----------
    geometry : LatticeGeometry
        The lattice found (pixels).
    x, y : (N,) array_like
        Atom positions, pixels.
    frame : (N,) array_like of int, optional
        Frame of each atom; each frame's cosets are counted on their own (the lattice may
        move between frames). All in one frame when omitted.
    max_index : int
        Largest sublattice index tested.
    min_share : float
        Share of the atoms on one coset that makes the lattice too fine.
    min_atoms : int
        Fewer atoms than this: no test (index 1 returned).

    Returns
    -------
    SublatticeTest
        The largest index whose best coset holds ``min_share`` of the atoms (ties: the larger
        share); its basis is put in the canonical form, its offset on a site of the coset of
        the first frame that holds atoms (the input geometry's offset is taken as that frame's,
        as :func:`latticeread.core.atoms.lattice_from_atoms` returns it).
    """
    x = np.asarray(x, float).ravel()
    y = np.asarray(y, float).ravel()
    frame = np.zeros(x.size, int) if frame is None else np.asarray(frame, int).ravel()
    if not (x.size == y.size == frame.size):
        raise ValueError(f"x, y and frame must have the same length, got {x.size}, {y.size}, {frame.size}")
    if not (0.5 < min_share <= 1.0):
        raise ValueError(f"min_share must be in (0.5, 1], got {min_share}")
    v, keep = _site_indices(geometry, x, y, frame) if x.size else (np.zeros((0, 2), int), np.zeros(0, bool))
    v, frame = v[keep], frame[keep]
    n = int(len(v))
    none = SublatticeTest(geometry=geometry, index=1, share=1.0, n_atoms=n)
    if n < min_atoms:
        return none
    frames = np.unique(frame)
    reference = frames[0]
    best = None
    for index in range(2, int(max_index) + 1):
        for form in sublattice_forms(index):
            inverse = np.linalg.inv(form)
            # coset label: the fractional part of the indices in the sublattice's basis
            labels = np.rint(((v @ inverse.T) % 1.0) * index).astype(int) % index
            on_best, rep = 0, None
            for f in frames:
                m = frame == f
                keys, first, counts = np.unique(labels[m], axis=0, return_index=True, return_counts=True)
                on_best += int(counts.max())
                if f == reference:
                    rep = v[m][first[np.argmax(counts)]]
            share = on_best / n
            if share >= min_share and (best is None or index > best[0] or share > best[1]):
                best = (index, share, form, rep)
    if best is None:
        return none
    index, share, form, rep = best
    basis = geometry.basis @ form
    offset = np.asarray(geometry.offset, float) + geometry.basis @ rep
    coarse = LatticeGeometry(a1=tuple(basis[:, 0]), a2=tuple(basis[:, 1]), offset=tuple(offset),
                             quality=geometry.quality)
    return SublatticeTest(geometry=canonical_geometry(coarse), index=int(index), share=float(share), n_atoms=n)
