"""A PSF that changes across the field: a PSF measured in each zone, blended smoothly between zones.

Aberrations of the imaging (defocus, astigmatism, coma growing with the distance from the
optical axis) change the image of an atom across the field: wider, elongated, with its light
shifted to one side. Here the analysed region is split into ``rows x cols`` zones (default
3 x 3) and in each zone the PSF is measured from all atoms of a few frames, crowded or not:

1. a first least-squares fit with the field-average PSF gives every site's amplitude
   (photons) and each frame's lattice offset; an Otsu threshold on the amplitudes picks the
   occupied sites (a few wrong ones do little harm to step 2);
2. with the sites' positions and amplitudes fixed, each zone's pixels are linear in the PSF:
   ``pixel = background + sum_k a_k PSF(pixel - x_k)`` with every occupied site ``k`` within
   the stamp radius (also across the zone's border). The PSF is a density on a grid of
   ``1/SUPERSAMPLE`` pixel with bilinear interpolation, integrated over each pixel like
   :class:`latticeread.core.psf.PSFModel` does; it follows from one regularised linear least
   squares problem (squared-Laplacian smoothness penalty, as in
   :mod:`latticeread.core.psf_estimate`). The measured PSF is NOT re-centred: a shift of the
   atoms' light (coma) belongs to the PSF, the site positions stay on the lattice.

Between zone centres the PSF of a site is the bilinear blend of the four nearest zone PSFs
(weights summing to 1; outside the outermost centres the nearest ones), handed to
:class:`latticeread.core.amplitudes.SiteBasis` as per-site mixes, so the amplitude fit is
still factorised once per calibration.

A zone with fewer than :data:`MIN_ZONE_ATOMS` atoms (summed over the frames used) gets no PSF
of its own: it takes the PSF measured over the whole region the same way, and the result says
so in ``warnings``.

Scope and limits: the zone PSFs are as good as the first pass's occupations; the blend is
linear between zone centres (a PSF that changes faster than the zone size is averaged).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
from scipy import sparse

from latticeread.core.amplitudes import SiteBasis, _OneThread
from latticeread.core.geometry import LatticeGeometry, SiteGrid
from latticeread.core.psf import PSFModel, empirical_psf
from latticeread.errors import ReconstructionError

__all__ = ["ZonePSFs", "estimate_zone_psfs", "MIN_ZONE_ATOMS"]

log = logging.getLogger(__name__)
_ONE_THREAD = _OneThread()

#: A zone needs at least this many atoms (summed over the frames used) for its own PSF.
MIN_ZONE_ATOMS = 40
#: Kernel samples per pixel and axis of the zone PSFs.
SUPERSAMPLE = 2
#: Stamp radius of the zone PSFs in units of the field-average FWHM (at most the average PSF's radius).
RADIUS_FWHM = 2.0
#: Relative strength of the smoothness penalty (times the mean diagonal of the normal matrix).
SMOOTHING = 3e-3


@dataclass(frozen=True)
class ZonePSFs:
    """Zone PSFs of a calibration and how they blend.

    Attributes
    ----------
    grid : (int, int)
        Zones along y (rows) and x (columns).
    bounds : (float, float, float, float)
        ``(x0, x1, y0, y1)`` of the zoned area, pixels (the analysed sites' bounding box).
    psfs : tuple of PSFModel
        One empirical PSF per zone (row-major), all with the same stamp radius; a zone
        without its own PSF holds the region's PSF.
    n_atoms : tuple of int
        Atoms in each zone (summed over the frames used).
    fitted : tuple of bool
        Whether each zone has its own PSF (False: too few atoms or a failed fit).
    fwhm : tuple of float
        Each zone PSF's FWHM, pixels (mean of the principal-axis widths; NaN if not measurable).
    applied : bool
        Whether the reconstruction uses the zone PSFs.
    warnings : tuple of str
        Zones with too few atoms or a failed fit, and why.
    """

    grid: tuple
    bounds: tuple
    psfs: tuple
    n_atoms: tuple
    fitted: tuple
    fwhm: tuple
    applied: bool = True
    warnings: tuple = field(default_factory=tuple)

    def __post_init__(self):
        rows, cols = (int(v) for v in self.grid)
        if rows < 1 or cols < 1:
            raise ValueError(f"the zone grid must have at least one zone per axis, got {self.grid}")
        n = rows * cols
        psfs = tuple(PSFModel.from_dict(p) if isinstance(p, dict) else p for p in self.psfs)
        for name, value in (("psfs", psfs), ("n_atoms", self.n_atoms), ("fitted", self.fitted),
                            ("fwhm", self.fwhm)):
            if len(value) != n:
                raise ValueError(f"zone PSFs: {name} has {len(value)} entries for {rows}x{cols} zones")
        if len({int(p.radius) for p in psfs}) != 1:
            raise ValueError("zone PSFs must all have the same stamp radius")
        object.__setattr__(self, "grid", (rows, cols))
        object.__setattr__(self, "bounds", tuple(float(v) for v in self.bounds))
        object.__setattr__(self, "psfs", psfs)
        object.__setattr__(self, "n_atoms", tuple(int(v) for v in self.n_atoms))
        object.__setattr__(self, "fitted", tuple(bool(v) for v in self.fitted))
        object.__setattr__(self, "fwhm", tuple(float(v) for v in self.fwhm))
        object.__setattr__(self, "warnings", tuple(str(w) for w in self.warnings))

    @property
    def radius(self) -> int:
        """Common stamp radius of the zone PSFs, pixels."""
        return int(self.psfs[0].radius)

    def centres(self) -> np.ndarray:
        """(n_zones, 2) zone centres ``(x, y)``, pixels, row-major."""
        rows, cols = self.grid
        x0, x1, y0, y1 = self.bounds
        cx = x0 + (np.arange(cols) + 0.5) * (x1 - x0) / cols
        cy = y0 + (np.arange(rows) + 0.5) * (y1 - y0) / rows
        yy, xx = np.meshgrid(cy, cx, indexing="ij")
        return np.c_[xx.ravel(), yy.ravel()]

    def weights(self, x, y) -> np.ndarray:
        """(N, n_zones) bilinear blending weights of points ``(x, y)`` (pixels); rows sum to 1."""
        rows, cols = self.grid
        x0, x1, y0, y1 = self.bounds
        x = np.atleast_1d(np.asarray(x, float))
        y = np.atleast_1d(np.asarray(y, float))
        out = np.zeros((x.size, rows * cols))
        # position in units of zones, 0 at the first zone centre, clamped to the outermost centres
        u = np.clip((x - x0) / max(x1 - x0, 1e-9) * cols - 0.5, 0, cols - 1)
        v = np.clip((y - y0) / max(y1 - y0, 1e-9) * rows - 0.5, 0, rows - 1)
        i0 = np.minimum(np.floor(v).astype(int), max(rows - 2, 0))
        j0 = np.minimum(np.floor(u).astype(int), max(cols - 2, 0))
        fv, fu = v - i0, u - j0
        idx = np.arange(x.size)
        for di, wv in ((0, 1 - fv), (1, fv)):
            for dj, wu in ((0, 1 - fu), (1, fu)):
                i, j = np.minimum(i0 + di, rows - 1), np.minimum(j0 + dj, cols - 1)
                np.add.at(out, (idx, i * cols + j), wv * wu)
        return out

    def fwhm_map(self) -> np.ndarray:
        """(rows, cols) zone FWHM, pixels."""
        return np.asarray(self.fwhm).reshape(self.grid)

    def describe(self) -> str:
        """One line for notes and exports."""
        rows, cols = self.grid
        f = np.asarray(self.fwhm)
        f = f[np.isfinite(f)]
        widths = f"FWHM {f.min():.2f}-{f.max():.2f} pixels" if f.size else "FWHM not measurable"
        state = "applied" if self.applied else "not applied"
        few = sum(not v for v in self.fitted)
        extra = f"; {few} zone(s) with too few atoms or a failed fit use the region's PSF" if few else ""
        return f"zone PSFs {rows}x{cols}: {widths}, {state}{extra}"

    def to_dict(self) -> dict:
        return {"grid": list(self.grid), "bounds": list(self.bounds), "psfs": [p.to_dict() for p in self.psfs],
                "n_atoms": list(self.n_atoms), "fitted": list(self.fitted),
                "fwhm": [None if not np.isfinite(v) else v for v in self.fwhm], "applied": bool(self.applied),
                "warnings": list(self.warnings)}

    @classmethod
    def from_dict(cls, data: dict) -> "ZonePSFs":
        return cls(grid=tuple(data["grid"]), bounds=tuple(data["bounds"]), psfs=tuple(data["psfs"]),
                   n_atoms=tuple(data["n_atoms"]), fitted=tuple(data["fitted"]),
                   fwhm=tuple(float("nan") if v is None else v for v in data["fwhm"]),
                   applied=bool(data.get("applied", True)), warnings=tuple(data.get("warnings", ())))


def _otsu(amplitudes) -> float:
    """Otsu threshold on pooled amplitudes (photons); NaN when there is nothing to split."""
    from latticeread.core.classify import select_threshold

    a = amplitudes[np.isfinite(amplitudes)]
    if a.size < 8:
        return float("nan")
    try:
        return float(select_threshold(a, method="otsu").threshold)
    except Exception:  # a flat histogram: no atoms to speak of
        return float("nan")


def _kernel_design(px, py, ax, ay, amp, *, R: int, s: int, n_rows: int):
    """Sparse design (pixels x kernel cells): each pixel's sum over atoms of amp x pixel-integrated PSF.

    ``px, py``: pixel centres of the rows; ``ax, ay, amp``: atoms. The kernel is a density on
    a grid of step ``1/s`` pixel, centre at index ``c = (M - 1) / 2`` with ``M = 2 (R + 1) s + 1``,
    interpolated bilinearly and averaged over the ``s x s`` sub-samples of each pixel.
    """
    half = (R + 1) * s
    M = 2 * half + 1
    from scipy.spatial import cKDTree

    tree = cKDTree(np.c_[ax, ay])
    lists = tree.query_ball_point(np.c_[px, py], r=R + 2.0)  # every kernel cell of the disk
    counts = np.fromiter((len(v) for v in lists), int, len(lists))
    row = np.repeat(np.arange(len(lists)), counts)
    atom = np.fromiter((k for v in lists for k in v), int, int(counts.sum()))
    rows_, cols_, vals_ = [], [], []
    sub = (np.arange(s) + 0.5) / s - 0.5
    for oy in sub:
        for ox in sub:
            gx = (px[row] + ox - ax[atom]) * s + half
            gy = (py[row] + oy - ay[atom]) * s + half
            ix, iy = np.floor(gx).astype(int), np.floor(gy).astype(int)
            fx, fy = gx - ix, gy - iy
            for dy, wy in ((0, 1 - fy), (1, fy)):
                for dx, wx in ((0, 1 - fx), (1, fx)):
                    jx, jy = ix + dx, iy + dy
                    ok = (jx >= 0) & (jx < M) & (jy >= 0) & (jy < M)
                    rows_.append(row[ok])
                    cols_.append(jy[ok] * M + jx[ok])
                    vals_.append((amp[atom] * wx * wy / (s * s))[ok])
    return sparse.csr_matrix((np.concatenate(vals_), (np.concatenate(rows_), np.concatenate(cols_))),
                             shape=(n_rows, M * M)), M


def _fit_kernel(images, offsets_xy, sites_xy, amps, pixels, *, R: int, s: int):
    """Kernel (M x M density) of the pixels ``pixels`` (list per frame of (rows, cols) arrays)."""
    from latticeread.core.psf_estimate import _laplacian

    blocks, ys, bg = [], [], []
    n_frames = len(images)
    for k, (im, (dx, dy), (r, c)) in enumerate(zip(images, offsets_xy, pixels)):
        occ = amps[k] > 0
        design, M = _kernel_design(c.astype(float), r.astype(float), sites_xy[0][occ] + dx, sites_xy[1][occ] + dy,
                                   amps[k][occ], R=R, s=s, n_rows=r.size)
        blocks.append(design)
        ys.append(im[r, c])
        col = np.zeros((r.size, n_frames))
        col[:, k] = 1.0
        bg.append(col)
    # the kernel is fitted on a disk of radius R + 1 pixels (zero outside): fewer unknowns, and
    # every cell of it is seen by pixels within the atoms' search radius
    c = (M - 1) / 2
    gy, gx = np.mgrid[0:M, 0:M]
    disk = np.flatnonzero(np.hypot(gx - c, gy - c).ravel() <= (R + 1) * s)
    A = sparse.hstack([sparse.vstack(blocks).tocsc()[:, disk], sparse.csr_matrix(np.vstack(bg))]).tocsr()
    y = np.concatenate(ys)
    ata = (A.T @ A).toarray()
    n_k = disk.size
    L = _laplacian(M)
    LL = (L @ L).tocsc()[:, disk]
    lam = SMOOTHING * float(np.mean(np.diag(ata)[:n_k]))
    ata[:n_k, :n_k] += lam * (LL.T @ LL).toarray()
    ata[np.diag_indices_from(ata)] += 1e-6 * float(np.mean(np.diag(ata)))
    with _ONE_THREAD():  # BLAS threads only slow this small dense solve down on a busy machine
        sol = scipy.linalg.solve(ata, A.T @ y, assume_a="pos", check_finite=False)
    kernel = np.zeros(M * M)
    kernel[disk] = sol[:n_k]
    return np.clip(kernel.reshape(M, M), 0, None), sol[n_k:]


def _as_psf(kernel, *, s: int, R: int, fallback_fwhm: float, **params) -> tuple[PSFModel, float]:
    from latticeread.core.psf_estimate import measure_kernel

    try:
        fwhm = float(measure_kernel(kernel, supersample=s)["fwhm"])
    except ReconstructionError:
        fwhm = float("nan")
    psf = empirical_psf(kernel, supersample=s, fwhm=fwhm if np.isfinite(fwhm) else fallback_fwhm, radius=R,
                        **params)
    return psf, fwhm


def estimate_zone_psfs(frames, *, geometry: LatticeGeometry, psf: PSFModel, sites: SiteGrid, site_x, site_y,
                       grid=(3, 3), n_frames: int = 3, min_atoms: int = MIN_ZONE_ATOMS,
                       n_passes: int = 2) -> ZonePSFs:
    """Measure one PSF per zone of the analysed region from all atoms of a few frames.

    Parameters
    ----------
    frames : (n, H, W) ndarray
        Frames in photons per pixel (finite; artefacts already removed).
    geometry : LatticeGeometry
        Lattice vectors and the reference offset, pixels; the offset is re-fitted per frame.
    psf : PSFModel
        Field-average PSF (any kind), for the first pass.
    sites : SiteGrid
        Sites fitted (at the reference offset, lens distortion applied), pixels.
    site_x, site_y : array_like
        Centres of the analysed sites, pixels: their bounding box is split into zones.
    grid : (int, int)
        Zones along y and x.
    n_frames : int
        Frames used (evenly spread).
    min_atoms : int
        Fewest atoms (summed over the frames used) for a zone to get its own PSF.
    n_passes : int
        Rounds of (occupations and amplitudes, zone PSFs); from the second on, the amplitudes
        come from the previous round's zone PSFs.

    Returns
    -------
    ZonePSFs

    Raises
    ------
    ReconstructionError
        No site to zone, a grid that is not a pair of positive integers, or no atoms at all.
    """
    stack = np.asarray(frames, float)
    if stack.ndim == 2:
        stack = stack[None]
    try:
        rows, cols = (int(v) for v in grid)
    except (TypeError, ValueError):
        raise ReconstructionError(f"the zone grid must be two positive integers (rows, columns), got {grid!r}")
    if rows < 1 or cols < 1:
        raise ReconstructionError(f"the zone grid must be two positive integers (rows, columns), got {grid!r}")
    sx, sy = np.asarray(site_x, float), np.asarray(site_y, float)
    if sx.size == 0 or len(sites) == 0:
        raise ReconstructionError("no analysed site to split into PSF zones")
    spacing = float(min(geometry.spacings))
    bounds = (float(sx.min()) - spacing / 2, float(sx.max()) + spacing / 2,
              float(sy.min()) - spacing / 2, float(sy.max()) + spacing / 2)
    pick = np.unique(np.linspace(0, stack.shape[0] - 1, max(1, min(int(n_frames), stack.shape[0]))).round().astype(int))
    images = [stack[k] for k in pick]
    shape = images[0].shape
    s = SUPERSAMPLE
    R = int(min(psf.radius, np.ceil(RADIUS_FWHM * psf.fwhm)))

    # first pass: amplitudes and offsets with the field-average PSF, occupied sites by Otsu
    base = SiteBasis(geometry, frame_shape=shape, psf=psf, sites=sites)
    offsets = [base.fit_offset(im, search=True)[0] for im in images]
    fits = [base.linear(im, offset=o) for im, o in zip(images, offsets)]
    amps = np.stack([f.amplitudes for f in fits])
    threshold = _otsu(amps.ravel())
    if not np.isfinite(threshold):
        raise ReconstructionError("the frames show no atoms to measure zone PSFs on")
    amps = np.where(amps > threshold, amps, 0.0)
    shifts = [(o[0] - geometry.offset[0], o[1] - geometry.offset[1]) for o in offsets]
    xy = (sites.x, sites.y)

    def measure(amps):
        zx = np.linspace(bounds[0], bounds[1], cols + 1)
        zy = np.linspace(bounds[2], bounds[3], rows + 1)
        yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
        margin = R + 1  # pixels whose stamp window reaches outside the frame are left out

        def zone_pixels(xa, xb, ya, yb):
            keep = (xx >= xa) & (xx < xb) & (yy >= ya) & (yy < yb)
            keep[:margin] = keep[-margin:] = False
            keep[:, :margin] = keep[:, -margin:] = False
            r, c = np.nonzero(keep)
            return [(r, c)] * len(images)

        def zone_atoms(xa, xb, ya, yb):
            inside = (sites.x >= xa) & (sites.x < xb) & (sites.y >= ya) & (sites.y < yb)
            return int(np.count_nonzero(amps[:, inside] > 0))

        region: list = []

        def region_psf():
            """The whole region's PSF, for zones without enough atoms (fitted once, when needed)."""
            if not region:
                kernel, _ = _fit_kernel(images, shifts, xy, amps, zone_pixels(*bounds), R=R, s=s)
                region.extend(_as_psf(kernel, s=s, R=R, fallback_fwhm=psf.fwhm, zone="region"))
            return region

        psfs, n_atoms, fitted, fwhm, warnings = [], [], [], [], []
        for i in range(rows):
            for j in range(cols):
                name = f"zone (row {i + 1}, column {j + 1})"
                box = (zx[j], zx[j + 1], zy[i], zy[i + 1])
                atoms = zone_atoms(*box)
                n_atoms.append(atoms)
                if atoms < min_atoms:
                    warnings.append(f"PSF {name}: only {atoms} atoms in {len(images)} frame(s) (need {min_atoms}); it "
                                    "uses the PSF of the whole region")
                    psfs.append(region_psf()[0])
                    fitted.append(False)
                    fwhm.append(region_psf()[1])
                    continue
                kernel, _ = _fit_kernel(images, shifts, xy, amps, zone_pixels(*box), R=R, s=s)
                try:
                    zpsf, zf = _as_psf(kernel, s=s, R=R, fallback_fwhm=psf.fwhm, zone=[i, j], n_atoms=atoms)
                except ValueError as exc:  # an empty kernel
                    warnings.append(f"PSF {name}: the fit failed ({exc}); it uses the PSF of the whole region")
                    psfs.append(region_psf()[0])
                    fitted.append(False)
                    fwhm.append(region_psf()[1])
                    continue
                psfs.append(zpsf)
                fitted.append(True)
                fwhm.append(zf)
                log.info("zone PSF %s: FWHM %.3f pixels from %d atoms", name, zf, atoms)
        return ZonePSFs(grid=(rows, cols), bounds=bounds, psfs=tuple(psfs), n_atoms=tuple(n_atoms),
                        fitted=tuple(fitted), fwhm=tuple(fwhm), applied=any(fitted), warnings=tuple(warnings))

    zones = measure(amps)
    for _ in range(max(0, int(n_passes) - 1)):
        # again with the occupations and amplitudes that the zone PSFs give
        local = SiteBasis(geometry, frame_shape=shape, psf=zones.psfs[0], sites=sites, local_psfs=zones.psfs,
                          local_weights=zones.weights(sites.x, sites.y))
        amps = np.stack([local.linear(im, offset=o).amplitudes for im, o in zip(images, offsets)])
        threshold = _otsu(amps.ravel())
        if not np.isfinite(threshold):
            break
        zones = measure(np.where(amps > threshold, amps, 0.0))
    return zones
