"""Point-spread function models: the image of one atom on the camera.

Three kinds share one interface (:class:`PSFModel`):

* ``"airy"`` -- the diffraction pattern of a circular aperture,
  ``I(r) ~ [2 J1(v) / v]^2`` with ``v = 2 pi NA r / lambda``. FWHM = 0.514 lambda/NA,
  first zero at 0.61 lambda/NA (Born & Wolf, *Principles of Optics*, section 8.5.2).
* ``"gaussian"`` -- a round Gaussian of given FWHM, the usual quick approximation.
* ``"empirical"`` -- a kernel measured from isolated atoms, stored on a supersampled grid.

All values are *densities* per pixel^2 of a unit-flux source; :meth:`PSFModel.stamps`
integrates them over each camera pixel by supersampling, truncates at ``radius`` pixels and
normalises every stamp to sum to 1 (so an amplitude is the flux inside the stamp window).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, special

__all__ = [
    "PSFModel",
    "airy_psf",
    "gaussian_psf",
    "empirical_psf",
    "airy_fwhm",
    "render_sites",
]

#: FWHM of the Airy intensity pattern in units of lambda/NA (Born & Wolf).
AIRY_FWHM_PER_LAMBDA_OVER_NA = 0.5145
#: First zero of the Airy pattern in units of lambda/NA (1.21967/2, Born & Wolf).
AIRY_FIRST_ZERO_PER_LAMBDA_OVER_NA = 0.60983
_GAUSS_FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))


def airy_fwhm(*, wavelength_nm: float, numerical_aperture: float, pixel_size_nm: float) -> float:
    """FWHM of the ideal Airy PSF in camera pixels (object-plane pixel size)."""
    return AIRY_FWHM_PER_LAMBDA_OVER_NA * wavelength_nm / numerical_aperture / pixel_size_nm


@dataclass(frozen=True)
class PSFModel:
    """The image of a single point emitter.

    Attributes
    ----------
    kind : {"airy", "gaussian", "empirical"}
    fwhm : float
        Full width at half maximum in pixels (for empirical kernels, the mean of the two
        principal-axis widths).
    radius : int
        Half-size in pixels of the stamp window used for rendering and fitting.
    params : dict
        ``airy``: ``lambda_over_na`` (pixels); ``gaussian``: ``sigma`` (pixels);
        empirical: ``ellipticity``, ``n_atoms`` and any provenance.
    kernel : (M, M) ndarray or None
        Empirical only: density per pixel^2 sampled every ``1/supersample`` pixel, centre at
        ``[M // 2, M // 2]``, normalised so ``kernel.sum() / supersample**2 == 1``.
    supersample : int
        Sub-samples per pixel and axis used for pixel integration (and the kernel grid).
    """

    kind: str
    fwhm: float
    radius: int
    params: dict = field(default_factory=dict)
    kernel: np.ndarray | None = field(default=None, repr=False, compare=False)
    supersample: int = 5

    def __post_init__(self):
        if self.kind not in ("airy", "gaussian", "empirical"):
            raise ValueError(f"unknown PSF kind {self.kind!r}; use 'airy', 'gaussian' or 'empirical'")
        if not (np.isfinite(self.fwhm) and self.fwhm > 0):
            raise ValueError(f"PSF FWHM must be a positive number of pixels, got {self.fwhm}")
        if self.kind == "empirical":
            if self.kernel is None or np.ndim(self.kernel) != 2:
                raise ValueError("an empirical PSF needs a 2-D supersampled kernel")
            if self.kernel.shape[0] % 2 == 0 or self.kernel.shape[1] % 2 == 0:
                raise ValueError(f"empirical PSF kernel must have odd size, got {self.kernel.shape}")

    # --- evaluation -------------------------------------------------------------
    def density(self, dx, dy) -> np.ndarray:
        """Intensity per pixel^2 at offsets ``(dx, dy)`` pixels from the emitter (unit flux)."""
        dx = np.asarray(dx, dtype=float)
        dy = np.asarray(dy, dtype=float)
        if self.kind == "gaussian":
            s = self.params["sigma"]
            return np.exp(-(dx * dx + dy * dy) / (2 * s * s)) / (2 * np.pi * s * s)
        if self.kind == "airy":
            k = 2 * np.pi / self.params["lambda_over_na"]  # rad per pixel
            v = k * np.hypot(dx, dy)
            with np.errstate(invalid="ignore", divide="ignore"):
                amp = np.where(v > 1e-9, 2 * special.j1(v) / np.where(v > 1e-9, v, 1.0), 1.0)
            # integral of (2 J1(v)/v)^2 over the plane is 4 pi / k^2
            return amp * amp * k * k / (4 * np.pi)
        kern = self.kernel
        s = self.supersample
        dx, dy = np.broadcast_arrays(dx, dy)  # image() passes a row and a column of offsets
        c0, c1 = (kern.shape[0] - 1) / 2, (kern.shape[1] - 1) / 2
        coords = np.stack([dy.ravel() * s + c0, dx.ravel() * s + c1])
        vals = ndimage.map_coordinates(kern, coords, order=1, mode="constant", cval=0.0)
        return vals.reshape(dx.shape)

    @property
    def stamp_size(self) -> int:
        return 2 * int(self.radius) + 1

    def stamps(self, dx, dy, *, normalize: bool = True, chunk: int = 512) -> np.ndarray:
        """Pixel-integrated images of emitters at sub-pixel offsets.

        Parameters
        ----------
        dx, dy : (N,) array_like
            Emitter position relative to the centre of the stamp's middle pixel, pixels
            (normally in [-0.5, 0.5)).
        normalize : bool
            Scale each stamp to sum to 1 (flux inside the window).

        Returns
        -------
        (N, S, S) ndarray of float64 with ``S = 2 * radius + 1``.
        """
        dx = np.atleast_1d(np.asarray(dx, dtype=float))
        dy = np.atleast_1d(np.asarray(dy, dtype=float))
        r, s = int(self.radius), int(self.supersample)
        sub = (np.arange(s) + 0.5) / s - 0.5
        grid = np.arange(-r, r + 1)
        fine = (grid[:, None] + sub[None, :]).ravel()  # (S*s,)
        n, size = dx.size, 2 * r + 1
        out = np.empty((n, size, size))
        for start in range(0, n, chunk):
            sl = slice(start, min(n, start + chunk))
            fx = fine[None, None, :] - dx[sl, None, None]
            fy = fine[None, :, None] - dy[sl, None, None]
            dens = self.density(fx, fy)  # (n, S*s, S*s)
            out[sl] = dens.reshape(-1, size, s, size, s).mean(axis=(2, 4))
        if normalize:
            out /= out.sum(axis=(1, 2), keepdims=True)
        return out

    def image(self, *, supersample: int = 1, radius: int | None = None) -> np.ndarray:
        """Centred PSF image: pixel-integrated (supersample=1) or sampled finely (density)."""
        r = self.radius if radius is None else int(radius)
        if supersample == 1:
            model = self if radius is None else PSFModel(self.kind, self.fwhm, r, self.params, self.kernel, self.supersample)
            return model.stamps([0.0], [0.0])[0]
        grid = np.arange(-r * supersample, r * supersample + 1) / supersample
        return self.density(grid[None, :], grid[:, None])

    def radial_profile(self, radii) -> np.ndarray:
        """Density along +x at the given radii (pixels); for comparing with the Airy pattern."""
        radii = np.asarray(radii, dtype=float)
        return self.density(radii, np.zeros_like(radii))

    # --- persistence ------------------------------------------------------------
    def to_dict(self) -> dict:
        d = {"kind": self.kind, "fwhm": float(self.fwhm), "radius": int(self.radius),
             "params": {k: (float(v) if isinstance(v, (int, float, np.floating)) else v) for k, v in self.params.items()},
             "supersample": int(self.supersample)}
        if self.kernel is not None:
            d["kernel"] = np.asarray(self.kernel).tolist()
        return d

    @classmethod
    def from_dict(cls, data: dict) -> "PSFModel":
        kernel = data.get("kernel")
        return cls(
            kind=data["kind"],
            fwhm=float(data["fwhm"]),
            radius=int(data["radius"]),
            params=dict(data.get("params", {})),
            kernel=None if kernel is None else np.asarray(kernel, dtype=float),
            supersample=int(data.get("supersample", 5)),
        )


def _default_radius(fwhm: float) -> int:
    return int(max(3, np.ceil(2.5 * fwhm)))


def airy_psf(
    *,
    wavelength_nm: float,
    numerical_aperture: float,
    pixel_size_nm: float,
    radius: int | None = None,
    supersample: int = 5,
) -> PSFModel:
    """Ideal Airy PSF for fluorescence at ``wavelength_nm`` through an objective of given NA.

    Parameters
    ----------
    wavelength_nm : float
        Fluorescence wavelength in nanometres.
    numerical_aperture : float
        Numerical aperture of the objective (0 < NA <= 1 in vacuum).
    pixel_size_nm : float
        Size of one camera pixel projected into the atom plane, in nanometres.
    radius : int, optional
        Stamp half-size in pixels (default ``ceil(2.5 FWHM)``, at least 3).
    supersample : int
        Sub-samples per pixel and axis for pixel integration.
    """
    if not (0 < numerical_aperture <= 1.6):
        raise ValueError(f"numerical aperture must be in (0, 1.6], got {numerical_aperture}")
    if wavelength_nm <= 0 or pixel_size_nm <= 0:
        raise ValueError("wavelength and pixel size must be positive (nanometres)")
    lam_na = wavelength_nm / numerical_aperture / pixel_size_nm
    fwhm = AIRY_FWHM_PER_LAMBDA_OVER_NA * lam_na
    return PSFModel(
        kind="airy",
        fwhm=fwhm,
        radius=_default_radius(fwhm) if radius is None else int(radius),
        params={"lambda_over_na": lam_na, "wavelength_nm": wavelength_nm,
                "numerical_aperture": numerical_aperture, "pixel_size_nm": pixel_size_nm},
        supersample=supersample,
    )


def gaussian_psf(*, fwhm: float, radius: int | None = None, supersample: int = 5) -> PSFModel:
    """Round Gaussian PSF with the given FWHM in pixels."""
    if not (np.isfinite(fwhm) and fwhm > 0):
        raise ValueError(f"PSF FWHM must be a positive number of pixels, got {fwhm}")
    return PSFModel(
        kind="gaussian",
        fwhm=float(fwhm),
        radius=_default_radius(fwhm) if radius is None else int(radius),
        params={"sigma": float(fwhm) * _GAUSS_FWHM_TO_SIGMA},
        supersample=supersample,
    )


def empirical_psf(kernel, *, supersample: int, fwhm: float, radius: int | None = None, **params) -> PSFModel:
    """PSF from a measured kernel sampled every ``1/supersample`` pixel (centre in the middle)."""
    kernel = np.asarray(kernel, dtype=float)
    if kernel.ndim != 2:
        raise ValueError(f"PSF kernel must be 2-D, got shape {kernel.shape}")
    total = kernel.sum() / supersample**2
    if not np.isfinite(total) or total <= 0:
        raise ValueError("PSF kernel must have a positive, finite sum")
    kernel = kernel / total
    half = (min(kernel.shape) // 2) // supersample
    r = min(_default_radius(fwhm), half) if radius is None else int(radius)
    return PSFModel(kind="empirical", fwhm=float(fwhm), radius=r, params=dict(params), kernel=kernel,
                    supersample=supersample)


def render_sites(shape, x, y, amplitudes, psf: PSFModel) -> np.ndarray:
    """Image of point sources: ``sum_k amplitudes[k] * PSF(r - r_k)``, pixel-integrated.

    Parameters
    ----------
    shape : (int, int)
        ``(height, width)`` of the output in pixels.
    x, y : (N,) array_like
        Source positions in pixels (x = column, y = row).
    amplitudes : (N,) array_like
        Flux of each source (photons or counts) inside the PSF window.
    psf : PSFModel

    Returns
    -------
    (height, width) ndarray of float64; flux falling outside the frame is lost.
    """
    height, width = shape
    x = np.atleast_1d(np.asarray(x, float))
    y = np.atleast_1d(np.asarray(y, float))
    amp = np.atleast_1d(np.asarray(amplitudes, float))
    keep = amp != 0
    x, y, amp = x[keep], y[keep], amp[keep]
    r = psf.radius
    pad = 2 * r  # sources up to r pixels outside the frame still spill light into it
    out = np.zeros((height + 2 * pad, width + 2 * pad))
    if x.size == 0:
        return np.zeros((height, width))
    xi, yi = np.rint(x).astype(int), np.rint(y).astype(int)
    inside = (xi >= -r) & (xi < width + r) & (yi >= -r) & (yi < height + r)
    xi, yi = xi[inside], yi[inside]
    stamps = psf.stamps(x[inside] - xi, y[inside] - yi) * amp[inside, None, None]
    size = 2 * r + 1
    # scatter-add every stamp; flat indices let np.add.at handle overlapping stamps
    oy, ox = np.mgrid[0:size, 0:size]
    flat = (yi[:, None, None] + pad - r + oy[None]) * (width + 2 * pad) + (xi[:, None, None] + pad - r + ox[None])
    np.add.at(out.ravel(), flat.ravel(), stamps.ravel())
    return out[pad:pad + height, pad:pad + width].copy()
