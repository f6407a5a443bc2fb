"""Lattice from the positions of single atoms: accuracy beside the Cramer-Rao bound, and speed (run by hand).

For each spacing/FWHM and filling, frames of the forward model (Airy PSF, photon counter,
``--photons`` per atom, 1 photon/pixel background, random angle and offset) go through
:func:`latticeread.core.atoms.lattice_from_atoms` with only the PSF's FWHM given. Printed per
row, worst over the seeds, each beside its Cramer-Rao bound (1 sigma, free amplitudes, the
mean image of the first seed, ideal photon counter;
:func:`latticeread.core.lattice_bound.lattice_precision_bound`, Ober, Ram & Ward 2004 form,
from memory): the relative spacing error, the angle error (mrad), the offset error of the
site nearest the centre (spacings); then the largest distance of a site of the frame from
the found lattice (spacings) and the CPU seconds of one estimate (locating included). Then the per-frame offset
(:func:`latticeread.core.atoms.offset_from_atoms`, locating included) on a 1024x1024 frame, and
the binary ("nonlinear") amplitude method on a 1024x1024 frame at 0.70 FWHM with ~7,000
sites in the atoms' region (true geometry, fixed offset: the amplitudes only), and with
``--calibrate`` one unaided ``calibrate`` of a 1024x1024 frame at 0.70 FWHM. The machine's
load (``os.getloadavg``) is printed beside every timing: on a shared machine it inflates wall
times.

Usage::

    python bench/bench_lattice_atoms.py
    python bench/bench_lattice_atoms.py --ratios 0.65 0.8 --fillings 0.05 0.3 --seeds 2 --bound --calibrate
    python bench/bench_lattice_atoms.py --ratios 1.0 --fillings 0.05 --seeds 1 --skip-binary --calibrate
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from latticeread.core.atoms import lattice_from_atoms, locate_atoms, locate_holes, offset_from_atoms  # noqa: E402
from latticeread.core.geometry import LatticeGeometry, lattice_sites  # noqa: E402
from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.psf import airy_psf  # noqa: E402
from latticeread.core.simulate import simulate_frames  # noqa: E402
from latticeread.errors import LatticeNotFound, LatticeReadError  # noqa: E402

FWHM = 4.0


def _psf(fwhm=FWHM):
    return airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=0.5145 * 1000.0 / fwhm)


def _geometry(spacing, rng, shape):
    angle = rng.uniform(0, np.pi / 2)
    rot = lambda a: (spacing * np.cos(a), spacing * np.sin(a))  # noqa: E731
    return LatticeGeometry(a1=rot(angle + np.pi / 2), a2=rot(angle),
                           offset=(shape[1] / 2 + rng.uniform(-1, 1), shape[0] / 2 + rng.uniform(-1, 1)))


def _errors(found, truth, shape):
    """Relative spacing error, angle error (rad), offset error (spacings) and the farthest site's error (spacings).

    The offset error is that of the site nearest the frame centre; the far-site error is the
    largest distance from a true site in the frame to the nearest found site.
    """
    m = np.rint(np.linalg.inv(truth.basis) @ found.basis)
    b = found.basis @ np.linalg.inv(m)
    spacing = float(np.max(np.abs(np.hypot(b[0], b[1]) / np.array(truth.spacings) - 1)))
    ang = [np.angle(complex(*b[:, k]) / complex(*truth.basis[:, k])) for k in range(2)]
    angle = float(np.max(np.abs(ang)))
    sites = lattice_sites(truth, shape)
    rel = np.stack([sites.x, sites.y]) - np.asarray(found.offset)[:, None]
    frac = np.linalg.inv(found.basis) @ rel
    d = np.hypot(*(found.basis @ (frac - np.rint(frac)))) / min(truth.spacings)
    centre = np.argmin(np.hypot(sites.x - shape[1] / 2, sites.y - shape[0] / 2))
    return spacing, angle, float(d[centre]), float(d.max())


def _bound(truth_geometry, truth, psf, photons, shape, camera=None):
    """Cramer-Rao bound (free amplitudes): relative spacing, angle (rad), offset (spacings)."""
    from latticeread.core.lattice_bound import lattice_precision_bound

    occ = truth.initial_occupation[0].astype(float)
    p = lattice_precision_bound(truth_geometry, frame_shape=shape, psf=psf, rows=truth.sites.rows,
                                cols=truth.sites.cols, photons=occ * photons, background=1.0, free="amplitudes")
    return float(max(p.spacing_relative)), float(max(p.angle)), float(p.offset / min(truth_geometry.spacings))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ratios", type=float, nargs="+", default=[0.65, 0.8, 1.0, 1.2, 1.5])
    ap.add_argument("--fillings", type=float, nargs="+", default=[0.05, 0.3, 0.6, 0.95])
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--photons", type=float, default=400.0)
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--bound", action="store_true", help="also compute the Cramer-Rao bound (slow)")
    ap.add_argument("--calibrate", action="store_true", help="time an unaided calibrate of a 1024x1024 frame")
    ap.add_argument("--skip-binary", action="store_true", help="leave out the binary method's timing")
    args = ap.parse_args()
    shape = (args.size, args.size)
    psf = _psf()
    print(f"{args.size}x{args.size} frames, Airy FWHM {FWHM} px, {args.photons:g} photons/atom, 1 photon/px "
          f"background, worst of {args.seeds} seeds")
    print("errors: worst over the seeds; bound: Cramer-Rao 1 sigma (free amplitudes, first seed); target: "
          "within 1.5x the bound (a worst of a few seeds is ~2 sigma)")
    print(f"{'sp/FWHM':>7} {'filling':>7} | {'spacing':>8} {'bound':>8} | {'angle mrad':>10} {'bound':>7} | "
          f"{'offset sp':>9} {'bound':>7} | {'far site':>8} | {'CPU s':>6}")
    for ratio in args.ratios:
        for filling in args.fillings:
            worst = np.zeros(4)
            cpu, bound, failed = 0.0, (float("nan"),) * 3, 0
            for seed in range(args.seeds):
                rng = np.random.default_rng(seed)
                geo = _geometry(ratio * FWHM, rng, shape)
                frames, truth = simulate_frames(geometry=geo, frame_shape=shape, psf=psf, filling=filling,
                                                photons_per_atom=args.photons, background=1.0, rng=seed, margin=0)
                t0 = time.process_time()
                try:
                    found = lattice_from_atoms(frames[0].astype(float), fwhm=FWHM)
                except LatticeNotFound:
                    failed += 1
                    continue
                finally:
                    cpu = max(cpu, time.process_time() - t0)
                worst = np.maximum(worst, _errors(found, geo, shape))
                if args.bound and seed == 0:
                    bound = _bound(geo, truth, psf, args.photons, shape)
            note = f"  ({failed} of {args.seeds} found no lattice)" if failed else ""
            if failed == args.seeds:
                print(f"{ratio:7.2f} {filling:7.2f} | {'-':>8} {bound[0]:8.1e} | {'-':>10} {1e3 * bound[1]:7.3f} | "
                      f"{'-':>9} {bound[2]:7.4f} | {'-':>8} | {cpu:6.2f}{note}", flush=True)
                continue
            print(f"{ratio:7.2f} {filling:7.2f} | {worst[0]:8.1e} {bound[0]:8.1e} | {1e3 * worst[1]:10.3f} "
                  f"{1e3 * bound[1]:7.3f} | {worst[2]:9.4f} {bound[2]:7.4f} | {worst[3]:8.3f} | {cpu:6.2f}{note}",
                  flush=True)
    # per-frame offset at 1024 x 1024
    big = (1024, 1024)
    rng = np.random.default_rng(0)
    geo = _geometry(0.8 * FWHM, rng, big)
    frames, _ = simulate_frames(geometry=geo, frame_shape=big, psf=psf, filling=0.1, photons_per_atom=args.photons,
                                background=1.0, rng=0, margin=0)
    frame = frames[0].astype(float)
    atoms = locate_atoms(frame, fwhm=FWHM)
    offset_from_atoms(frame, geo, fwhm=FWHM, atoms=atoms)
    t_loc, t_fit = _best(lambda: locate_atoms(frame, fwhm=FWHM)), _best(
        lambda: offset_from_atoms(frame, geo, fwhm=FWHM, atoms=atoms))
    t_holes = _best(lambda: locate_holes(frame, fwhm=FWHM))
    print(f"per-frame offset, 1024x1024, 0.8 FWHM, filling 0.1 ({int(atoms.single.sum())} single atoms): locating "
          f"{1000 * t_loc:.0f} ms + hole search {1000 * t_holes:.0f} ms + offset fit {1000 * t_fit:.1f} ms CPU; "
          f"load {_load()}")
    if not args.skip_binary:
        _binary_speed(args)
    if args.calibrate:
        from latticeread.core.pipeline import calibrate

        geo = _geometry(0.70 * FWHM, rng, big)
        cam = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)
        frames, _ = simulate_frames(geometry=geo, frame_shape=big, psf=psf, camera=cam, filling=0.3,
                                    photons_per_atom=400.0, background=1.0, rng=1, margin=0)
        t0 = time.perf_counter()
        c0 = time.process_time()
        try:
            cal = calibrate(frames, psf=psf, camera=cam)
        except LatticeReadError as exc:
            print(f"calibrate 1024x1024 at 0.70 FWHM, filling 0.3, sCMOS: FAILED after {time.perf_counter() - t0:.1f} s wall: "
                  f"{exc}; load {_load()}")
            return
        s, _, _, far = _errors(cal.geometry, geo, big)
        print(f"calibrate 1024x1024 at 0.70 FWHM, filling 0.3, sCMOS: {time.perf_counter() - t0:.1f} s wall, "
              f"{time.process_time() - c0:.1f} s CPU, geometry by {cal.notes.get('geometry_method')}, spacing error "
              f"{s:.1e}, far site {far:.3f} spacing; load {_load()}")


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def _best(fn, repeats: int = 3) -> float:
    """Smallest CPU seconds of ``repeats`` calls."""
    best = float("inf")
    for _ in range(repeats):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return best


def _binary_speed(args):
    """The binary method's amplitudes on a 1024x1024 frame at 0.70 FWHM, ~7,000 sites (84 x 84 region)."""
    from latticeread.core.calibration import Calibration, ReconstructionOptions
    from latticeread.core.pipeline import Reconstructor

    big = (1024, 1024)
    rng = np.random.default_rng(3)
    geo = _geometry(0.70 * FWHM, rng, big)
    psf = _psf()
    cam = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)
    frames, truth = simulate_frames(geometry=geo, frame_shape=big, psf=psf, camera=cam, filling=0.3,
                                    photons_per_atom=400.0, background=1.0, rng=3, n_shots=3,
                                    region=("rectangle", 84, 84))
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = (int(rows.min()) - 2, int(rows.max()) + 2, int(cols.min()) - 2, int(cols.max()) + 2)
    cal = Calibration(geometry=geo, psf=psf, camera=cam, frame_shape=big, threshold=200.0, amplitude_method="nonlinear",
                      options=ReconstructionOptions(index_bounds=bounds, photons_per_atom=400.0, refit_phase=False))
    rec = Reconstructor(cal, method="nonlinear", refit_phase=False)
    rec(frames[0])
    t = _best(lambda: [rec(f) for f in frames], repeats=2) / len(frames)
    right = np.mean([np.mean(rec(f).occupied[_match(rec.sites, truth.sites)] == truth.initial_occupation[k])
                     for k, f in enumerate(frames)])
    print(f"binary method, 1024x1024 at 0.70 FWHM, {len(rec.sites)} sites ({len(truth.sites)} in the loaded region), "
          f"400 photons, sCMOS: {1000 * t:.0f} ms CPU per frame (amplitudes + classification, offset fixed), "
          f"{100 * right:.2f} % of the loaded sites right; load {_load()}")


def _match(sites, region):
    """Index into ``sites`` of every site of ``region`` (same lattice indices)."""
    lookup = {(int(r), int(c)): i for i, (r, c) in enumerate(zip(sites.rows, sites.cols))}
    return np.array([lookup[(int(r), int(c))] for r, c in zip(region.rows, region.cols)])


if __name__ == "__main__":
    main()
