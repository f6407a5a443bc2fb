"""The prior path fits the part of a frame that holds light (latticeread.core.lattice_model).

Ground truth from the project's forward model (latticeread.core.simulate): a square lattice of
spacing 6 pixels at 0.8 FWHM (Gaussian PSF), atoms with filling 0.5 in a block of sites at the
frame centre, 1500 photons per atom, 2 photons of background per pixel. Checks:
- the box around the light holds every atom (with the PSF window and two spacings around it) and
  leaves the empty rest of a large frame out; a frame lit everywhere, or with no light at its
  centre, keeps its whole area;
- the prior path on such a frame finds the true lattice (offset within 0.01 spacing; spacing
  within 1e-3 of the truth or three times the fit's own 1-sigma, whichever is larger: a 20 x
  20-site block holds little information at 0.8 FWHM), so cutting the box out and shifting the
  offsets back is right. Reciprocal basis for comparing vectors: a_i . b_j =
  delta_ij (Ashcroft & Mermin, *Solid State Physics*, ch. 5, quoted from memory).
"""

import numpy as np
import pytest

from latticeread.core.geometry import LatticeGeometry
from latticeread.core.lattice import offset_error
from latticeread.core.lattice_model import _lit_box, lattice_from_prior
from latticeread.core.psf import gaussian_psf
from latticeread.core.simulate import simulate_frames

SPACING = 6.0
PSF = gaussian_psf(fwhm=SPACING / 0.8)


def _block_frame(size, block, seed=2):
    theta = 0.3
    a1 = SPACING * np.array([np.cos(theta), np.sin(theta)])
    a2 = SPACING * np.array([-np.sin(theta), np.cos(theta)])
    truth = LatticeGeometry(a1=tuple(a1), a2=tuple(a2), offset=(size / 2 + 0.3, size / 2 - 0.4))
    region = None if block is None else ("rectangle", block, block)
    frames, sim = simulate_frames(geometry=truth, frame_shape=(size, size), psf=PSF, filling=0.5, region=region,
                                  photons_per_atom=1500.0, background=2.0, rng=seed, margin=0)
    return frames[0].astype(float), truth, sim


def test_the_box_holds_every_atom_and_leaves_the_empty_frame_out():
    image, truth, sim = _block_frame(400, 20)
    y0, y1, x0, x1 = _lit_box(image[None], truth, psf=PSF, radius=10.0)
    on = sim.initial_occupation[0] == 1
    x, y = sim.sites.x[on], sim.sites.y[on]
    reach = PSF.radius + 2 * SPACING
    assert x0 <= x.min() - reach and x1 >= x.max() + reach
    assert y0 <= y.min() - reach and y1 >= y.max() + reach
    assert (y1 - y0) * (x1 - x0) < 0.5 * image.size  # the empty rest of the frame is left out


def test_a_frame_lit_everywhere_or_dark_at_its_centre_keeps_its_whole_area():
    image, truth, _ = _block_frame(160, None)
    assert _lit_box(image[None], truth, psf=PSF, radius=10.0) == (0, 160, 0, 160)
    dark = np.full((1, 160, 160), 2.0)
    assert _lit_box(dark, truth, psf=PSF, radius=10.0) == (0, 160, 0, 160)


@pytest.fixture(scope="module")
def block_fit():
    image, truth, _ = _block_frame(240, 20)
    fitted = lattice_from_prior(image, psf=PSF, spacing=1.01 * SPACING, angle=truth.angles[1] + 0.01,
                                angle_between=truth.angles[0] - truth.angles[1], radii=(6.0, None))
    return fitted, truth


def test_prior_path_on_a_block_of_atoms_finds_the_true_lattice(block_fit):
    fitted, truth = block_fit
    m = np.rint(np.linalg.inv(truth.basis) @ fitted.basis)  # Ashcroft & Mermin: a_i . b_j = delta_ij
    b = fitted.basis @ np.linalg.inv(m)
    assert np.max(np.abs(np.hypot(b[0], b[1]) / SPACING - 1)) < max(1e-3, 3 * fitted.quality.spacing_sigma)
    assert fitted.quality.spacing_sigma < 2e-3
    assert offset_error(truth.with_offset(fitted.offset), truth) / SPACING < 0.01
