"""Lens distortion: a smooth displacement of the sites from the perfect lattice.

An imaging system with barrel or pincushion distortion maps a point at distance ``r`` from its
optical axis to ``r (1 + k1 r^2 + ...)`` (Seidel distortion; Born & Wolf, Principles of Optics,
ch. 5.3, from memory): on the camera the sites of a perfect lattice lie on a smoothly bent grid.
The constant and linear parts of any such map are a shift, rotation, scaling and shear of the
lattice and belong to the lattice geometry; what is left is a displacement field of degree 2
and higher.

Model
-----
Site ``n`` of a frame sits at ``p_n + D(p_n)``, where ``p_n = offset + row a1 + col a2`` is the
perfect-lattice position (:class:`LatticeGeometry`) and ``D`` is a polynomial in the normalised
coordinates ``u = (x - cx) / s``, ``v = (y - cy) / s`` (frame centre, half the frame diagonal)
with only the terms of total degree 2 .. ``order`` (degree 3 holds the radial ``k1`` term about
any centre exactly; the part of it that is constant or linear is taken up by the geometry).

Fit (:func:`fit_distortion`): the frames are cut into blocks of about eight spacings and the
lattice offset of each block with atoms is fitted to the image model of its sites alone
(:func:`local_shifts`; every atom counts, so a block's shift is known to a few hundredths of a
pixel where single atoms' centres scatter by tenths). A weighted linear least-squares fit of
the block shifts (:func:`numpy.linalg.lstsq`) gives a constant and linear part, moved into the
lattice vectors and offset, and ``D``; a second round measures what the first missed.

When is the field used?  The field is **applied** only when it is both real and large enough
to matter: an F-test of the block shifts fitted with ``D`` against the perfect lattice alone
(the usual nested-model test of linear least squares, :func:`scipy.stats.f`) must give
p < 1e-6, and the field must move some block by at least :data:`MIN_SHIFT_SPACINGS` of a
lattice spacing off the best perfect lattice. Otherwise the field is kept for display but the
sites stay on the perfect lattice.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from scipy import stats

from latticeread.core._poly2d import poly_design, poly_terms
from latticeread.core.geometry import LatticeGeometry
from latticeread.errors import CalibrationError, LatticeNotFound

__all__ = ["DistortionField", "DistortionFit", "fit_distortion", "local_shifts", "MIN_SHIFT_SPACINGS",
           "P_VALUE_LIMIT"]

log = logging.getLogger(__name__)

#: The smallest largest-site-displacement (fraction of a lattice spacing) for which a
#: significant field is applied; below it the sites stay on the perfect lattice.
MIN_SHIFT_SPACINGS = 0.01
#: F-test p-value below which the field counts as real.
P_VALUE_LIMIT = 1e-6


def _floats(values, name: str) -> tuple[float, ...]:
    try:
        out = tuple(float(v) for v in values)
    except (TypeError, ValueError) as exc:
        raise CalibrationError(f"the distortion field's {name} must be numbers, got {values!r}") from exc
    if not all(np.isfinite(out)):
        raise CalibrationError(f"the distortion field's {name} must be finite, got {values!r}")
    return out


@dataclass(frozen=True, eq=False)
class DistortionField:
    """A fitted distortion field (displacement from the perfect lattice, pixels).

    Attributes
    ----------
    centre : (float, float)
        ``(x, y)`` of the normalisation centre, pixels.
    scale : float
        Normalisation length ``s``, pixels.
    order : int
        Highest total degree of the polynomial (2 .. 4).
    coef_x, coef_y : tuple of float
        Coefficients (pixels) of the monomials ``poly_terms(order, min_degree=2)`` for the
        x and y displacement.
    applied : bool
        True when the fit passed the significance test (module notes) and the sites are
        placed with it.
    n_atoms : int
        Located atoms in the blocks that entered the fit.
    rms_lattice : float
        RMS shift of the blocks off the best perfect lattice (weighted by atoms), pixels.
    rms_residual : float
        RMS shift of the blocks off the distorted model, pixels.
    p_value : float
        F-test p-value of the field against the perfect lattice.
    max_shift : float
        Largest displacement of a block by the field beyond what a perfect lattice takes up,
        pixels.
    spacing : float
        Smallest lattice spacing, pixels (for messages in spacings).
    binned : (K, 6) ndarray
        The measured blocks (for the geometry view), columns ``x, y, dx, dy, rx, ry`` in
        pixels: block centre, its shift off the best perfect lattice, and its shift off the
        distorted model.
    """

    centre: tuple[float, float]
    scale: float
    order: int
    coef_x: tuple[float, ...]
    coef_y: tuple[float, ...]
    applied: bool = False
    n_atoms: int = 0
    rms_lattice: float = float("nan")
    rms_residual: float = float("nan")
    p_value: float = float("nan")
    max_shift: float = 0.0
    spacing: float = float("nan")
    binned: np.ndarray = field(default_factory=lambda: np.zeros((0, 6)), repr=False)

    def __post_init__(self):
        order = int(self.order)
        if not 2 <= order <= 4:
            raise CalibrationError(f"the distortion field's order must be 2, 3 or 4, got {self.order!r}")
        n = len(poly_terms(order, min_degree=2))
        cx, cy = _floats(self.centre, "centre")
        coef_x, coef_y = _floats(self.coef_x, "x coefficients"), _floats(self.coef_y, "y coefficients")
        if len(coef_x) != n or len(coef_y) != n:
            raise CalibrationError(f"a distortion field of order {order} needs {n} coefficients per axis, got "
                                   f"{len(coef_x)} and {len(coef_y)}")
        scale = float(self.scale)
        if not np.isfinite(scale) or scale <= 0:
            raise CalibrationError(f"the distortion field's scale must be a positive length in pixels, got "
                                   f"{self.scale!r}")
        binned = np.asarray(self.binned, float).reshape(-1, 6).copy()
        binned.setflags(write=False)
        for name, value in (("centre", (cx, cy)), ("scale", scale), ("order", order), ("coef_x", coef_x),
                            ("coef_y", coef_y), ("applied", bool(self.applied)), ("n_atoms", int(self.n_atoms)),
                            ("rms_lattice", float(self.rms_lattice)), ("rms_residual", float(self.rms_residual)),
                            ("p_value", float(self.p_value)), ("max_shift", float(self.max_shift)),
                            ("spacing", float(self.spacing)), ("binned", binned)):
            object.__setattr__(self, name, value)

    def _key(self):
        return (self.centre, self.scale, self.order, self.coef_x, self.coef_y, self.applied, self.n_atoms,
                repr(self.rms_lattice), repr(self.rms_residual), repr(self.p_value), repr(self.max_shift),
                repr(self.spacing), self.binned.tobytes())

    def __eq__(self, other) -> bool:
        if not isinstance(other, DistortionField):
            return NotImplemented
        return self._key() == other._key()

    __hash__ = None  # type: ignore[assignment]

    @property
    def terms(self) -> tuple[tuple[int, int], ...]:
        return poly_terms(self.order, min_degree=2)

    def shift(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Displacement ``(dx, dy)`` in pixels of perfect-lattice points ``(x, y)`` (pixels)."""
        x = np.asarray(x, float)
        design = poly_design(x, y, centre=self.centre, scale=self.scale, terms=self.terms)
        return (design @ np.asarray(self.coef_x)).reshape(x.shape), (design @ np.asarray(self.coef_y)).reshape(x.shape)

    def place(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Where perfect-lattice points land on the camera: ``(x, y) + D(x, y)`` when applied, else unchanged."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not self.applied:
            return x.copy(), y.copy()
        dx, dy = self.shift(x, y)
        return x + dx, y + dy

    def unplace(self, x, y, *, n_iter: int = 4) -> tuple[np.ndarray, np.ndarray]:
        """Inverse of :meth:`place` (fixed-point iteration; the field is smooth and small)."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        if not self.applied:
            return x.copy(), y.copy()
        px, py = x.copy(), y.copy()
        for _ in range(n_iter):
            dx, dy = self.shift(px, py)
            px, py = x - dx, y - dy
        return px, py

    def describe(self) -> str:
        """One line for the terminal, the window and exports."""
        spacing = self.spacing if np.isfinite(self.spacing) and self.spacing > 0 else float("nan")
        state = "applied" if self.applied else "not applied (not significant or too small)"
        return (f"lens distortion: the field moves the lattice up to {self.max_shift:.2f} px "
                f"({self.max_shift / spacing:.3f} spacing) beyond a perfect lattice, {state}; blocks of "
                f"{self.n_atoms} atoms sit {self.rms_lattice:.3f} px rms off the perfect lattice and "
                f"{self.rms_residual:.3f} px rms off the distorted one")

    def to_dict(self) -> dict:
        return {"centre": list(self.centre), "scale": self.scale, "order": self.order, "coef_x": list(self.coef_x),
                "coef_y": list(self.coef_y), "applied": self.applied, "n_atoms": self.n_atoms,
                "rms_lattice": self.rms_lattice, "rms_residual": self.rms_residual, "p_value": self.p_value,
                "max_shift": self.max_shift, "spacing": self.spacing, "binned": self.binned.tolist()}

    @classmethod
    def from_dict(cls, data) -> "DistortionField":
        if not isinstance(data, dict):
            raise CalibrationError(f"the distortion field must be an object, got {type(data).__name__}")
        known = {"centre", "scale", "order", "coef_x", "coef_y", "applied", "n_atoms", "rms_lattice",
                 "rms_residual", "p_value", "max_shift", "spacing", "binned"}
        unknown = set(data) - known
        if unknown:
            raise CalibrationError(f"unknown distortion field entr(ies) {', '.join(sorted(unknown))}")
        missing = [k for k in ("centre", "scale", "order", "coef_x", "coef_y") if k not in data]
        if missing:
            raise CalibrationError(f"the distortion field is missing {', '.join(missing)}")
        try:
            return cls(**{**data, "binned": np.asarray(data.get("binned", []), float).reshape(-1, 6)})
        except (TypeError, ValueError) as exc:
            raise CalibrationError(f"the distortion field is malformed ({exc})") from exc


@dataclass(frozen=True)
class DistortionFit:
    """Result of :func:`fit_distortion`.

    Attributes
    ----------
    geometry : LatticeGeometry
        The perfect lattice that goes with the field (vectors refitted together with it; the
        offset is the first frame's, moved to the lattice translate nearest the input offset).
    field : DistortionField
        The fitted field (``applied`` says whether it passed the significance test).
    offsets : (n_frames, 2) ndarray
        Each frame's lattice offset, pixels.
    """

    geometry: LatticeGeometry
    field: DistortionField
    offsets: np.ndarray


def _solve(cols, target, weights):
    """Weighted linear least squares: coefficients and weighted residual sum of squares."""
    sw = np.sqrt(weights)
    coef, *_ = np.linalg.lstsq(cols * sw[:, None], target * sw, rcond=None)
    resid = (target - cols @ coef) * sw
    return coef, float(resid @ resid)


def _absorb(geometry: LatticeGeometry, const, lin, *, centre, scale) -> LatticeGeometry:
    """The geometry with a constant shift and a linear map (per normalised unit) taken up.

    ``p -> p + const + J (p - centre)`` with ``J = lin / scale`` turns site ``o + A n`` into
    ``(o + const + J (o - centre)) + (I + J) A n``.
    """
    jac = np.asarray(lin, float) / scale
    basis = (np.eye(2) + jac) @ geometry.basis
    o = np.asarray(geometry.offset, float)
    offset = o + np.asarray(const, float) + jac @ (o - np.asarray(centre, float))
    return LatticeGeometry(a1=(float(basis[0, 0]), float(basis[1, 0])), a2=(float(basis[0, 1]), float(basis[1, 1])),
                           offset=(float(offset[0]), float(offset[1])), quality=geometry.quality)


def fit_distortion(images, geometry: LatticeGeometry, *, psf, offsets, atoms=None, order: int = 3,
                   rounds: int = 1) -> DistortionFit:
    """Fit a smooth lens-distortion field to frames whose lattice is roughly known.

    Each round measures the lattice's shift in blocks of the frames against the current
    model (:func:`local_shifts`), fits ``shift = c + J p + Q(p)`` by weighted linear least
    squares (weights: atoms per block), moves ``c + J p`` into the lattice vectors and offset
    and adds ``Q`` (degree 2 .. ``order``) to the field. The significance test (module notes)
    compares, on the last round's blocks measured against the perfect lattice, the fit with
    ``Q`` against the perfect lattice alone.

    Parameters
    ----------
    images : (n, H, W) ndarray
        Frames in photons per pixel, finite (cosmic rays and hot pixels already filled).
    geometry : LatticeGeometry
        Perfect lattice from the frames (pixels).
    psf : PSFModel
    offsets : (n, 2) array_like
        Each frame's lattice offset, pixels.
    atoms : LocatedAtoms, optional
        Located atoms (:func:`latticeread.core.atoms.locate_atoms`) of the same frames.
    order : int
        Highest degree of the field (2 .. 4; 3 holds radial barrel/pincushion distortion).
    rounds : int
        Measure-and-fit rounds.

    Returns
    -------
    DistortionFit

    Raises
    ------
    LatticeNotFound
        Too few blocks with atoms (fewer than twice the unknowns).
    """
    images = np.asarray(images, float)
    if images.ndim == 2:
        images = images[None]
    height, width = images.shape[-2:]
    terms = poly_terms(order, min_degree=2)
    lin_terms = poly_terms(1, min_degree=0)
    centre = ((width - 1) / 2.0, (height - 1) / 2.0)
    scale = 0.5 * float(np.hypot(width, height))
    offs = np.asarray(offsets, float).reshape(-1, 2).copy()
    coef = np.zeros((2, len(terms)))
    current = None
    geo = geometry
    samples = np.zeros((0, 5))
    for _ in range(max(int(rounds), 1)):
        samples = local_shifts(images, geo, psf=psf, offsets=offs, field=current, atoms=atoms)
        if current is not None:  # shifts off the perfect lattice of this round
            dx, dy = current.shift(samples[:, 0], samples[:, 1])
            samples[:, 2] += dx
            samples[:, 3] += dy
        if len(samples) < len(lin_terms) + len(terms) + 2:
            raise LatticeNotFound(f"only {len(samples)} blocks of the frames hold enough atoms to measure a "
                                  "distortion field; at least "
                                  f"{len(lin_terms) + len(terms) + 2} are needed")
        x, y, d, w = samples[:, 0], samples[:, 1], samples[:, 2:4].T, samples[:, 4]
        cols = np.column_stack([poly_design(x, y, centre=centre, scale=scale, terms=lin_terms),
                                poly_design(x, y, centre=centre, scale=scale, terms=terms)])
        q_now = poly_design(x, y, centre=centre, scale=scale, terms=terms) @ coef.T  # (K, 2), zero at first
        sol = [_solve(cols, d[k] - q_now[:, k], w)[0] for k in (0, 1)]
        const = np.array([sol[0][0], sol[1][0]])
        lin = np.array([[sol[0][1], sol[0][2]], [sol[1][1], sol[1][2]]])
        geo = _absorb(geo, const, lin, centre=centre, scale=scale)
        jac = lin / scale
        offs = offs + const + (jac @ (offs - np.asarray(centre)).T).T
        coef = coef + np.array([sol[0][3:], sol[1][3:]])
        current = DistortionField(centre=centre, scale=scale, order=order, coef_x=coef[0], coef_y=coef[1])
    # test and report on the last round's blocks as shifts off the perfect lattice (the test
    # refits the constant and linear part, so the geometry's last update does not matter)
    lin_cols = poly_design(x, y, centre=centre, scale=scale, terms=lin_terms)
    q = poly_design(x, y, centre=centre, scale=scale, terms=terms)
    model = np.stack([q @ coef[0], q @ coef[1]])
    rss0 = rss1 = 0.0
    dev = np.zeros_like(d)
    res = np.zeros_like(d)
    rel = np.zeros_like(d)
    for k in (0, 1):
        c0, r0 = _solve(lin_cols, d[k], w)
        rss0 += r0
        dev[k] = d[k] - lin_cols @ c0
        # the field's own refit (Q plus a linear part) on the same blocks
        c1, r1 = _solve(np.column_stack([lin_cols, q]), d[k], w)
        rss1 += r1
        res[k] = d[k] - lin_cols @ _solve(lin_cols, d[k] - model[k], w)[0] - model[k]
        rel[k] = model[k] - lin_cols @ _solve(lin_cols, model[k], w)[0]
    n_obs = 2 * len(samples)
    extra = 2 * len(terms)
    dof = max(n_obs - 2 * (len(lin_terms) + len(terms)), 1)
    f_stat = ((rss0 - rss1) / extra) / max(rss1 / dof, 1e-300)
    p_value = float(stats.f.sf(f_stat, extra, dof)) if n_obs > 2 * (len(lin_terms) + len(terms)) else 1.0
    wn = w / w.sum()
    rms_lattice = float(np.sqrt(np.sum(wn * (dev ** 2).sum(axis=0))))
    rms_residual = float(np.sqrt(np.sum(wn * (res ** 2).sum(axis=0))))
    max_shift = float(np.max(np.hypot(rel[0], rel[1])))
    spacing = float(min(geo.spacings))
    applied = bool(p_value < P_VALUE_LIMIT and max_shift >= MIN_SHIFT_SPACINGS * spacing)
    binned = np.column_stack([x, y, dev[0], dev[1], res[0], res[1]])
    # the reference offset: the first frame's, moved to the lattice translate nearest the input
    # offset (indices stay stable)
    basis = geo.basis
    o = offs[0].copy()
    o = o - basis @ np.rint(np.linalg.solve(basis, o - np.asarray(geometry.offset, float)))
    geo = geo.with_offset((float(o[0]), float(o[1])))
    field_ = DistortionField(centre=centre, scale=scale, order=order, coef_x=coef[0], coef_y=coef[1],
                             applied=applied, n_atoms=int(w.sum()), rms_lattice=rms_lattice,
                             rms_residual=rms_residual, p_value=p_value, max_shift=max_shift, spacing=spacing,
                             binned=binned)
    log.info("distortion fit: %s (F-test p = %.2g)", field_.describe(), p_value)
    return DistortionFit(geometry=geo, field=field_, offsets=offs)


# --- the field from local lattice offsets (image model, all atoms) --------------------------

def local_shifts(images, geometry: LatticeGeometry, *, psf, offsets, field: DistortionField | None = None,
                 atoms=None, min_spots: int = 8, tiles: int | None = None):
    """Where the lattice sits in tiles of the frames, relative to the (distorted) model.

    Each frame is cut into ``tiles x tiles`` blocks; in every block with at least
    ``min_spots`` located atoms the lattice offset is fitted to the image model of that
    block's sites alone (:meth:`latticeread.core.amplitudes.SiteBasis.fit_offset`: every atom
    counts, single or not, and the fit knows the PSF, so it is far more precise than the
    centres of the atoms that stand apart). The block's shift is its offset minus the frame's.

    Parameters
    ----------
    images : (n, H, W) ndarray
        Frames in photons per pixel (finite).
    geometry : LatticeGeometry
        The perfect lattice (pixels).
    psf : PSFModel
    offsets : (n, 2) array_like
        Each frame's lattice offset, pixels.
    field : DistortionField, optional
        Current field; the sites are placed with it (``applied`` or not) so the shifts are
        what it misses.
    atoms : LocatedAtoms, optional
        Located atoms of the frames (for the per-block count).
    min_spots : int
        Fewest located atoms per block and frame.
    tiles : int, optional
        Blocks per side (default: about eight lattice spacings per block, 4 .. 8).

    Returns
    -------
    (K, 5) ndarray
        ``x, y, dx, dy, weight`` per block and frame: the centroid of the block's atoms (on the
        perfect lattice; the block's sites without ``atoms``), pixels, its shift (pixels) and
        the number of atoms in it.
    """
    from latticeread.core.amplitudes import SiteBasis
    from latticeread.core.geometry import lattice_sites
    from latticeread.errors import ReconstructionError

    images = np.asarray(images, float)
    if images.ndim == 2:
        images = images[None]
    n, height, width = images.shape
    spacing = float(min(geometry.spacings))
    if tiles is None:
        tiles = int(np.clip(np.floor(min(height, width) / (8 * spacing)), 4, 8))
    out = []
    for f in range(n):
        frame_geo = geometry.with_offset(tuple(np.asarray(offsets[f], float)))
        sites = lattice_sites(frame_geo, (height, width))
        px, py = sites.x, sites.y
        if field is not None:
            dx, dy = field.shift(px, py)
            px, py = px + dx, py + dy
        bx = np.clip((sites.x / width * tiles).astype(int), 0, tiles - 1)
        by = np.clip((sites.y / height * tiles).astype(int), 0, tiles - 1)
        counts = np.full((tiles, tiles), min_spots)
        if atoms is not None:
            mine = np.asarray(atoms.frame) == f
            atom_x, atom_y = np.asarray(atoms.x, float)[mine], np.asarray(atoms.y, float)[mine]
            if field is not None:  # back onto the perfect lattice, to within the field's error
                atom_x, atom_y = atom_x - field.shift(atom_x, atom_y)[0], atom_y - field.shift(atom_x, atom_y)[1]
            ax = np.clip((atom_x / width * tiles).astype(int), 0, tiles - 1)
            ay = np.clip((atom_y / height * tiles).astype(int), 0, tiles - 1)
            counts = np.zeros((tiles, tiles), int)
            np.add.at(counts, (ay, ax), 1)
        for j in range(tiles):
            for i in range(tiles):
                m = (bx == i) & (by == j)
                if counts[j, i] < min_spots or m.sum() < 4:
                    continue
                from latticeread.core.geometry import SiteGrid

                rows, cols = sites.rows[m], sites.cols[m]
                sub = SiteGrid(rows=rows, cols=cols, x=px[m], y=py[m], row_min=int(rows.min()),
                               col_min=int(cols.min()), n_rows=int(rows.max() - rows.min() + 1),
                               n_cols=int(cols.max() - cols.min() + 1))
                try:
                    basis = SiteBasis(frame_geo, frame_shape=(height, width), psf=psf, sites=sub)
                    found, _ = basis.fit_offset(images[f], start=frame_geo.offset, search=False)
                except (ReconstructionError, np.linalg.LinAlgError, ValueError) as exc:
                    log.debug("block (%d, %d) of frame %d: no local offset (%s)", i, j, f, exc)
                    continue
                shift = np.asarray(found) - np.asarray(frame_geo.offset)
                if np.hypot(*shift) > 0.3 * spacing:  # a block that slipped by a site or found nothing
                    continue
                # the shift is an average over the block's atoms: it belongs to their centroid,
                # not to the middle of the block (which may be half empty)
                if atoms is not None:
                    here = (ax == i) & (ay == j)
                    cx, cy = float(atom_x[here].mean()), float(atom_y[here].mean())
                else:
                    cx, cy = float(sites.x[m].mean()), float(sites.y[m].mean())
                out.append([cx, cy, shift[0], shift[1], float(counts[j, i])])
    return np.asarray(out, float).reshape(-1, 5)
