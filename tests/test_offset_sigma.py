"""Each frame's lattice offset from the image-model fit carries a 1-sigma that holds.

On resolved lattices (spacing above the optical cut-off) each frame's offset comes from the
least-squares image-model fit (``offset_method`` "model"); its 1-sigma is the sandwich (HC0)
covariance of :meth:`latticeread.core.amplitudes.SiteBasis.fit_offset_model`. Checked against
the truth of the forward model: the offset errors divided by their stated 1-sigma must scatter
like a standard normal. For 48 such ratios (24 frames, x and y) the root mean square of a
standard normal sample lies within 1 +- 0.1 (1 sigma; chi-square with 48 degrees of freedom,
scipy.stats.chi2), so the accepted band 0.75-1.35 fails both cases when the 1-sigma is stated 1.5 times too large (checked) and
passes a right one except by a >3-sigma chance.
"""

from __future__ import annotations

import numpy as np
import pytest

from latticeread.core.calibration import Calibration, ReconstructionOptions
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import reconstruct_stack
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=105.0)  # FWHM 5.0 px
CAMERAS = {
    "scmos": CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0),
    "emccd": CameraModel(kind="emccd", em_gain=300.0, counts_per_electron=0.1, bias=100.0, read_noise=40.0),
}


def _offset_z(camera, *, ratio, filling, photons, n_frames=24, size=96):
    s, angle = ratio * PSF.fwhm, 0.3
    geo = LatticeGeometry(a1=(s * np.cos(angle), s * np.sin(angle)), a2=(-s * np.sin(angle), s * np.cos(angle)),
                          offset=(size / 2 + 0.3, size / 2 - 0.4))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(size, size), psf=PSF, camera=camera,
                                    region=("disk", size / 2 / s - 1), filling=filling, photons_per_atom=photons,
                                    background=1.5, n_shots=n_frames, phase_jitter=0.5, rng=11)
    cal = Calibration(geometry=geo, psf=PSF, camera=camera, frame_shape=(size, size), threshold=photons / 2,
                      options=ReconstructionOptions(photons_per_atom=photons))
    z = []
    for f, res in enumerate(reconstruct_stack(frames, cal)):
        assert res.offset_method == "model"
        sigma = np.asarray(res.offset_sigma)
        assert np.all(np.isfinite(sigma)) and np.all(sigma > 0), res.offset_sigma
        error = np.asarray(res.geometry.offset) - np.asarray(truth.geometries[f].offset)
        error = error - np.rint(geo.reciprocal @ error) @ np.array([geo.a1, geo.a2])  # nearest lattice translate
        z.extend(error / sigma)
    return np.asarray(z)


@pytest.mark.parametrize("camera, ratio, filling, photons", [("scmos", 1.3, 0.3, 600.0), ("emccd", 1.2, 0.4, 700.0)])
def test_model_offset_sigma_matches_the_scatter_of_the_errors(camera, ratio, filling, photons):
    z = _offset_z(CAMERAS[camera], ratio=ratio, filling=filling, photons=photons)
    rms = float(np.sqrt(np.mean(z ** 2)))
    assert 0.75 < rms < 1.35, f"errors / stated 1-sigma have RMS {rms:.2f}, want ~1"
