"""Lattice vectors from a prior below the optical cut-off (latticeread.core.lattice_model).

Its own file so that the suite's two worker processes (pytest-xdist, one file per worker) run
this slowest fit beside the rest of tests/test_lattice_model.py, whose frames, truth and error
measure it shares (scenario and sources are described there: Born & Wolf for the Airy FWHM
0.514 lambda / NA and the cut-off, Ashcroft & Mermin for the reciprocal basis).
"""

import warnings

import numpy as np
import pytest

from latticeread.core.lattice import estimate_lattice
from latticeread.core.lattice_model import lattice_from_prior
from latticeread.errors import LatticeNotFound, LatticeReadWarning

from test_lattice_model import _errors, _frame

#: pixels per lattice spacing and frame size: the scenario of test_lattice_model.py in lattice
#: units (~52x52 sites) at 6 pixels per spacing, a quarter of the fit's cost at 9.8
SPACING = 6.0
SIZE = 320


def test_prior_path_below_the_optical_cut_off():
    """Spacing 0.8 FWHM (Airy): no Fourier peak, so start from a prior 1 % / 10 mrad off.

    The slowest lattice test (about 20 s of CPU at 6 pixels per spacing; seeds 3, 4, 5 gave
    spacing errors 1.7e-4, 0.7e-4, 2.7e-4, angle 0.14-0.27 mrad): bench/bench_lattice_model.py
    has the numbers at 9.8 pixels over 4 seeds (largest spacing error 3.6e-4, angle 0.48 mrad;
    1.1e-4 with 4 frames together).
    """
    image, truth, psf = _frame("airy", 0.8, 3, size=SIZE, spacing=SPACING)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LatticeReadWarning)
        with pytest.raises(LatticeNotFound):
            estimate_lattice(image)
    angle_a2 = truth.angles[1]
    fitted = lattice_from_prior(image, psf=psf, spacing=1.01 * np.array(truth.spacings), angle=angle_a2 + 0.01,
                                angle_between=truth.angles[0] - angle_a2)
    spacing, angle, phase = _errors(fitted, truth)
    # At 0.8 FWHM one 600-photon frame does not hold enough information for 2e-4 (not even at
    # 512x512): the fit's own 1-sigma position error of the outermost site (quality.residual)
    # over its distance from the centre (~36 sites, about 2.5e-4) is the relative
    # spacing error it can reach. Check against that, and the angle and phase targets.
    extent = 36 * SPACING  # ~36 sites from the centre to a corner
    assert spacing < max(2e-4, 2.5 * fitted.quality.residual / extent)
    assert spacing < 5e-4
    assert angle < 0.5e-3
    assert phase < 0.01
