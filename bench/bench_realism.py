"""Frames as a real microscope makes them: fidelity and speed for each imperfection.

For each feature of the forward model on its own (and all together) the bench prints the
fidelity (share of sites classified right, scored against the simulation's truth) of

* ``ignored``: the program with its handling of these features switched off (artefact search,
  lens-distortion field, brightness map, zone PSFs, background surface; for drift, which is
  always handled, the same as ``handled``),
* ``handled``: the program with ``calibrate(..., psf_zones=3, background="auto")`` (the
  options a user gives for such frames: ``--psf-zones 3 --background auto``), geometry and
  PSF estimated from the frames,
* ``true model``: an oracle given the true site positions of every frame, the true PSF of
  every site, its brightness, the background map and the artefact pixels: per-site least
  squares with the threshold chosen on the truth (so slightly optimistic),

and the reconstruction's milliseconds per frame. A second part throws 1,000 cosmic-ray hits
at atoms and counts how many made an empty site look occupied.

Run by hand (numbers vary with the machine's load)::

    python bench/bench_realism.py                 # every feature, 256x256 frames
    python bench/bench_realism.py --features artefacts drift --frames 4
    python bench/bench_realism.py --hits 1000     # the cosmic-ray part only
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.sparse
import scipy.sparse.linalg

from latticeread.core.artefacts import ArtefactFinder
from latticeread.core.camera import CameraModel
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.pipeline import Reconstructor, calibrate
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

FWHM = 4.5
SPACING = 1.1 * FWHM
LAMBDA_NA = FWHM / 0.5145
PSF = airy_psf(wavelength_nm=LAMBDA_NA, numerical_aperture=1.0, pixel_size_nm=1.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)

FEATURES = {
    "none": {},
    "artefacts": dict(hot_pixels=20, cosmic_rays=5.0),
    "illumination": dict(illumination_waist=1.3),  # 1/e^2 radius in units of the cloud radius
    "background": dict(background_structure=4.0),
    "distortion": dict(distortion=0.15),  # sites off a perfect lattice by this many spacings at the corners
    "field_psf": dict(psf_field=0.3),  # waves rms at the frame corner (defocus, astigmatism, coma)
    "drift": dict(phase_jitter=0.5, phase_drift=(0.12, 0.08)),
}


def scenario(size: int, features: dict) -> dict:
    c, s = np.cos(0.3), np.sin(0.3)
    geometry = LatticeGeometry((SPACING * c, SPACING * s), (-SPACING * s, SPACING * c),
                               offset=(size / 2 + 0.3, size / 2 - 0.4))
    radius_sites = 0.4 * size / SPACING
    kw = dict(geometry=geometry, frame_shape=(size, size), psf=PSF, camera=CAMERA, region=("disk", radius_sites),
              filling=0.45, photons_per_atom=700.0, background=1.5)
    for key, value in features.items():
        if key == "illumination_waist":
            kw[key] = value * radius_sites * SPACING
        elif key == "distortion":
            corner = np.hypot(size / 2, size / 2)
            kw["distortion_k1"] = -value * SPACING / corner**3
        elif key == "psf_field":
            kw["psf_field"] = value
        else:
            kw[key] = value
    return kw


def score(results, truth) -> float:
    """Mean over frames of the share of truth sites (with a ring of empty ones) classified right."""
    from scipy.spatial import cKDTree

    fids = []
    for k, res in enumerate(results):
        tx, ty = truth.positions(k)
        occ = truth.initial_occupation[k]
        dist, idx = cKDTree(np.c_[res.sites.x, res.sites.y]).query(np.c_[tx, ty], distance_upper_bound=0.25 * SPACING)
        ok = np.isfinite(dist)
        right = np.zeros(len(tx), bool)
        right[ok] = res.occupied[idx[ok]] == occ[ok]
        fids.append(right.mean())
    return float(np.mean(fids))


def oracle(frames, truth) -> float:
    """Per-site least squares with the true model; the best threshold on the truth."""
    fids = []
    for k, frame in enumerate(frames):
        photons = CAMERA.counts_to_photons(frame) - truth.background_map(k)
        bad = truth.artefact_mask(k)
        x, y = truth.positions(k)
        psfs = truth.site_psfs()
        h, w = frame.shape
        rows, cols, vals = [], [], []
        for i in range(len(x)):
            psf = psfs[i]
            r = psf.radius
            xi, yi = int(np.rint(x[i])), int(np.rint(y[i]))
            stamp = psf.stamps([x[i] - xi], [y[i] - yi])[0]
            yy, xx = np.mgrid[yi - r:yi + r + 1, xi - r:xi + r + 1]
            keep = (yy >= 0) & (yy < h) & (xx >= 0) & (xx < w)
            pix = (yy * w + xx)[keep]
            good = ~bad.ravel()[pix]
            rows.append(pix[good])
            cols.append(np.full(good.sum(), i))
            vals.append(stamp[keep][good])
        design = scipy.sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                                         shape=(h * w, len(x)))
        normal = (design.T @ design).tocsc() + 1e-9 * scipy.sparse.eye(len(x))
        amp = scipy.sparse.linalg.spsolve(normal, design.T @ np.where(bad, 0.0, photons).ravel())
        amp = amp / np.maximum(truth.site_brightness(k), 1e-3)
        occ = truth.initial_occupation[k]
        candidates = np.sort(amp)
        best = 0.0
        for t in np.linspace(0.2, 0.8, 61) * truth.photons_per_atom:
            best = max(best, float(np.mean((amp > t) == (occ == 1))))
        fids.append(best)
    return float(np.mean(fids))


def run_program(frames, *, handled: bool):
    t0 = time.perf_counter()
    cal = calibrate(frames, camera=CAMERA, correct_distortion=handled, correct_brightness=handled,
                    psf_zones=3 if handled else None, background="auto" if handled else "constant")
    if not handled:
        cal = cal.with_options(hot_pixels=())
    rec = Reconstructor(cal)
    if not handled:
        rec.artefacts = ArtefactFinder(cal, cal.frame_shape, crop=rec.basis.crop, enabled=False)
    t1 = time.perf_counter()
    results = [rec(f, frame_index=i) for i, f in enumerate(frames)]
    t2 = time.perf_counter()
    return results, t1 - t0, 1000 * (t2 - t1) / len(frames)


def bench_features(names, *, size: int, n_frames: int, seed: int):
    print(f"{'feature':<13} {'ignored':>8} {'handled':>8} {'true model':>10} {'gap pp':>7} {'ms/frame':>9} "
          f"{'calib s':>8}")
    for name in names:
        feats = {} if name != "all" else {k: v for f in FEATURES.values() for k, v in f.items()}
        if name != "all":
            feats = FEATURES[name]
        kw = scenario(size, feats)
        frames, truth = simulate_frames(**kw, n_shots=n_frames, rng=seed)
        try:
            handled, t_cal, ms = run_program(frames, handled=True)
            fid_h = score(handled, truth)
        except Exception as exc:  # a failure is a result of the bench, not a reason to stop it
            print(f"{name:<13} program failed: {type(exc).__name__}: {exc}")
            continue
        if name != "drift":
            ignored, _, _ = run_program(frames, handled=False)
            fid_i = score(ignored, truth)
        else:
            fid_i = fid_h
        fid_o = oracle(frames, truth)
        print(f"{name:<13} {fid_i:8.4f} {fid_h:8.4f} {fid_o:10.4f} {100 * (fid_o - fid_h):7.2f} {ms:9.1f} "
              f"{t_cal:8.1f}", flush=True)


def bench_hits(n_hits: int, *, size: int, seed: int):
    """Cosmic-ray hits on a lattice of atoms: how many empty sites were called occupied because of one."""
    per_frame = 10.0
    n_frames = int(np.ceil(n_hits / per_frame))
    kw = scenario(size, dict(cosmic_rays=per_frame))
    frames, truth = simulate_frames(**kw, n_shots=n_frames, rng=seed)
    clean_kw = scenario(size, {})
    cal_frames, _ = simulate_frames(**clean_kw, n_shots=4, rng=seed + 1)
    cal = calibrate(cal_frames, camera=CAMERA)
    rec = Reconstructor(cal)
    a = truth.artefacts
    hits = false_atoms = false_elsewhere = missed_under = atoms_under = 0
    from scipy.spatial import cKDTree

    for k, frame in enumerate(frames):
        res = rec(frame, frame_index=k)
        tx, ty = truth.positions(k)
        occ = truth.initial_occupation[k]
        dist, idx = cKDTree(np.c_[res.sites.x, res.sites.y]).query(np.c_[tx, ty], distance_upper_bound=0.25 * SPACING)
        sel = a["cosmic_frame"] == k
        hits += len(np.unique(a["cosmic_hit"][sel]))
        hy, hx = np.divmod(a["cosmic_index"][sel], size)
        near = np.zeros(len(tx), bool)
        if hx.size:
            d_hit, _ = cKDTree(np.c_[hx, hy]).query(np.c_[tx, ty])
            near = d_hit < SPACING
        ok = np.isfinite(dist)
        called = np.zeros(len(tx), bool)
        called[ok] = res.occupied[idx[ok]] == 1
        false_atoms += int(np.sum(called & (occ == 0) & near))
        atoms_under += int(np.sum((occ == 1) & near & ok))
        missed_under += int(np.sum(~called & (occ == 1) & near & ok))
        false_elsewhere += int(np.sum(called & (occ == 0) & ~near))
    print(f"{hits} cosmic-ray hits in {n_frames} frames of {size}x{size}: {false_atoms} empty sites within one "
          f"spacing of a hit called occupied (target 0); {false_elsewhere} false atoms elsewhere (noise); "
          f"{missed_under} of {atoms_under} atoms within one spacing of a hit called empty")


def bench_speed(size: int, *, seed: int):
    kw = scenario(size, dict(hot_pixels=20, cosmic_rays=2.0))
    frames, truth = simulate_frames(**kw, n_shots=3, rng=seed)
    cal = calibrate(frames, camera=CAMERA, psf=PSF, geometry=truth.geometry)
    for label, enabled in (("without the artefact search", False), ("with the artefact search", True)):
        rec = Reconstructor(cal)
        rec.artefacts = ArtefactFinder(cal, cal.frame_shape, crop=rec.basis.crop, enabled=enabled)
        rec(frames[0])
        t = time.perf_counter()
        for _ in range(2):
            for f in frames:
                rec(f)
        print(f"{size}x{size} linear fit {label}: {1000 * (time.perf_counter() - t) / (2 * len(frames)):.1f} ms "
              "per frame")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--features", nargs="*", default=[*FEATURES, "all"])
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--frames", type=int, default=6)
    ap.add_argument("--hits", type=int, default=0, help="only the cosmic-ray part, with this many hits")
    ap.add_argument("--speed", type=int, default=0, help="only the speed part, on frames of this size")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    if args.hits:
        bench_hits(args.hits, size=args.size, seed=args.seed)
        return
    if args.speed:
        bench_speed(args.speed, seed=args.seed)
        return
    bench_features(args.features, size=args.size, n_frames=args.frames, seed=args.seed)


if __name__ == "__main__":
    main()
