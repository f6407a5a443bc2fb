"""Cramer-Rao bound on the lattice vectors from one frame (run by hand; prints numbers).

How precisely can *any* unbiased estimator find the lattice spacing and angle from one frame
of the issue's scenario? The Fisher information of a Poisson image with mean
``mu(p) = background + sum_k A_k s(p - r_k)`` is ``F = J^T diag(1 / mu) J`` (``J`` the
derivative of ``mu`` with respect to the parameters); the covariance of an unbiased estimator
is at least ``F^-1`` (Cramer-Rao; e.g. Kay, *Fundamentals of Statistical Signal Processing:
Estimation Theory*, 1993, ch. 3; the Poisson form is the one used for single-emitter
localisation, Ober, Ram & Ward, Biophys. J. 86, 1185 (2004) -- both quoted from memory).
The nuisance parameters (background, atom brightnesses) are removed with the Schur complement.
An EMCCD at high gain halves the information (excess noise factor 2, Robbins & Hadwen 2003).
The computation is :func:`latticeread.core.lattice_bound.lattice_precision_bound` (tested in
tests/test_lattice_bound.py against the single-emitter bound and least-squares regression).

Three cases, from most to least known:

``known``      occupation and brightness of every site known (only the geometry and the
               background are free): the floor for any method.
``occupied``   which sites hold an atom known, each atom's brightness free.
``linear``     every site's amplitude free and continuous: what a linear (least-squares or
               weighted) amplitude fit faces; the model fit in ``core/lattice_model.py`` is
               of this kind.

Frames as in bench/bench_lattice.py (512x512, ~52x52 sites of spacing 9.8 pixels, random
angle, filling 0.3, 500 photons per atom, 2 photons of background per pixel, ideal photon
counter); the mean image of the simulation (its ``photons`` per site) is used, averaged over
seeds. Printed: 1-sigma relative spacing error (of |a1|), angle error (mrad) and offset error
(spacings) per case, and the single-frame target (2e-4, 0.5 mrad, 0.01) beside them. A worst
case over 4-8 seeds is about 2 sigma.

Usage::

    python bench/bench_lattice_bound.py
    python bench/bench_lattice_bound.py --seeds 4 --ratios 0.7 0.8 1.0 --emccd
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, os.path.dirname(__file__))
from bench_lattice import SPACING, make_frame  # noqa: E402

from latticeread.core.lattice_bound import lattice_precision_bound  # noqa: E402

SHAPE = (512, 512)
BACKGROUND = 2.0


def scenario(ratio, seed, kind):
    """Truth of the bench_lattice frame for this seed: geometry, site indices, mean photons, PSF."""
    _, truth, sim = make_frame(ratio, seed, kind=kind, shape=SHAPE, return_sim=True)
    return truth, sim.sites.rows.astype(float), sim.sites.cols.astype(float), sim.photons[0], sim.psf


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--ratios", type=float, nargs="*", default=[0.7, 0.8, 0.9, 1.0, 1.2, 1.5])
    parser.add_argument("--kinds", nargs="*", default=["airy", "gaussian"])
    parser.add_argument("--emccd", action="store_true", help="excess noise factor 2 (EMCCD at high gain)")
    args = parser.parse_args()
    excess = 2.0 if args.emccd else 1.0
    print(f"Cramer-Rao bound, one 512x512 frame, ~52x52 sites, filling 0.3, 500 photons/atom, background "
          f"{BACKGROUND} photons/pixel, {'EMCCD (excess 2)' if args.emccd else 'ideal photon counter'}, "
          f"mean of {args.seeds} seeds; 1 sigma. Target: spacing 2e-4, angle 0.5 mrad, offset 0.01")
    print(f"{'PSF':9s} {'a/FWHM':>6s}  {'spacing: known':>14s} {'occupied':>9s} {'linear':>9s}   "
          f"{'angle mrad: known':>17s} {'occupied':>9s} {'linear':>9s}   {'offset: linear':>14s}")
    for kind in args.kinds:
        for ratio in args.ratios:
            rows_out = []
            for seed in range(args.seeds):
                truth, rows, cols, amps, psf = scenario(ratio, seed, kind)
                kw = dict(frame_shape=SHAPE, psf=psf, rows=rows, cols=cols, photons=amps, background=BACKGROUND,
                          excess_noise=excess)
                bounds = {name: lattice_precision_bound(truth, free=free, **kw)
                          for name, free in (("known", "none"), ("occupied", "brightness"), ("linear", "amplitudes"))}
                rows_out.append({name: (b.spacing_relative[0], b.angle[0], b.offset / SPACING)
                                 for name, b in bounds.items()})
            mean = {name: np.mean([r[name] for r in rows_out], axis=0) for name in rows_out[0]}
            print(f"{kind:9s} {ratio:6.2f}  {mean['known'][0]:14.2e} {mean['occupied'][0]:9.2e} "
                  f"{mean['linear'][0]:9.2e}   {mean['known'][1] * 1e3:17.3f} {mean['occupied'][1] * 1e3:9.3f} "
                  f"{mean['linear'][1] * 1e3:9.3f}   {mean['linear'][2]:14.4f}", flush=True)


if __name__ == "__main__":
    main()
