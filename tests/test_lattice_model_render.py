"""The image-model fit's rendering of sites and their position derivatives (latticeread.core.lattice_model).

Checks:
- the rendered images equal the stamps drawn one by one (normalised stamps and their derivatives
  from ``_PSFTable``, scatter-added with ``numpy.add.at``);
- the derivative images equal central finite differences of the rendered model in each lattice
  parameter (common practice, no source; step 1e-4 pixel; measured agreement 4e-5 of the largest
  value, the linear table's own kinks keep it from being better).
"""

import numpy as np
import pytest

from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.core.lattice_model import _Problem
from latticeread.core.psf import gaussian_psf

SHAPE = (72, 80)


@pytest.fixture(scope="module")
def problem():
    geometry = LatticeGeometry(a1=(1.3, 6.2), a2=(6.2, -1.3), offset=(39.6, 35.2))
    sites = lattice_sites(geometry, SHAPE)
    psf = gaussian_psf(fwhm=5.0)
    rng = np.random.default_rng(8)
    amp = rng.uniform(0, 500, len(sites))
    return _Problem(np.zeros((1,) + SHAPE), psf=psf, rows=np.asarray(sites.rows), cols=np.asarray(sites.cols)), \
        geometry, amp


def _by_hand(problem, a1, a2, offset, coefficients):
    height, width = SHAPE
    r, pad = problem.table.radius, problem.pad
    full = (height + 2 * pad, width + 2 * pad)
    x = offset[0] + problem.rows * a1[0] + problem.cols * a2[0]
    y = offset[1] + problem.rows * a1[1] + problem.cols * a2[1]
    xi, yi = np.rint(x).astype(int), np.rint(y).astype(int)
    parts = problem.table(x - xi, y - yi)
    oy, ox = np.mgrid[-r:r + 1, -r:r + 1]
    out = []
    for c, part in coefficients:
        image = np.zeros(full)
        np.add.at(image, (yi[:, None, None] + pad + oy[None], xi[:, None, None] + pad + ox[None]),
                  c[:, None, None] * parts[part])
        out.append(image)
    return out


def test_render_equals_the_stamps_drawn_one_by_one(problem):
    prob, g, amp = problem
    a1, a2, off = (np.asarray(v, float) for v in (g.a1, g.a2, g.offset))
    rows = prob.rows.astype(float)
    wanted = [(amp, 0), (amp * rows, 1), (amp, 2), (amp * rows, 2), (-amp, 1)]
    got = prob.render(a1, a2, off, wanted)
    ref = _by_hand(prob, a1, a2, off, wanted)
    for a, b in zip(got, ref):
        assert np.abs(a - b).max() < 1e-12 * np.abs(b).max()


def test_derivative_images_match_finite_differences(problem):
    prob, g, amp = problem
    params = np.concatenate([g.a1, g.a2, g.offset]).astype(float)
    model, derivatives = prob.model_and_derivatives(params[0:2], params[2:4], params[4:6], amp)
    h = 1e-4
    for j, d in enumerate(derivatives):
        up, down = params.copy(), params.copy()
        up[j] += h
        down[j] -= h
        plus, _ = prob.model_and_derivatives(up[0:2], up[2:4], up[4:6], amp, derivatives=False)
        minus, _ = prob.model_and_derivatives(down[0:2], down[2:4], down[4:6], amp, derivatives=False)
        numeric = (plus - minus) / (2 * h)
        assert np.abs(d - numeric).max() < 2e-4 * np.abs(numeric).max()
