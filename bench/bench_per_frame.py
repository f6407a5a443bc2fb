"""Per-frame cost of a 1024x1024 frame once calibrated: offset, binary method, the whole frame path (run by hand).

Three parts, each on forward-model frames (invented setting: Airy PSF of FWHM 4 px, sCMOS camera,
1 photon/px background) with the truth known, timed one call at a time (best of ``--repeats``),
wall and CPU (``time.process_time``) seconds, with the machine's load average beside every
line (other processes on the 2 cores lengthen the wall times; the CPU time is the figure to
compare):

1. **Per-frame offset** (vectors fixed): at 0.8 FWHM, filling 0.1 in a disk, 600 photons, offsets
   within a quarter spacing of the reference: the offset from single atoms (the pipeline's
   ``"atoms"`` route, locating included), the image-model fit with linear amplitudes on the
   central phase block (``"model"``) and the real-space fit of the occupied sites on every
   fitted site (:meth:`SiteBasis.fit_offset_sites`), with the error against the truth in
   spacings and the reported 1-sigma.
2. **Binary method**: 0.70 FWHM, 400 photons, filling 0.3 in an 84 x 84 block (~7,000 sites
   with the margin), true geometry and offset: ms per frame of ``SiteBasis.nonlinear`` and
   the share of the loaded sites classified right.
3. **Frame path**: ``Reconstructor.extract_full`` on a 1024x1024 frame at 1.1 FWHM with the
   linear fit (~6,000 sites, offset re-fitted, artefact search and frame check on), and a
   cProfile summary of where the time goes with ``--profile``.

Usage::

    nice .venv/bin/python bench/bench_per_frame.py
    nice .venv/bin/python bench/bench_per_frame.py --only binary --profile
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import cProfile  # noqa: E402
import pstats  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from latticeread.core.calibration import Calibration, ReconstructionOptions  # noqa: E402
from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.geometry import LatticeGeometry  # noqa: E402
from latticeread.core.pipeline import Reconstructor  # noqa: E402
from latticeread.core.psf import airy_psf  # noqa: E402
from latticeread.core.simulate import simulate_frames  # noqa: E402

FWHM = 4.0
BIG = (1024, 1024)
PSF = airy_psf(wavelength_nm=700.0, numerical_aperture=0.7, pixel_size_nm=0.5145 * 1000.0 / FWHM)
CAM = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def _load() -> str:
    return "load " + "/".join(f"{v:.1f}" for v in os.getloadavg())


def _timed(fn, repeats: int):
    """(result, best wall s, best CPU s) of ``repeats`` calls."""
    wall, cpu, out = np.inf, np.inf, None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        wall, cpu = min(wall, time.perf_counter() - t0), min(cpu, time.process_time() - c0)
    return out, wall, cpu


def _geometry(spacing, rng, *, angle=None):
    angle = rng.uniform(0, np.pi / 2) if angle is None else angle
    rot = lambda a: (spacing * np.cos(a), spacing * np.sin(a))  # noqa: E731
    return LatticeGeometry(a1=rot(angle + np.pi / 2), a2=rot(angle),
                           offset=(BIG[1] / 2 + rng.uniform(-1, 1), BIG[0] / 2 + rng.uniform(-1, 1)))


def _profile(fn, top: int = 18):
    prof = cProfile.Profile()
    prof.enable()
    fn()
    prof.disable()
    stats = pstats.Stats(prof)
    stats.sort_stats("cumulative").print_stats(top)
    stats.sort_stats("tottime").print_stats(top)


def _offset_error(found, truth_offset, geometry) -> float:
    d = np.asarray(found, float) - np.asarray(truth_offset, float)
    frac = np.linalg.inv(geometry.basis) @ d
    d = geometry.basis @ (frac - np.rint(frac))
    return float(np.hypot(*d) / min(geometry.spacings))


def offset_part(args):
    rng = np.random.default_rng(0)
    geo = _geometry(0.8 * FWHM, rng)
    frames, truth = simulate_frames(geometry=geo, frame_shape=BIG, psf=PSF, camera=CAM, filling=0.1,
                                    photons_per_atom=600.0, background=1.0, rng=0, n_shots=args.shots,
                                    phase_jitter=0.25 * min(geo.spacings), region=("disk", 60.0))
    photons = [CAM.counts_to_photons(f) for f in frames]
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = (int(rows.min()) - 4, int(rows.max()) + 4, int(cols.min()) - 4, int(cols.max()) + 4)
    print(f"1. per-frame offset, 1024x1024, 0.8 FWHM, filling 0.1 in a disk of 120 sites across, 600 photons, "
          f"sCMOS, {args.shots} frames, offsets within 0.25 spacing of the reference")
    for method in ("atoms", "model", "sites"):
        cal = Calibration(geometry=geo, psf=PSF, camera=CAM, frame_shape=BIG, threshold=300.0,
                          amplitude_method="linear",
                          options=ReconstructionOptions(photons_per_atom=600.0, refit_phase=True, index_bounds=bounds,
                                                        phase_method="atoms" if method == "atoms" else "model"))
        rec = Reconstructor(cal)
        errs, walls, cpus, sig = [], [], [], []
        for k, p in enumerate(photons):
            if method == "sites":  # the real-space fit of the occupied sites on every fitted site
                fit, wall, cpu = _timed(lambda: rec.basis.fit_offset_sites(p, atom_photons=600.0, search=True),
                                        args.repeats)
                offset, sigma = fit.offset, fit.sigma
            else:
                (g, _, _), wall, cpu = _timed(lambda: rec._frame_geometry(p), args.repeats)
                offset, sigma = g.offset, rec._offset_info[1]
            errs.append(_offset_error(offset, truth.geometries[k].offset, geo))
            sig.append(max(sigma) / min(geo.spacings))
            walls.append(wall)
            cpus.append(cpu)
        sites = len(rec.basis.sites) if method == "sites" else len(rec.phase_basis.sites)
        print(f"   {method:6s} ({sites:5d} sites) {1e3 * np.median(walls):8.1f} ms wall {1e3 * np.median(cpus):8.1f} ms "
              f"CPU, error RMS {np.sqrt(np.mean(np.square(errs))):.4f} max {max(errs):.4f} spacing, reported 1-sigma "
              f"{np.median(sig):.4f}; {_load()}")
        if args.profile and method == "sites":
            _profile(lambda: [rec.basis.fit_offset_sites(p, atom_photons=600.0, search=True) for p in photons])


def binary_part(args):
    rng = np.random.default_rng(3)
    geo = _geometry(0.70 * FWHM, rng)
    frames, truth = simulate_frames(geometry=geo, frame_shape=BIG, psf=PSF, camera=CAM, filling=0.3,
                                    photons_per_atom=400.0, background=1.0, rng=3, n_shots=args.shots,
                                    region=("rectangle", 84, 84))
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = (int(rows.min()) - 2, int(rows.max()) + 2, int(cols.min()) - 2, int(cols.max()) + 2)
    cal = Calibration(geometry=geo, psf=PSF, camera=CAM, frame_shape=BIG, threshold=200.0,
                      amplitude_method="nonlinear",
                      options=ReconstructionOptions(index_bounds=bounds, photons_per_atom=400.0, refit_phase=False))
    rec = Reconstructor(cal, method="nonlinear", refit_phase=False)
    photons = [CAM.counts_to_photons(f) for f in frames]
    lookup = {(int(r), int(c)): i for i, (r, c) in enumerate(zip(rec.sites.rows, rec.sites.cols))}
    idx = np.array([lookup[(int(r), int(c))] for r, c in zip(truth.sites.rows, truth.sites.cols)])
    walls, cpus, right = [], [], []
    for k, p in enumerate(photons):
        amp, wall, cpu = _timed(lambda: rec.basis.nonlinear(p, atom_photons=400.0), args.repeats)
        walls.append(wall)
        cpus.append(cpu)
        right.append(np.mean((amp.amplitudes[idx] > 200.0) == truth.initial_occupation[k].astype(bool)))
    _, lw, lc = _timed(lambda: rec.basis.linear(photons[0]), args.repeats)
    print(f"2. binary method, 1024x1024, 0.70 FWHM, {len(rec.basis.sites)} sites ({len(truth.sites)} loaded), "
          f"400 photons: {1e3 * np.median(walls):.1f} ms wall {1e3 * np.median(cpus):.1f} ms CPU per frame "
          f"(linear alone {1e3 * lw:.1f} / {1e3 * lc:.1f}), {100 * np.mean(right):.3f} % of loaded sites right; "
          f"{_load()}")
    if args.profile:
        _profile(lambda: [rec.basis.nonlinear(p, atom_photons=400.0) for p in photons])


def frame_part(args):
    rng = np.random.default_rng(5)
    geo = _geometry(1.1 * FWHM, rng, angle=0.3)
    frames, truth = simulate_frames(geometry=geo, frame_shape=BIG, psf=PSF, camera=CAM, filling=0.45,
                                    photons_per_atom=700.0, background=1.0, rng=5, n_shots=args.shots,
                                    region=("disk", 42.0), phase_jitter=0.5)
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = (int(rows.min()) - 3, int(rows.max()) + 3, int(cols.min()) - 3, int(cols.max()) + 3)
    cal = Calibration(geometry=geo, psf=PSF, camera=CAM, frame_shape=BIG, threshold=350.0,
                      amplitude_method="linear",
                      options=ReconstructionOptions(index_bounds=bounds, photons_per_atom=700.0, refit_phase=True,
                                                    phase_method="model"))
    rec = Reconstructor(cal)
    rec.extract_full(frames[0])
    walls, cpus, errs = [], [], []
    for k, f in enumerate(frames):
        (g, _, _), wall, cpu = _timed(lambda: rec.extract_full(f), args.repeats)
        walls.append(wall)
        cpus.append(cpu)
        errs.append(_offset_error(g.offset, truth.geometries[k].offset, geo))
    print(f"3. extract_full, 1024x1024, 1.1 FWHM, linear, {len(rec.basis.sites)} sites, offset by model fit: "
          f"{1e3 * np.median(walls):.1f} ms wall {1e3 * np.median(cpus):.1f} ms CPU per frame, offset error max "
          f"{max(errs):.4f} spacing; {_load()}")
    if args.profile:
        _profile(lambda: [rec.extract_full(f) for f in frames], top=30)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=("offset", "binary", "frame"), nargs="+")
    ap.add_argument("--shots", type=int, default=4)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--profile", action="store_true")
    args = ap.parse_args()
    parts = args.only or ("offset", "binary", "frame")
    for name in parts:
        {"offset": offset_part, "binary": binary_part, "frame": frame_part}[name](args)


if __name__ == "__main__":
    main()
