"""Accuracy and speed of the lattice estimate (run by hand; prints numbers, asserts nothing).

Usage::

    python bench/bench_lattice.py            # accuracy sweep + speed
    python bench/bench_lattice.py --quick    # fewer seeds

Accuracy: single 512x512 frames from the forward model, ~52x52 sites (spacing 9.8 pixels,
random rotation and offset), random filling 0.3, 500 photons per atom, background 2 photons
per pixel, ideal photon counter; Gaussian and Airy PSFs with spacing / FWHM from 0.7 to 1.5.
Reported per setting: how many seeds found a lattice, and the largest (over seeds) relative
spacing error, angle error (mrad), offset error of the full estimate and of ``refine_phase``
with the true vectors (lattice spacings).

Speed: CPU time (``time.process_time``) on one core -- BLAS is pinned to one thread before
numpy loads -- of the full estimate and of ``refine_phase`` on a 1024x1024 frame; best of
several runs. CPU time rather than wall time because the machine may be shared.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

from latticeread.core.geometry import LatticeGeometry  # noqa: E402
from latticeread.core.lattice import estimate_lattice, offset_error, refine_phase  # noqa: E402
from latticeread.core.psf import airy_psf, gaussian_psf  # noqa: E402
from latticeread.core.simulate import simulate_frames  # noqa: E402
from latticeread.errors import LatticeNotFound, LatticeReadWarning  # noqa: E402

SPACING = 9.8


def true_geometry(seed, shape=(512, 512)):
    """The lattice of a seed: spacing SPACING, random angle, offset within 5 pixels of the centre."""
    rng = np.random.default_rng(10_000 + seed)
    theta = rng.uniform(0, np.pi)
    a1 = SPACING * np.array([np.cos(theta), np.sin(theta)])
    a2 = SPACING * np.array([-np.sin(theta), np.cos(theta)])
    centre = np.array([shape[1], shape[0]]) / 2.0
    return LatticeGeometry(a1=a1, a2=a2, offset=tuple(centre + rng.uniform(-5, 5, 2)))


def psf_for(kind, ratio):
    """Gaussian, or Airy of 767 nm light through NA 0.75 with the pixel size giving this spacing/FWHM."""
    fwhm = SPACING / ratio
    if kind == "gaussian":
        return gaussian_psf(fwhm=fwhm)
    return airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=0.5145 * 767.0 / 0.75 / fwhm)


def make_frame(ratio, seed, *, kind="gaussian", shape=(512, 512), filling=0.3, photons=500.0, return_sim=False,
               n_frames=1):
    """One frame (or, with ``n_frames`` > 1, a stack of shots of the same lattice) and its truth."""
    psf = psf_for(kind, ratio)
    truth = true_geometry(seed, shape)
    frames, sim = simulate_frames(geometry=truth, frame_shape=shape, psf=psf, filling=filling,
                                  photons_per_atom=photons, background=2.0, rng=seed, margin=0, n_shots=n_frames)
    image = frames[0].astype(float) if n_frames == 1 else frames.astype(float)
    if return_sim:
        return image, truth, sim
    return image, truth


def errors(estimate, truth):
    m = np.rint(np.linalg.inv(truth.basis) @ estimate.basis)
    b = estimate.basis @ np.linalg.inv(m)
    est = LatticeGeometry(a1=b[:, 0], a2=b[:, 1], offset=estimate.offset)
    spacing = np.max(np.abs(np.array(est.spacings) / np.array(truth.spacings) - 1))
    dang = (np.array(est.angles) - np.array(truth.angles) + np.pi) % (2 * np.pi) - np.pi
    return spacing, np.max(np.abs(dang)), offset_error(truth.with_offset(est.offset), truth) / SPACING


def accuracy(seeds):
    print(f"accuracy: 512x512, ~52x52 sites, filling 0.3, 500 photons/atom, {len(seeds)} seeds")
    print(f"{'PSF':9s} {'a/FWHM':>6s} {'found':>6s} {'spacing':>9s} {'angle':>9s} {'phase':>7s} {'phase':>7s}")
    print(f"{'':9s} {'':>6s} {'':>6s} {'rel.err':>9s} {'mrad':>9s} {'full':>7s} {'known':>7s}")
    for kind in ("gaussian", "airy"):
        for ratio in (0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.35, 1.5):
            worst = np.zeros(4)
            found = 0
            for seed in seeds:
                image, truth = make_frame(ratio, seed, kind=kind)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", LatticeReadWarning)
                    try:
                        est = estimate_lattice(image)
                        found += 1
                        worst[:3] = np.maximum(worst[:3], errors(est, truth))
                    except LatticeNotFound:
                        pass
                    try:
                        phase = offset_error(refine_phase(image, truth), truth) / SPACING
                    except LatticeNotFound:
                        phase = np.nan
                worst[3] = np.fmax(worst[3], phase) if np.isfinite(phase) else np.nan
            if found:
                print(f"{kind:9s} {ratio:6.2f} {found:3d}/{len(seeds):<2d} {worst[0]:9.1e} {worst[1] * 1e3:9.3f} "
                      f"{worst[2]:7.4f} {worst[3]:7.4f}")
            else:
                print(f"{kind:9s} {ratio:6.2f} {found:3d}/{len(seeds):<2d} {'-':>9s} {'-':>9s} {'-':>7s} {worst[3]:7.4f}")


def cpu_time(fn, repeats):
    best = np.inf
    for _ in range(repeats):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def speed():
    image, truth = make_frame(1.2, 1, shape=(1024, 1024))
    est = estimate_lattice(image)
    t_est = cpu_time(lambda: estimate_lattice(image), 5)
    t_phase = cpu_time(lambda: refine_phase(image, est), 20)
    t0 = time.perf_counter()
    estimate_lattice(image)
    wall = time.perf_counter() - t0
    print(f"speed (1024x1024, ~105x105 sites, one core): estimate_lattice {t_est * 1e3:.0f} ms CPU "
          f"(wall {wall * 1e3:.0f} ms), refine_phase {t_phase * 1e3:.1f} ms CPU; "
          f"load average {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="3 seeds instead of 8")
    args = parser.parse_args()
    accuracy(range(3) if args.quick else range(8))
    speed()
