"""Seconds and geometry errors of one unaided ``calibrate`` of a tight 1024x1024 frame (run by hand).

Scenario (invented, the project's own forward model :func:`latticeread.core.simulate.simulate_frames`):
square lattice at spacing 0.70 PSF FWHM (Airy PSF of FWHM 4 pixels: spacing 2.8 pixels), random
angle and offset, atoms with filling 0.3 in an 84 x 84-site block at the frame centre (about 7,000
sites, the cloud of the binary method's timing in bench/bench_lattice_atoms.py), 400 photons per
atom, 1 photon/pixel background, sCMOS camera (2 counts per electron, bias 100, read noise 3).
``--region 0`` fills the whole frame instead (about 134,000 sites: more than a site basis can be
factorised for, and calibrate says so).
``calibrate`` gets the frame, the PSF (from the optics) and the camera, nothing about the lattice;
with ``--prior`` also the lab's spacing 1 % and angle 1 degree off (``lattice_prior``: the route
when the atoms' positions show no lattice).

Printed per seed: wall and CPU seconds (``time.process_time``, this process and its threads; BLAS
pinned to one thread) with the load average beside them (other processes on the 2 cores lengthen
the wall time; the CPU time is the figure to compare), the route the geometry took, and the
errors against the truth: relative spacing, angle (mrad), offset of the site nearest the frame
centre and the largest distance of a true site of the loaded block from the nearest calibrated
site (both in spacings). ``--profile`` adds a cProfile summary of the first seed.

Usage::

    nice .venv/bin/python bench/bench_calibrate.py
    nice .venv/bin/python bench/bench_calibrate.py --seeds 1 --profile
    nice .venv/bin/python bench/bench_calibrate.py --size 512 --ratio 0.8
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import cProfile  # noqa: E402
import pstats  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.geometry import LatticeGeometry, lattice_sites  # noqa: E402
from latticeread.core.pipeline import calibrate  # noqa: E402
from latticeread.core.psf import airy_psf  # noqa: E402
from latticeread.core.simulate import simulate_frames  # noqa: E402
from latticeread.errors import LatticeReadError, LatticeReadWarning  # noqa: E402

FWHM = 4.0
PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=0.5145 * 1000.0 / FWHM)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def _load() -> str:
    return "load " + "/".join(f"{v:.1f}" for v in os.getloadavg())


def _truth(spacing, rng, shape) -> LatticeGeometry:
    angle = rng.uniform(0, np.pi / 2)
    vec = lambda a: (spacing * np.cos(a), spacing * np.sin(a))  # noqa: E731
    return LatticeGeometry(a1=vec(angle + np.pi / 2), a2=vec(angle),
                           offset=(shape[1] / 2 + rng.uniform(-1, 1), shape[0] / 2 + rng.uniform(-1, 1)))


def errors(found: LatticeGeometry, truth: LatticeGeometry, shape, sites=None):
    """Relative spacing error, angle error (rad), centre-site and farthest-site error (spacings).

    The found vectors are first expressed in the true basis (an integer change of basis), so a
    calibration that names the vectors differently is not counted as wrong. The site errors are
    taken over ``sites`` (default: every site in the frame).
    """
    m = np.rint(np.linalg.inv(truth.basis) @ found.basis)
    b = found.basis @ np.linalg.inv(m)
    spacing = float(np.max(np.abs(np.hypot(b[0], b[1]) / np.array(truth.spacings) - 1)))
    angle = float(np.max(np.abs([np.angle(complex(*b[:, k]) / complex(*truth.basis[:, k])) for k in range(2)])))
    sites = lattice_sites(truth, shape) if sites is None else sites
    rel = np.stack([sites.x, sites.y]) - np.asarray(found.offset)[:, None]
    frac = np.linalg.inv(found.basis) @ rel
    d = np.hypot(*(found.basis @ (frac - np.rint(frac)))) / min(truth.spacings)
    centre = int(np.argmin(np.hypot(sites.x - shape[1] / 2, sites.y - shape[0] / 2)))
    return spacing, angle, float(d[centre]), float(d.max())


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--ratio", type=float, default=0.70, help="spacing / PSF FWHM")
    ap.add_argument("--filling", type=float, default=0.3)
    ap.add_argument("--photons", type=float, default=400.0)
    ap.add_argument("--region", type=int, default=84, help="sites per side of the loaded block (0: whole frame)")
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--prior", action="store_true", help="give a spacing 1 %% and an angle 1 degree off")
    ap.add_argument("--profile", action="store_true")
    args = ap.parse_args()
    shape = (args.size, args.size)
    print(f"calibrate, {args.size}x{args.size}, square lattice at {args.ratio:.2f} FWHM (Airy FWHM {FWHM:g} px), "
          f"filling {args.filling:g} in {'the whole frame' if args.region <= 0 else f'a {args.region}x{args.region}-site block'}"
          f", {args.photons:g} photons/atom, sCMOS; PSF and camera given, "
          f"{'spacing 1 % and angle 1 deg off given' if args.prior else 'no lattice hint'}")
    print(f"{'seed':>4} {'wall s':>7} {'CPU s':>7} {'route':>16} {'spacing':>8} {'angle mrad':>10} "
          f"{'centre sp':>9} {'far sp':>7}")
    for seed in range(args.seeds):
        rng = np.random.default_rng(100 + seed)
        truth = _truth(args.ratio * FWHM, rng, shape)
        region = None if args.region <= 0 else ("rectangle", args.region, args.region)
        frames, sim = simulate_frames(geometry=truth, frame_shape=shape, psf=PSF, camera=CAMERA, filling=args.filling,
                                    region=region, photons_per_atom=args.photons, background=1.0, rng=seed, margin=0)
        profile = cProfile.Profile() if args.profile and seed == 0 else None
        t0, c0 = time.perf_counter(), time.process_time()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", LatticeReadWarning)
                if profile is not None:
                    profile.enable()
                prior = None
                if args.prior:
                    prior = {"spacing_px": 1.01 * args.ratio * FWHM,
                             "angle_deg": float(np.degrees(np.arctan2(truth.a1[1], truth.a1[0]))) + 1.0}
                cal = calibrate(frames, psf=PSF, camera=CAMERA, lattice_prior=prior)
        except LatticeReadError as exc:
            print(f"{seed:4d} {time.perf_counter() - t0:7.1f} {time.process_time() - c0:7.1f} FAILED: {exc}; {_load()}")
            continue
        finally:
            if profile is not None:
                profile.disable()
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
        s, a, c, far = errors(cal.geometry, truth, shape, sim.sites)
        print(f"{seed:4d} {wall:7.1f} {cpu:7.1f} {cal.notes.get('geometry_method', '?'):>16} {s:8.1e} {1e3 * a:10.3f} "
              f"{c:9.4f} {far:7.3f}   {_load()}", flush=True)
        if profile is not None:
            pstats.Stats(profile).sort_stats("cumulative").print_stats(35)


if __name__ == "__main__":
    main()
