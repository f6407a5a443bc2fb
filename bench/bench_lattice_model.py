"""Accuracy and time of the image-model lattice fit (run by hand; prints numbers, asserts nothing).

Usage::

    python bench/bench_lattice_model.py            # 4 seeds
    python bench/bench_lattice_model.py --seeds 8
    python bench/bench_lattice_model.py --frames 4 --ratios 0.7 0.8 --kinds airy   # stacks

Frames as in bench/bench_lattice.py: 512x512, ~52x52 sites of spacing 9.8 pixels at a random
angle, random filling 0.3, 500 photons per atom, 2 photons of background per pixel, ideal photon
counter; Gaussian and Airy PSFs at spacing / FWHM 0.7, 0.8, 1.0, 1.2, 1.5. Start: the Fourier
estimate when it finds the lattice ("fourier"), otherwise the prior path
(:func:`lattice_from_prior` with the spacing 1 % and the angle 10 mrad off, "prior").
With ``--frames K`` each seed is a stack of K shots of the same lattice (new occupations, no
phase jitter) fitted together. Reported: largest error over the seeds (relative spacing, angle in mrad, offset in spacings),
the median 1-sigma position uncertainty of the outermost site that the fit reports (pixels),
and the median CPU time per fit (``time.process_time``, BLAS pinned to one thread).
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, os.path.dirname(__file__))
from bench_lattice import errors, make_frame, psf_for  # noqa: E402

from latticeread.core.lattice import estimate_lattice  # noqa: E402
from latticeread.core.lattice_model import lattice_from_prior, refine_lattice_model  # noqa: E402
from latticeread.errors import LatticeNotFound, LatticeReadWarning  # noqa: E402


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--seeds", type=int, default=4)
    parser.add_argument("--ratios", type=float, nargs="*", default=[0.7, 0.8, 1.0, 1.2, 1.5])
    parser.add_argument("--kinds", nargs="*", default=["gaussian", "airy"])
    parser.add_argument("--frames", type=int, default=1, help="shots per seed fitted together")
    args = parser.parse_args()
    print(f"image-model fit: 512x512, ~52x52 sites, filling 0.3, 500 photons/atom, {args.seeds} seeds, "
          f"{args.frames} frame(s) per fit")
    print(f"{'PSF':9s} {'a/FWHM':>6s} {'start':>8s} {'ok':>3s} {'spacing':>9s} {'angle':>7s} {'phase':>7s} "
          f"{'sigma':>7s} {'cpu s':>6s}")
    for kind in args.kinds:
        for ratio in args.ratios:
            psf = psf_for(kind, ratio)
            worst, sig, cpu, starts, ok = np.zeros(3), [], [], set(), 0
            for seed in range(args.seeds):
                image, truth = make_frame(ratio, seed, kind=kind, n_frames=args.frames)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", LatticeReadWarning)
                    t0 = time.process_time()
                    try:
                        try:
                            start = estimate_lattice(image)
                            fit = refine_lattice_model(image, start, psf=psf)
                            starts.add("fourier")
                        except LatticeNotFound:
                            a2 = truth.angles[1]
                            fit = lattice_from_prior(image, psf=psf, spacing=1.01 * np.array(truth.spacings),
                                                     angle=a2 + 0.01, angle_between=truth.angles[0] - a2)
                            starts.add("prior")
                    except LatticeNotFound:
                        continue
                    cpu.append(time.process_time() - t0)
                ok += 1
                worst = np.maximum(worst, errors(fit, truth)[:3])
                sig.append(fit.quality.residual)
            if ok == 0:
                print(f"{kind:9s} {ratio:6.2f} {'-':>8s} {0:3d}")
                continue
            print(f"{kind:9s} {ratio:6.2f} {'/'.join(sorted(starts)):>8s} {ok:3d} {worst[0]:9.2e} "
                  f"{worst[1] * 1e3:7.3f} {worst[2]:7.4f} {np.median(sig):7.3f} {np.median(cpu):6.1f}", flush=True)


if __name__ == "__main__":
    main()
