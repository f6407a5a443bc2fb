"""Lattice vectors and offset by fitting the full image model (variable projection).

Where the Fourier estimate (:func:`latticeread.core.lattice.estimate_lattice`) reads the lattice
from a few spectral peaks, this module fits every pixel: the frame (photons per pixel) is modelled
as

    image(p) = background + sum_k A_k * s(p - r_k),    r_k = offset + row_k * a1 + col_k * a2,

with ``s`` the pixel-integrated PSF stamp (window-normalised exactly as the forward model
:func:`latticeread.core.psf.render_sites` draws it). The six geometric parameters
``(a1, a2, offset)`` enter non-linearly, the amplitudes ``A_k`` and the background linearly.

Method
------
Each iteration

1. solves the linear part exactly at the current geometry (weighted least squares on the
   sparse site basis, :class:`latticeread.core.amplitudes.SiteBasis`), which gives the
   amplitudes and the residual sum of squares ``RSS(a1, a2, offset)`` -- the variable-projection
   objective;
2. linearises the model in the geometric parameters with the amplitudes held at their
   optimum: the derivative of the image with respect to site ``k``'s position is
   ``-A_k * grad s(p - r_k)``, and the chain rule gives the columns for ``a1`` (times row_k),
   ``a2`` (times col_k) and the offset (times 1). The PSF gradient is read from a cubic-spline
   table of the pixel-integrated PSF and its analytic-on-the-table derivative;
3. takes the Gauss-Newton step ``(J^T J + mu D) dp = J^T r`` (Levenberg damping ``mu`` raised
   when the step does not lower ``RSS`` at the re-solved amplitudes).

Holding the amplitudes fixed in step 2 drops the amplitude-geometry coupling from the Jacobian;
for a symmetric PSF that coupling vanishes for isolated sites, so the iteration still converges
in a few steps (measured: bench/bench_lattice_model.py).

With a stack the vectors are shared and every frame has its own offset and amplitudes: each
frame is fitted alone and the vectors are combined by their information (inverse covariance),
which for Gaussian errors is the joint fit's answer; a single Gauss-Newton iteration over all
frames at once converged slowly when the frames' offsets differed (shot-to-shot jitter).
How precise the result can be at best is :mod:`latticeread.core.lattice_bound`.

A starting geometry within roughly a tenth of a site over the fitted region is needed. When the
start is only a prior (spacing known to ~1 %, angle to ~10 mrad, e.g. where the lattice's
Fourier peaks are invisible below a spacing of ~0.97 FWHM for an Airy PSF),
:func:`lattice_from_prior` first fits a small disk of sites around the frame centre and grows it
(the displacement caused by a vector error grows linearly with the distance from the centre).

Measured (bench/bench_lattice_model.py: 512x512 frames, ~52x52 sites of 9.8 pixels, filling
0.3, 500 photons per atom, 2 photons/pixel background, Airy PSF, largest error over 4 seeds;
"sigma" = the fit's own 1-sigma position error of the outermost site; "bound" = the Cramer-Rao
bound on the relative spacing with free amplitudes, 1 sigma; CPU seconds per fit on a shared
machine; the last row fits 4 frames together, 3 seeds):

=============  =======  =========  ============  =================  ========  =======  =======
spacing/FWHM   start    spacing    angle (mrad)  offset (spacings)  sigma px  bound    CPU s
=============  =======  =========  ============  =================  ========  =======  =======
0.8            prior    3.6e-4     0.48          0.006              0.092     2.3e-4   66
1.0            Fourier  1.9e-4     0.15          0.002              0.044     1.1e-4   12
1.2            Fourier  1.5e-4     0.07          0.002              0.028     7.0e-5   9
1.5            Fourier  1.1e-4     0.06          0.002              0.018     4.4e-5   5
0.8, 4 frames  prior    1.1e-4     0.21          0.007              0.054     1.2e-4   220
=============  =======  =========  ============  =================  ========  =======  =======

The CPU seconds above were measured before the PSF tables were read block by block; on the
same frames (2 seeds, Airy) the 1.0 FWHM fit now takes 3.9 s (was 9.8) and the 0.8 FWHM prior
fit 14.8 s (was 36.5), with the same errors.

At 0.8 FWHM the 2e-4 spacing target is beyond what one such frame holds: the Cramer-Rao bound
for any estimator with free amplitudes is 2.3e-4 (1 sigma; 1.4e-4 even with every atom's
occupation and brightness known; bench/bench_lattice_bound.py). Fit several frames together
(a stack shares the vectors); the error falls as one over the square root of their number.

Units: positions and vectors in pixels (x = column, y = row, centre of pixel (0, 0) at (0, 0));
images in photons per pixel (counts are converted with the camera model when one is given).
"""

from __future__ import annotations

import dataclasses
import logging
import warnings as _warnings

import numpy as np
import scipy.sparse
from scipy import ndimage

from latticeread.core.amplitudes import SiteBasis, _StampBlocks, cached_table, pixel_integrated_table
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry, LatticeQuality, SiteGrid, lattice_sites
from latticeread.core.psf import PSFModel
from latticeread.errors import FrameError, LatticeNotFound, LatticeReadWarning

__all__ = ["refine_lattice_model", "lattice_from_prior", "MIN_MODEL_ATOMS", "SPACING_SIGMA_WARN", "PRECISION_WARNING"]

log = logging.getLogger(__name__)

#: Fewer bright sites than this in the fit add a warning to the quality.
MIN_MODEL_ATOMS = 30
#: The fit stops when a step lowers the chi-square (RSS over the per-pixel noise variance) by
#: less than this: further steps are statistically insignificant.
CHI2_GAIN = 1.0


class _PSFTable:
    """Pixel-integrated PSF and its x/y derivatives on a fine grid, read by linear interpolation.

    The pixel integral is the same ``s x s`` sub-sample average as :meth:`PSFModel.stamps`;
    it is tabulated every ``1 / (4 s)`` pixel (sub-sample offsets fall on the grid) and
    differentiated on the table by central differences. On a grid that fine, linear
    interpolation errs by (grid step)^2 / 8 times the curvature: below 1e-3 of the peak for
    a PSF of 2 pixels FWHM or more (the error bound of linear interpolation, common
    practice), and it reads the table several times faster than cubic splines. Whole stamps
    are read block by block (:class:`latticeread.core.amplitudes._StampBlocks`).
    """

    def __init__(self, psf: PSFModel, oversample: int = 4):
        acc, k, half = pixel_integrated_table(psf, oversample=oversample)
        gy, gx = np.gradient(acc, 1.0 / k)
        self.tables = [np.ascontiguousarray(t) for t in (acc, gx, gy)]
        self.k, self.origin, self.radius = k, half, int(psf.radius)
        self.blocks = _StampBlocks(self.tables, k=k, origin=half, radius=self.radius, order=1)

    def _points(self, dx, dy, which):
        """The tables ``which`` read value by value at every stamp pixel, each (N, S, S)."""
        p = np.arange(-self.radius, self.radius + 1, dtype=float)
        # separable bilinear weights: rows depend on (site, stamp row), columns on (site, stamp column)
        cy = (p[None, :] - np.asarray(dy, float)[:, None]) * self.k + self.origin
        cx = (p[None, :] - np.asarray(dx, float)[:, None]) * self.k + self.origin
        h, w = self.tables[0].shape
        iy = np.clip(np.floor(cy).astype(int), 0, h - 2)
        ix = np.clip(np.floor(cx).astype(int), 0, w - 2)
        fy = np.clip(cy - iy, 0.0, 1.0)[:, :, None]
        fx = np.clip(cx - ix, 0.0, 1.0)[:, None, :]
        r0, c0 = iy[:, :, None], ix[:, None, :]

        def read(t):
            return ((1 - fy) * ((1 - fx) * t[r0, c0] + fx * t[r0, c0 + 1])
                    + fy * ((1 - fx) * t[r0 + 1, c0] + fx * t[r0 + 1, c0 + 1]))

        return [read(self.tables[t]) for t in which]

    def read(self, dx, dy, which) -> list:
        """The tables ``which`` (0 value, 1 x and 2 y derivative) at every stamp pixel, each (N, S, S)."""
        dx = np.asarray(dx, float)
        dy = np.asarray(dy, float)
        size = 2 * self.radius + 1
        ok = self.blocks.covers(dx, dy)
        if np.all(ok):
            return [v.reshape(dx.size, size, size) for v in self.blocks(dx, dy, which)]
        out = [np.empty((dx.size, size, size)) for _ in which]
        if np.any(ok):
            for o, v in zip(out, self.blocks(dx[ok], dy[ok], which)):
                o[ok] = v.reshape(-1, size, size)
        for o, v in zip(out, self._points(dx[~ok], dy[~ok], which)):
            o[~ok] = v
        return out

    def raw(self, dx, dy, which) -> tuple[list, list]:
        """The tables ``which`` at every stamp pixel (each (N, S, S)) and their sums over the window (each (N,))."""
        dx = np.asarray(dx, float)
        dy = np.asarray(dy, float)
        ok = self.blocks.covers(dx, dy)
        if np.all(ok):
            return self.read(dx, dy, which), self.blocks.sums(dx, dy, which)
        values = self.read(dx, dy, which)
        return values, [v.sum(axis=(1, 2)) for v in values]

    def __call__(self, dx, dy, derivatives: bool = True):
        """Normalised stamps and their derivatives with respect to the emitter position.

        Returns ``(stamp, d_stamp/d_x_emitter, d_stamp/d_y_emitter)``, each (N, S, S); the
        derivatives are None when not asked for (a third of the work).
        """
        if not derivatives:
            (u,) = self.read(dx, dy, (0,))
            return u / u.sum(axis=(1, 2), keepdims=True), None, None
        u, ux, uy = self.read(dx, dy, (0, 1, 2))
        # the emitter moving by +dx samples the table at p - dx: derivative flips sign
        ux, uy = -ux, -uy
        norm = u.sum(axis=(1, 2), keepdims=True)
        s = u / norm
        dsx = (ux - s * ux.sum(axis=(1, 2), keepdims=True)) / norm
        dsy = (uy - s * uy.sum(axis=(1, 2), keepdims=True)) / norm
        return s, dsx, dsy


def _to_photons(data, camera):
    if camera is None:
        return data
    return np.asarray(camera.counts_to_photons(data), float)


def _prepare_frames(image_or_stack, camera) -> np.ndarray:
    arr = np.asarray(image_or_stack)
    if arr.dtype == object or np.iscomplexobj(arr) or arr.dtype.kind not in "biuf":
        raise FrameError(f"the frame must hold real pixel values, got dtype {arr.dtype}")
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[0] == 0:
        raise FrameError(f"expected a 2-D frame (height, width) or a 3-D stack (frames, height, width), "
                         f"got an array of shape {arr.shape}")
    data = _to_photons(arr.astype(float), camera)
    if not np.all(np.isfinite(data)):
        raise FrameError("the frame holds NaN or infinite pixels; the lattice model fit needs finite pixels "
                         "(mask or repair them first)")
    return data


def _site_grid(geometry: LatticeGeometry, rows, cols, offset=None) -> SiteGrid:
    g = geometry if offset is None else geometry.with_offset(tuple(offset))
    x, y = g.site_positions(rows, cols)
    r0, c0 = int(rows.min()), int(cols.min())
    return SiteGrid(rows=rows, cols=cols, x=np.asarray(x, float), y=np.asarray(y, float), row_min=r0, col_min=c0,
                    n_rows=int(rows.max()) - r0 + 1, n_cols=int(cols.max()) - c0 + 1)


class _Problem:
    """The image model of a stack on a fixed set of site indices."""

    def __init__(self, frames, *, psf, rows, cols):
        self.frames = frames
        self.psf = psf
        self.rows, self.cols = rows, cols
        self.table = cached_table("model", psf, _PSFTable)
        self.shape = frames.shape[1:]
        self._last_render = None

    def solve_linear(self, a1, a2, offsets):
        """Amplitudes, backgrounds and the site bases of every frame at one geometry.

        Every frame gets a basis built at its own offset: a basis reused at a shifted offset
        keeps the reference offset's normal matrix, which is wrong for the sites whose stamps
        the frame edge cuts (by tens of photons, leaking into the background and from there
        into every amplitude, for a shift of one pixel).
        """
        amps, bgs, bases = [], [], []
        for frame, off in zip(self.frames, offsets):
            geom = LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(off))
            basis = SiteBasis(geom, frame_shape=self.shape, psf=self.psf, sites=_site_grid(geom, self.rows, self.cols))
            res = basis.linear(frame)
            amps.append(res.amplitudes)
            bgs.append(res.background)
            bases.append(basis)
        return amps, bgs, bases

    @property
    def pad(self) -> int:
        """Padding (pixels) of the rendered images around the frame: one stamp width."""
        return 2 * self.table.radius + 1

    def render(self, a1, a2, offset, coefficients) -> list[np.ndarray]:
        """Images ``sum_k c_k * part_k`` on the padded frame, one per ``(c, part)`` pair.

        ``part`` 0 is the site's stamp, 1 and 2 its derivatives with respect to the site's x
        and y (pixels). Every site is drawn, dim ones too: leaving them out made the residual
        (and its gradient) disagree with the amplitudes' own fit, and the iteration crawl.
        """
        height, width = self.shape
        r, pad = self.table.radius, self.pad
        full = (height + 2 * pad, width + 2 * pad)
        n_full = full[0] * full[1]
        oy, ox = np.mgrid[0:2 * r + 1, 0:2 * r + 1]
        window = (oy * full[1] + ox).ravel()
        x = offset[0] + self.rows * a1[0] + self.cols * a2[0]
        y = offset[1] + self.rows * a1[1] + self.cols * a2[1]
        xi, yi = np.rint(x).astype(int), np.rint(y).astype(int)
        anchor = (yi + pad - r) * full[1] + (xi + pad - r)
        # the normalised stamp is u / n and its derivative by the site's x is (-u_x + u g_x / n) / n
        # (u the table read at the stamp pixels, n and g_x its and u_x's sums over the window):
        # the normalisation goes into the coefficients, and each table's stamps are scattered
        # once for all the images that use them (one sparse product, the images side by side)
        columns = {0: [], 1: [], 2: []}  # table -> (image, kind of coefficient)
        for j, (_, part) in enumerate(coefficients):
            columns[0].append((j, "value" if part == 0 else "slope"))
            if part:
                columns[part].append((j, "derivative"))
        tables = tuple(t for t in (0, 1, 2) if columns[t])
        sums = {t: np.zeros((n_full, len(columns[t]))) for t in tables}
        step = max(1, 2 ** 21 // window.size)
        for start in range(0, len(x), step):
            idx = np.arange(start, min(start + step, len(x)))
            values, totals = self.table.raw(x[idx] - xi[idx], y[idx] - yi[idx], tables)
            read = dict(zip(tables, values))
            total = dict(zip(tables, totals))
            norm = total[0]
            rows = (anchor[idx, None] + window[None, :]).ravel()
            indptr = np.arange(0, idx.size * window.size + 1, window.size)
            for t in tables:
                coef = np.empty((idx.size, len(columns[t])))
                for col, (j, kind) in enumerate(columns[t]):
                    c = np.asarray(coefficients[j][0], float)[idx]
                    part = coefficients[j][1]
                    if kind == "value":
                        coef[:, col] = c / norm
                    elif kind == "derivative":
                        coef[:, col] = -c / norm
                    else:
                        coef[:, col] = c * total[part] / (norm * norm)
                stamps = scipy.sparse.csc_matrix((read[t].ravel(), rows, indptr), shape=(n_full, idx.size))
                sums[t] += stamps @ coef
        out = [np.zeros(n_full) for _ in coefficients]
        for t in tables:
            for col, (j, _) in enumerate(columns[t]):
                out[j] += sums[t][:, col]
        return [image.reshape(full) for image in out]
        return [image.reshape(full) for image in out]

    def model_and_derivatives(self, a1, a2, offset, amp, *, derivatives: bool = True):
        """The sites' image and its derivatives by (a1x, a1y, a2x, a2y, offset x, offset y).

        The last result is kept: the fit asks for the same images again (the step's residual,
        then its Jacobian, then the covariance at the end).
        """
        amp = np.asarray(amp, float)
        key = (tuple(np.asarray(a1, float)), tuple(np.asarray(a2, float)), tuple(np.asarray(offset, float)),
               amp.tobytes())
        last = self._last_render
        if last is not None and last[0] == key and (last[2] is not None or not derivatives):
            return last[1], (last[2] if derivatives else [])
        rows, cols = self.rows.astype(float), self.cols.astype(float)
        wanted = [(amp, 0)]
        if derivatives:
            wanted += [(amp * rows, 1), (amp * rows, 2), (amp * cols, 1), (amp * cols, 2), (amp, 1), (amp, 2)]
        images = self.render(a1, a2, offset, wanted)
        self._last_render = (key, images[0], images[1:] if derivatives else None)
        return images[0], images[1:]

    def jacobian(self, a1, a2, offsets, amps, bgs, bases, *, crop, rss_only=False):
        """Normal matrix J^T J, gradient J^T r and RSS on the crop, with the amplitudes held.

        With ``rss_only`` only the RSS is computed (the matrices are returned as None).
        """
        n_f = len(self.frames)
        n_p = 4 + 2 * n_f
        jtj = np.zeros((n_p, n_p))
        jtr = np.zeros(n_p)
        rss = 0.0
        height, width = self.shape
        pad = self.pad
        for f, (frame, off, amp, bg, basis) in enumerate(zip(self.frames, offsets, amps, bgs, bases)):
            model, dm = self.model_and_derivatives(a1, a2, off, amp, derivatives=not rss_only)
            sl = (slice(pad + crop[0].start, pad + crop[0].stop), slice(pad + crop[1].start, pad + crop[1].stop))
            res = (frame[crop] - bg - model[sl]).ravel()
            if rss_only:
                rss += float(np.sum((res - res.mean()) ** 2))
                continue
            cols = np.stack([d[sl].ravel() for d in dm], axis=1)
            cols -= cols.mean(axis=0)  # the constant background absorbs any mean change
            idx = np.r_[0:4, 4 + 2 * f, 5 + 2 * f]
            jtr[idx] += cols.T @ (res - res.mean())
            # Gauss-Newton matrix of the variable-projection objective: J^T (I - P) J with P the
            # projector on the site basis and background (the amplitudes re-adjust when the
            # lattice moves), J^T J - (B^T J)^T (B^T B)^-1 (B^T J), on the basis' own pixels
            frame_cols = [d[pad:pad + height, pad:pad + width] for d in dm]
            roi = basis.crop
            raw = np.stack([c[roi].ravel() for c in frame_cols], axis=1)
            proj = [basis.project(c) for c in frame_cols]
            sols = [basis.solve(c, d) for c, d in proj]
            schur = np.array([[float(proj[i][0] @ sols[j][0] + np.dot(proj[i][1], sols[j][1]))
                               for j in range(6)] for i in range(6)])
            schur = 0.5 * (schur + schur.T)
            jtj[np.ix_(idx, idx)] += raw.T @ raw - schur
            rss += float(np.sum((res - res.mean()) ** 2))
        if rss_only:
            return None, None, rss
        return jtj, jtr, rss

    def sandwich(self, a1, a2, offsets, amps, bgs, bases, *, crop) -> np.ndarray:
        """Covariance of the geometric parameters that holds for any pixel noise (pixels^2).

        ``A^-1 M A^-1 n / (n - k)`` with ``A = J_p^T J_p`` and ``M = J_p^T diag(r^2) J_p``, where
        ``J_p`` are the derivative images with their least-squares fit by the sites and the
        background removed (the amplitudes re-adjust when the lattice moves) and ``r`` the
        residuals: the heteroscedasticity-consistent ("sandwich") covariance of least squares
        (White 1980; MacKinnon & White 1985 for the n / (n - k) factor; quoted from memory).
        Photon noise is much larger on an atom than on the background, so ``sigma^2 A^-1``
        understates the error of the unweighted fit for bright atoms (measured: by 1.3-1.4x at
        1,500 photons per atom and a 1-photon background).
        """
        n_f = len(self.frames)
        n_p = 4 + 2 * n_f
        a_mat = np.zeros((n_p, n_p))
        m_mat = np.zeros((n_p, n_p))
        n_obs, n_par = 0, n_p
        height, width = self.shape
        pad = self.pad
        sl = (slice(pad + crop[0].start, pad + crop[0].stop), slice(pad + crop[1].start, pad + crop[1].stop))
        for f, (frame, off, amp, bg, basis) in enumerate(zip(self.frames, offsets, amps, bgs, bases)):
            model, dm = self.model_and_derivatives(a1, a2, off, amp)
            res = (frame[crop] - bg - model[sl]).ravel()
            res = res - res.mean()
            sols = [basis.solve(*basis.project(d[pad:pad + height, pad:pad + width])) for d in dm]
            fitted = self.render(a1, a2, off, [(c, 0) for c, _ in sols])
            jp = np.stack([(d[sl] - fit[sl] - (float(np.ravel(b)[0]) if np.size(b) else 0.0)).ravel()
                           for d, fit, (_, b) in zip(dm, fitted, sols)], axis=1)
            jp -= jp.mean(axis=0)  # the background column absorbs the mean
            idx = np.r_[0:4, 4 + 2 * f, 5 + 2 * f]
            a_mat[np.ix_(idx, idx)] += jp.T @ jp
            m_mat[np.ix_(idx, idx)] += (jp * (res ** 2)[:, None]).T @ jp
            n_obs += res.size
            n_par += len(amp) + 1
        try:
            a_inv = np.linalg.inv(a_mat)
        except np.linalg.LinAlgError:
            return np.full((n_p, n_p), np.nan)
        return a_inv @ m_mat @ a_inv * (n_obs / max(n_obs - n_par, 1))


def _far_uncertainty(jtj, rss, n_frames, crop, rows, cols, n_sites) -> float:
    """1-sigma uncertainty (pixels) of the outermost site of frame 0 from the Gauss-Newton covariance."""
    n_pix = n_frames * (crop[0].stop - crop[0].start) * (crop[1].stop - crop[1].start)
    sigma2 = rss / max(n_pix - n_sites * n_frames - jtj.shape[0], 1)
    try:
        cov = np.linalg.inv(jtj) * sigma2
    except np.linalg.LinAlgError:
        return float("nan")
    return _far_position_sigma(cov, rows, cols)


def _far_position_sigma(cov, rows, cols) -> float:
    """1-sigma position error (pixels) of the outermost site of frame 0 from the parameters' covariance."""
    if not np.all(np.isfinite(cov)):
        return float("nan")
    far = int(np.argmax(np.hypot(rows, cols)))
    g = np.array([[rows[far], 0, cols[far], 0, 1, 0], [0, rows[far], 0, cols[far], 0, 1]], float)
    val = float(np.max(np.linalg.eigvalsh(g @ np.asarray(cov)[:6, :6] @ g.T)))
    return float(np.sqrt(val)) if val >= 0 else float("nan")


def _relative_spacing_sigma(cov, a1, a2) -> float:
    """Larger 1-sigma relative uncertainty of |a1| and |a2| from the covariance of (a1, a2) (4 x 4, px^2)."""
    worst = 0.0
    for k, a in enumerate((np.asarray(a1, float), np.asarray(a2, float))):
        g = np.zeros(4)
        g[2 * k:2 * k + 2] = a / (a @ a)  # d|a| / |a|
        worst = max(worst, float(g @ np.asarray(cov)[:4, :4] @ g))
    return float(np.sqrt(worst))


#: Above this 1-sigma relative spacing uncertainty the fit adds a warning (at 1e-4, about one
#: estimate in twenty is off by more than 2e-4 for normal errors; the level is our choice).
SPACING_SIGMA_WARN = 1e-4
#: Below this spacing / FWHM, fewer than FEW_FRAMES frames make the prior path warn: on one
#: 500-photon frame at 0.7 FWHM it converged to a wrong lattice (angle 39 mrad off) in 1 of 2
#: seeds, while 4 frames together gave 1.3e-4 and 1.9e-4 (bench_lattice_model.py --frames 4).
FEW_FRAMES_BELOW = 0.75
FEW_FRAMES = 4
#: Start of that warning (callers tell a precise-enough fit from a failed one by it).
PRECISION_WARNING = "the lattice spacing from this fit is uncertain to"


def refine_lattice_model(image_or_stack, geometry: LatticeGeometry, *, psf: PSFModel,
                         camera: CameraModel | None = None, offsets=None, max_sites_radius: float | None = None,
                         max_iter: int = 20, tol: float = 2e-3) -> LatticeGeometry:
    """Refine lattice vectors and offset by a least-squares fit of the full image model.

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Frame(s) in photons per pixel, or camera counts when ``camera`` is given. All frames
        share the lattice vectors; each has its own offset.
    geometry : LatticeGeometry
        Starting geometry (pixels), accurate to about a tenth of a site over the fitted region.
    psf : PSFModel
        Image of one atom (its window radius also bounds the stamps, as in the forward model).
    camera : CameraModel, optional
        Converts counts to photons. Without it the data are taken to be photons already (a
        constant offset does not matter: a background is fitted).
    offsets : sequence of (float, float), optional
        Starting offset of every frame (pixels); default ``geometry.offset`` for all.
    max_sites_radius : float, optional
        Fit only the sites within this many lattice spacings of the site nearest the frame
        centre (default: every site whose centre is in the frame).
    max_iter : int
        Largest number of Gauss-Newton steps.
    tol : float
        Stop when no site of the fitted region moves by more than this, pixels.

    Returns
    -------
    LatticeGeometry
        Refined ``a1``, ``a2`` and the offset of the first frame (pixels), with a
        :class:`LatticeQuality`: ``peak_to_background`` copied from ``geometry``;
        ``residual`` = 1-sigma statistical uncertainty, in pixels, of the position of the
        farthest fitted site (from the heteroscedasticity-consistent covariance of the
        fit, which holds for photon noise); ``n_sites_used`` = sites brighter than half the 99th-percentile
        amplitude; ``spacing_sigma`` = 1-sigma relative uncertainty of the spacings (a
        warning starting with :data:`PRECISION_WARNING` is added above
        :data:`SPACING_SIGMA_WARN`); ``warnings``. With a stack the vectors are the
        information-weighted combination of the frames' own fits (see the module notes) and
        only the first frame's offset is returned; re-find the others with the shared vectors
        by :func:`latticeread.core.lattice.refine_phase`.

    Raises
    ------
    FrameError
        Not a 2-D frame or 3-D stack, non-finite pixels, or offsets of the wrong length.
    LatticeNotFound
        No lattice site in the frame, or the fit runs away (vectors changed by more than 5 %).
    """
    frames = _prepare_frames(image_or_stack, camera)
    if offsets is None:
        offs = np.tile(np.asarray(geometry.offset, float), (frames.shape[0], 1))
    else:
        offs = np.asarray(offsets, float).reshape(-1, 2)
        if offs.shape[0] != frames.shape[0]:
            raise FrameError(f"got {offs.shape[0]} starting offsets for {frames.shape[0]} frames")
    fit, _ = _refine_stack(frames, geometry, psf=psf, offsets=offs, max_sites_radius=max_sites_radius,
                           max_iter=max_iter, tol=tol)
    return fit


def _refine_model(frames, geometry, *, psf, offsets, max_sites_radius=None, max_iter=20, tol=2e-3):
    """One Gauss-Newton fit of prepared ``frames`` (n, H, W photons) from ``offsets`` (n, 2 pixels).

    Returns the geometry (offset of frame 0), every frame's offset, the covariance of the
    parameters (or None) and the fitted region's site indices (rows, cols).
    """
    n_f = frames.shape[0]
    shape = frames.shape[1:]
    offs = np.asarray(offsets, float).reshape(n_f, 2).copy()
    a1 = np.asarray(geometry.a1, float).copy()
    a2 = np.asarray(geometry.a2, float).copy()
    start_a = np.concatenate([a1, a2])
    sites = lattice_sites(geometry, shape)
    if len(sites) == 0:
        raise LatticeNotFound("no lattice site lies inside the frame; check the starting geometry")
    rows, cols = np.asarray(sites.rows), np.asarray(sites.cols)
    if max_sites_radius is not None:
        centre = np.array([(shape[1] - 1) / 2, (shape[0] - 1) / 2])
        fr, fc = geometry.fractional_indices(centre[0], centre[1])
        r0, c0 = np.rint(fr), np.rint(fc)
        dist = np.hypot(rows - r0, cols - c0)
        core = dist <= max_sites_radius
        if np.count_nonzero(core) < 9:
            raise LatticeNotFound(f"only {int(np.count_nonzero(core))} sites within {max_sites_radius} spacings "
                                  f"of the frame centre")
        # the residual is taken on the pixels of the core disk only, but every site whose light
        # reaches them (a ring of one PSF radius around it) is part of the model
        ring = max_sites_radius + psf.radius / min(geometry.spacings) + 1.0
        keep = dist <= ring
        core_rows, core_cols = rows[core], cols[core]
        rows, cols = rows[keep], cols[keep]
    else:
        core_rows, core_cols = rows, cols
    problem = _Problem(frames, psf=psf, rows=rows, cols=cols)
    r = int(psf.radius)

    def crop_for(a1, a2, offs):
        xs = offs[:, 0][:, None] + core_rows[None] * a1[0] + core_cols[None] * a2[0]
        ys = offs[:, 1][:, None] + core_rows[None] * a1[1] + core_cols[None] * a2[1]
        pad = r if max_sites_radius is None else 0
        y0, y1 = max(int(ys.min()) - pad, 0), min(int(np.ceil(ys.max())) + pad + 1, shape[0])
        x0, x1 = max(int(xs.min()) - pad, 0), min(int(np.ceil(xs.max())) + pad + 1, shape[1])
        return slice(y0, y1), slice(x0, x1)

    def evaluate(a1, a2, offs):
        return problem.solve_linear(a1, a2, offs)

    crop = crop_for(a1, a2, offs)
    amps, bgs, basis = evaluate(a1, a2, offs)
    jtj, jtr, rss = problem.jacobian(a1, a2, offs, amps, bgs, basis, crop=crop)
    mu = 1e-3
    n_iter = 0
    small_gains = 0
    extent = float(np.max(np.hypot(core_rows, core_cols)))
    converged = False
    for n_iter in range(1, max_iter + 1):
        diag = np.diag(jtj).copy()
        diag[diag <= 0] = 1.0
        try:
            step = np.linalg.solve(jtj + mu * np.diag(diag), jtr)
        except np.linalg.LinAlgError:
            break
        na1, na2 = a1 + step[0:2], a2 + step[2:4]
        noffs = offs + step[4:].reshape(n_f, 2)
        n_amps, n_bgs, n_basis = evaluate(na1, na2, noffs)
        _, _, n_rss = problem.jacobian(na1, na2, noffs, n_amps, n_bgs, n_basis, crop=crop, rss_only=True)
        move = (np.max(np.abs(step[:4])) * (extent + 1)) + np.max(np.abs(step[4:]))
        # a step well inside the statistical uncertainty of the outermost site is noise-limited
        sigma_far = _far_uncertainty(jtj, rss, n_f, crop, core_rows, core_cols, len(rows))
        if move < max(tol, 0.25 * sigma_far):  # a step this small changes nothing that matters: done either way
            if n_rss <= rss:
                a1, a2, offs, amps, bgs, basis = na1, na2, noffs, n_amps, n_bgs, n_basis
                jtj, jtr, rss = problem.jacobian(a1, a2, offs, amps, bgs, n_basis, crop=crop)
            converged = True
            break
        if n_rss <= rss:
            # chi-square gain of the step (RSS drop over the per-pixel noise variance)
            n_pix = n_f * (crop[0].stop - crop[0].start) * (crop[1].stop - crop[1].start)
            gain = (rss - n_rss) / max(rss / max(n_pix - len(rows) * n_f, 1), 1e-300)
            a1, a2, offs, amps, bgs, basis = na1, na2, noffs, n_amps, n_bgs, n_basis
            jtj, jtr, rss = problem.jacobian(a1, a2, offs, amps, bgs, n_basis, crop=crop)
            mu = max(mu / 10, 1e-9)
            # two small gains in a row: one alone can be a short, damped step
            small_gains = small_gains + 1 if gain < CHI2_GAIN else 0
            if small_gains >= 2:
                converged = True
                break
            log.debug("lattice model step %d: rss %.6g, largest site move %.2g px", n_iter, rss, move)
        else:
            mu *= 10
            if mu > 1e6:
                break
        if np.max(np.abs(np.concatenate([a1, a2]) - start_a)) > 0.05 * np.max(np.abs(start_a)):
            raise LatticeNotFound("the image-model fit ran away from the starting lattice (vectors changed by "
                                  "more than 5 %): the starting geometry or the PSF is wrong")
    warn = []
    if not converged:
        warn.append(f"the image-model fit of the lattice did not converge in {n_iter} steps")
    # the covariance that holds for photon noise, bright atoms included (see _Problem.sandwich)
    cov = problem.sandwich(a1, a2, offs, amps, bgs, basis, crop=crop)
    uncertainty = _far_position_sigma(cov, core_rows, core_cols)
    if not np.isfinite(uncertainty):
        warn.append("the lattice parameters are not determined by this image (singular normal matrix)")
    top = np.percentile(amps[0], 99)
    n_bright = int(np.count_nonzero(amps[0] > 0.5 * top)) if top > 0 else 0
    if n_bright < MIN_MODEL_ATOMS:
        warn.append(f"only {n_bright} bright sites in the image-model fit: the lattice vectors rest on few atoms")
    if geometry.quality is not None:
        ratio = geometry.quality.peak_to_background
    else:
        ratio = float("nan")
    spacing_sigma = _relative_spacing_sigma(cov, a1, a2) if np.all(np.isfinite(cov)) else float("nan")
    if np.isfinite(spacing_sigma) and spacing_sigma > SPACING_SIGMA_WARN:
        warn.append(_precision_warning(spacing_sigma, n_f))
    quality = LatticeQuality(peak_to_background=ratio, residual=uncertainty, n_sites_used=n_bright,
                             warnings=tuple(warn), spacing_sigma=spacing_sigma)
    if not np.all(np.isfinite(cov)):
        cov = None
    fit = LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(offs[0]), quality=quality)
    return fit, offs, cov, (core_rows, core_cols)


def _precision_warning(spacing_sigma: float, n_frames: int) -> str:
    return (f"{PRECISION_WARNING} {spacing_sigma:.1e} (relative, 1 sigma) from {n_frames} "
            f"frame{'s' if n_frames > 1 else ''}: fit more frames together (or use brighter frames) where a "
            f"better spacing matters")


def _refine_stack(frames, geometry, *, psf, offsets, max_sites_radius=None, max_iter=20, tol=2e-3):
    """Shared vectors of a stack: every frame fitted alone, the vectors combined by information.

    With Gaussian errors the joint fit of shared vectors and per-frame offsets and amplitudes
    equals the information-weighted mean of the per-frame estimates (each frame's covariance
    of ``(a1, a2)`` with its own offset and amplitudes profiled out): ``a = C sum_f C_f^-1 a_f``,
    ``C = (sum_f C_f^-1)^-1``. Fitting frame by frame keeps every Gauss-Newton problem small
    and well converging. Each frame's offset is then moved so that the centre of its fitted
    region stays where its own fit put it. Returns the geometry (offset of frame 0) and every
    frame's offset, pixels.
    """
    n_f = frames.shape[0]
    offsets = np.asarray(offsets, float).reshape(n_f, 2)
    if n_f == 1:
        fit, offs, _, _ = _refine_model(frames, geometry, psf=psf, offsets=offsets, max_sites_radius=max_sites_radius,
                                        max_iter=max_iter, tol=tol)
        return fit, offs
    fits = [_refine_model(frames[f:f + 1], geometry.with_offset(tuple(offsets[f])), psf=psf, offsets=offsets[f:f + 1],
                          max_sites_radius=max_sites_radius, max_iter=max_iter, tol=tol) for f in range(n_f)]
    info = np.zeros((4, 4))
    weighted = np.zeros(4)
    used, warn = [], []
    for f, (fit, _, cov, _) in enumerate(fits):
        problems = [w for w in fit.quality.warnings if not w.startswith(PRECISION_WARNING)]
        ok = cov is not None and np.all(np.isfinite(cov[:4, :4]))
        if ok:
            try:
                frame_info = np.linalg.inv(cov[:4, :4])
            except np.linalg.LinAlgError:
                ok = False
        if not ok:
            warn.append(f"frame {f} does not determine the lattice vectors and was left out of the combined fit")
            continue
        warn.extend(f"frame {f}: {w}" for w in problems)
        info += frame_info
        weighted += frame_info @ np.concatenate([fit.a1, fit.a2])
        used.append(f)
    if not used:
        raise LatticeNotFound("no frame of the stack determines the lattice vectors")
    combined_cov = np.linalg.inv(info)
    vec = combined_cov @ weighted
    a1, a2 = vec[:2], vec[2:]
    offs = np.empty((n_f, 2))
    for f, (fit, own, _, (core_rows, core_cols)) in enumerate(fits):
        r_mid, c_mid = float(np.mean(core_rows)), float(np.mean(core_cols))
        offs[f] = own[0] + r_mid * (np.asarray(fit.a1) - a1) + c_mid * (np.asarray(fit.a2) - a2)
    spacing_sigma = _relative_spacing_sigma(combined_cov, a1, a2)
    if spacing_sigma > SPACING_SIGMA_WARN:
        warn.append(_precision_warning(spacing_sigma, len(used)))
    # far-site uncertainty of frame 0: combined vectors, frame 0's own offset variance
    first, _, cov0, (core_rows, core_cols) = fits[0]
    cov6 = np.zeros((6, 6))
    cov6[:4, :4] = combined_cov
    cov6[4:, 4:] = cov0[4:6, 4:6] if cov0 is not None else np.nan
    uncertainty = _far_position_sigma(cov6, core_rows, core_cols)
    quality = LatticeQuality(peak_to_background=first.quality.peak_to_background, residual=uncertainty,
                             n_sites_used=sum(fits[f][0].quality.n_sites_used for f in used), warnings=tuple(warn),
                             spacing_sigma=spacing_sigma)
    return LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=tuple(offs[0]), quality=quality), offs


#: A pixel holds light when the frame smoothed over about two lattice spacings exceeds its
#: background (10th percentile) by this fraction of the light of the central disk (our choice:
#: the wings of a cloud down to a tenth of its central density are fitted too).
LIT_FRACTION = 0.1


def _lit_box(frames, geometry: LatticeGeometry, *, psf: PSFModel, radius: float | None) -> tuple[int, int, int, int]:
    """Pixel box ``(y0, y1, x0, x1)`` around the part of the frames that holds light.

    The mean frame is smoothed (Gaussian, sigma of two lattice spacings); its background is
    taken as the 10th percentile and its light level as the mean over the disk of ``radius``
    spacings around the frame centre (where the previous fit found atoms). Pixels brighter
    than the background by :data:`LIT_FRACTION` of that level hold light; the box around the
    lit area that reaches the central disk (noise lights specks of its own elsewhere) is widened by the PSF window and two spacings, so that every atom's light and the empty
    lattice around the cloud (which fixes the background) stay in the fit. A frame that is lit
    everywhere, or whose centre shows no light above the background, keeps its whole area.
    """
    shape = frames.shape[1:]
    whole = (0, shape[0], 0, shape[1])
    spacing = float(min(geometry.spacings))
    smooth = ndimage.gaussian_filter(frames.mean(axis=0), 2.0 * spacing)
    background = float(np.percentile(smooth, 10))
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    centre = np.hypot(yy - (shape[0] - 1) / 2, xx - (shape[1] - 1) / 2) <= (radius or 10.0) * spacing
    level = float(smooth[centre].mean()) - background if centre.any() else 0.0
    if not level > 0:
        return whole
    # the lit area that reaches the central disk (noise far away lights specks of its own)
    labels, _ = ndimage.label(smooth - background > LIT_FRACTION * level)
    keep = np.unique(labels[centre])
    lit = np.argwhere(np.isin(labels, keep[keep > 0]))
    if lit.size == 0:
        return whole
    margin = int(np.ceil(psf.radius + 2 * max(geometry.spacings)))
    y0, x0 = np.maximum(lit.min(axis=0) - margin, 0)
    y1, x1 = np.minimum(lit.max(axis=0) + margin + 1, shape)
    return int(y0), int(y1), int(x0), int(x1)


def lattice_from_prior(image_or_stack, *, psf: PSFModel, spacing, angle: float, angle_between: float = np.pi / 2,
                       camera: CameraModel | None = None, radii=(10.0, None)) -> LatticeGeometry:
    """Lattice geometry from a prior on its vectors, for frames whose Fourier peaks are invisible.

    Below a spacing of about 0.97 FWHM (Airy PSF) the lattice frequency lies beyond the optical
    cut-off and :func:`latticeread.core.lattice.estimate_lattice` raises
    :class:`~latticeread.errors.LatticeNotFound`. When the spacing and orientation are known
    roughly (from the optics, or from a calibration at a larger magnification), this function

    1. builds the prior lattice (``a2`` at ``angle``, ``a1`` at ``angle + angle_between``);
    2. finds the offset of every frame on a disk of sites around the frame centre: a coarse 6 x 6 grid search
       over one unit cell of the matched-filter energy, then a Newton fit of the image model
       (:meth:`latticeread.core.amplitudes.SiteBasis.fit_offset`);
    3. refines vectors and offset with :func:`refine_lattice_model` on disks of ``radii``
       lattice spacings (``None``: every site of the part of the frame that holds light, see
       :func:`_lit_box`), each fit starting from the previous one, so a vector error that would
       displace the outer sites by half a spacing is removed first where it displaces them
       little.

    Parameters
    ----------
    image_or_stack : (H, W) or (n_frames, H, W) array_like
        Frame(s) in photons per pixel, or counts with ``camera``. Every frame of a stack gets
        its own offset (the phase may jitter from shot to shot); the vectors are shared.
    psf : PSFModel
        Image of one atom.
    spacing : float or (float, float)
        Prior lattice spacing(s) |a1|, |a2| in pixels (about 1 % accuracy is enough for a
        50-site frame).
    angle : float
        Prior direction of ``a2`` in radians from +x towards +y (about 10 mrad is enough).
    angle_between : float
        Angle from ``a2`` to ``a1``, radians (pi/2 for a square lattice).
    camera : CameraModel, optional
        Converts counts to photons.
    radii : sequence of float or None
        Disk radii of the successive fits, lattice spacings; None: every site in the box around
        the frame's light (a large frame whose atoms fill only part of it is fitted on that
        part: a fit over every site of a 1024 x 1024 frame at 0.7 FWHM, ~130,000 sites, would
        take hours).

    Returns
    -------
    LatticeGeometry
        As :func:`refine_lattice_model` (the offset is the site nearest the frame centre).

    Raises
    ------
    ValueError
        Non-positive spacing or a collinear prior.
    FrameError, LatticeNotFound
        As :func:`refine_lattice_model`.
    """
    sp = np.atleast_1d(np.asarray(spacing, float))
    if sp.size == 1:
        sp = np.repeat(sp, 2)
    if sp.shape != (2,) or not np.all(np.isfinite(sp)) or np.any(sp <= 0):
        raise ValueError(f"spacing must be one positive number or a pair (pixels), got {spacing!r}")
    if abs(np.sin(angle_between)) < 0.1:
        raise ValueError(f"angle_between {angle_between!r} rad makes the prior lattice vectors nearly collinear")
    frames = _prepare_frames(image_or_stack, camera)
    shape = frames.shape[1:]
    a2 = sp[1] * np.array([np.cos(angle), np.sin(angle)])
    a1 = sp[0] * np.array([np.cos(angle + angle_between), np.sin(angle + angle_between)])
    centre = ((shape[1] - 1) / 2.0, (shape[0] - 1) / 2.0)
    prior = LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=centre)
    first = next((rad for rad in radii if rad is not None), None)
    all_sites = lattice_sites(prior, shape)
    if len(all_sites) == 0:
        raise LatticeNotFound("no lattice site of the prior lies inside the frame")
    rows, cols = np.asarray(all_sites.rows), np.asarray(all_sites.cols)
    if first is not None:
        keep = np.hypot(rows, cols) <= first
        rows, cols = rows[keep], cols[keep]
    basis = SiteBasis(prior, frame_shape=shape, psf=psf, sites=_site_grid(prior, rows, cols))
    # every frame its own offset (shots jitter); each is the translate nearest the prior's offset
    offsets = np.array([basis.fit_offset(frame, search=True)[0] for frame in frames], float)
    geometry = prior.with_offset(tuple(offsets[0]))
    for rad in radii:
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", LatticeReadWarning)
            # the inner disks only need to bring the start within reach of the next one
            if rad is None:
                y0, y1, x0, x1 = _lit_box(frames, geometry, psf=psf, radius=first)
                shift = np.array([x0, y0], float)
                part = np.ascontiguousarray(frames[:, y0:y1, x0:x1])
                geometry, offsets = _refine_stack(part, geometry.with_offset(tuple(geometry.offset - shift)), psf=psf,
                                                  offsets=offsets - shift, max_iter=20)
                geometry = geometry.with_offset(tuple(np.asarray(geometry.offset) + shift))
                offsets = offsets + shift
            else:
                geometry, offsets = _refine_stack(frames, geometry, psf=psf, offsets=offsets, max_sites_radius=rad,
                                                  max_iter=10)
    quality = geometry.quality
    ratio = min(geometry.spacings) / psf.fwhm
    if ratio < FEW_FRAMES_BELOW and frames.shape[0] < FEW_FRAMES:
        quality = dataclasses.replace(quality, warnings=quality.warnings + (
            f"the lattice spacing is {ratio:.2f} PSF FWHM and only {frames.shape[0]} frame(s) were fitted: here one "
            f"frame can lead the fit to a wrong lattice (seen at 0.7 FWHM); fit at least {FEW_FRAMES} frames "
            "together",))
    # keep the site nearest the frame centre as site (0, 0)
    fr, fc = geometry.fractional_indices(centre[0], centre[1])
    shift = np.rint(fr) * np.asarray(geometry.a1) + np.rint(fc) * np.asarray(geometry.a2)
    return geometry.with_offset(tuple(np.asarray(geometry.offset) + shift), quality=quality)
