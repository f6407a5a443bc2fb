"""Sites under a cosmic-ray hit: refitted on the pixels left around them, whatever the fill made of them."""

import numpy as np

from latticeread.core.artefacts import PixelModel, refit_near_artefacts
from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.psf import gaussian_psf, render_sites

PSF = gaussian_psf(fwhm=3.0, radius=7)


def test_hit_cores_refitted_from_a_wrong_start():
    geo = LatticeGeometry((5.0, 0.0), (0.0, 5.0), offset=(30.0, 30.0))
    shape = (60, 60)
    sites = lattice_sites(geo, shape)
    rng = np.random.default_rng(1)
    truth = np.where(rng.random(len(sites)) < 0.5, 800.0, 0.0)
    atom = int(np.argmin(np.hypot(sites.x - 30, sites.y - 30)))
    empty = int(np.argmin(np.hypot(sites.x - 40, sites.y - 25)))
    truth[atom], truth[empty] = 800.0, 0.0
    image = 2.0 + render_sites(shape, sites.x, sites.y, truth, PSF)
    mask = np.zeros(shape, bool)
    for i in (atom, empty):  # a 3x3 hit on each core: its pixels are left out
        r, c = int(round(sites.y[i])), int(round(sites.x[i]))
        mask[r - 1:r + 2, c - 1:c + 2] = True
        image[r - 1:r + 2, c - 1:c + 2] += 500.0
    start = truth.copy()
    start[atom], start[empty] = 100.0, 600.0  # what a fill from the neighbours' light might give
    out = refit_near_artefacts(image, mask, x=sites.x, y=sites.y, amplitudes=start, background=2.0,
                               model=PixelModel(PSF))
    assert abs(out[atom] - 800.0) < 40.0 and abs(out[empty]) < 40.0, (out[atom], out[empty])
    far = np.hypot(sites.x - 35, sites.y - 27.5) > 20
    assert np.array_equal(out[far], start[far])  # sites away from the hits keep their amplitudes
