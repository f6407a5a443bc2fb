"""Benchmark of occupancy classification and PSF estimation (run by hand; prints numbers).

    .venv/bin/python bench/bench_classify.py [--quick]

1. Interactive re-classification: ``with_threshold`` + ``classify`` on 10,000 sites
   (target <= 5 ms).
2. Threshold choice on amplitudes drawn from the noise model (EMCCD gamma gain register or
   sCMOS Poisson + read noise, gamma-distributed atom brightness): error rate of the mixture
   (normal or skewed occupied peak) / Otsu / minimum thresholds against the error-minimising
   oracle threshold that knows the truth, and the fitted error rates against the counted ones.
3. The same comparison on site amplitudes of forward-model frames (demo square lattice,
   EMCCD, few photons so that errors are countable), extracted with the project's linear
   least-squares amplitudes at the true geometry and PSF.
4. PSF estimation on forward-model frames (Airy PSF, sparse filling) at several lattice
   spacing / FWHM ratios: FWHM error, atoms used, seconds.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from latticeread.core.camera import CameraModel
from latticeread.core.classify import classify, oracle_threshold, select_threshold
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf
from latticeread.core.psf_estimate import estimate_psf
from latticeread.core.simulate import simulate_frames

EMCCD = CameraModel(kind="emccd", em_gain=150.0, counts_per_electron=0.05, bias=200.0, read_noise=3.0,
                    quantum_efficiency=0.9, clock_induced_charge=0.005)
SCMOS = CameraModel(kind="scmos", em_gain=1.0, counts_per_electron=0.5, bias=100.0, read_noise=0.8,
                    quantum_efficiency=0.8)


def draw(n, *, camera, photons, empty_std, spread=0.1, filling=0.4, rng=0):
    """Site amplitudes (photons) from the camera noise model and the true occupation."""
    rng = np.random.default_rng(rng)
    truth = rng.random(n) < filling
    mean = photons * rng.gamma(1 / spread**2, spread**2, n)
    electrons = rng.poisson(mean * camera.quantum_efficiency)
    if camera.kind == "emccd":
        e = np.where(electrons > 0, rng.gamma(np.maximum(electrons, 1), camera.em_gain), 0.0) / camera.em_gain
    else:
        e = electrons.astype(float)
    a = rng.normal(0, empty_std, n) + np.where(truth, e / camera.quantum_efficiency, 0.0)
    return a, truth


def bench_reclassify(n=10_000, repeats=200):
    a, _ = draw(n, camera=EMCCD, photons=800.0, empty_std=40.0)
    res = select_threshold(a, camera=EMCCD)
    ts = np.linspace(res.threshold * 0.5, res.threshold * 1.5, repeats)
    t0 = time.perf_counter()
    for t in ts:
        classify(a, res.with_threshold(t))
    per = (time.perf_counter() - t0) / repeats * 1e3
    t0 = time.perf_counter()
    for _ in range(20):
        select_threshold(a, camera=EMCCD)
    fit = (time.perf_counter() - t0) / 20 * 1e3
    skewed = select_threshold(a, camera=EMCCD, peak_shape="skewed")
    t0 = time.perf_counter()
    for t in ts:
        classify(a, skewed.with_threshold(t))
    per_g = (time.perf_counter() - t0) / repeats * 1e3
    t0 = time.perf_counter()
    for _ in range(5):
        select_threshold(a, camera=EMCCD, peak_shape="skewed")
    fit_g = (time.perf_counter() - t0) / 5 * 1e3
    print(f"re-classify {n} sites after a threshold change: {per:.3f} ms normal peak, {per_g:.3f} ms skewed "
          f"peak (target <= 5 ms); full fit: {fit:.1f} ms normal, {fit_g:.0f} ms skewed")


def bench_thresholds(n=20_000):
    print("\nthreshold choice (error rate in %; oracle = error-minimising threshold given the truth)")
    print("mixture = normal peaks; skewed = peak_shape='skewed'; FP/FN: fitted / counted, %")
    print(f"{'scenario':<34}{'oracle':>8}{'mixture':>9}{'skewed':>8}{'otsu':>8}{'minimum':>9}"
          f"{'FN normal':>16}{'FN skewed':>16}{'FP normal':>16}{'FP skewed':>16}")
    for cam_name, camera in (("emccd", EMCCD), ("scmos", SCMOS)):
        for photons, empty_std, spread in ((2000.0, 60.0, 0.1), (800.0, 60.0, 0.1), (300.0, 60.0, 0.1),
                                           (300.0, 60.0, 0.3)):
            a, truth = draw(n, camera=camera, photons=photons, empty_std=empty_std, spread=spread,
                            rng=int(photons))
            err = lambda t: 100 * np.mean((a > t) != truth)  # noqa: E731
            row = [err(oracle_threshold(a, truth))]
            fits = {}
            for key, m, shape in (("mixture", "mixture", "normal"), ("skewed", "mixture", "skewed"),
                                  ("otsu", "otsu", "normal"), ("minimum", "minimum", "normal")):
                fits[key] = select_threshold(a, method=m, camera=camera, peak_shape=shape)
                row.append(err(fits[key].threshold))
            cells = []
            for key in ("mixture", "skewed"):
                occ, _ = classify(a, fits[key])
                fn = 100 * (1 - occ[truth].mean())
                cells.append(f"{100 * fits[key].false_negative_rate:7.3f}/{fn:<7.3f} ")
            for key in ("mixture", "skewed"):
                occ, _ = classify(a, fits[key])
                cells.append(f"{100 * fits[key].false_positive_rate:7.3f}/{100 * occ[~truth].mean():<7.3f} ")
            name = f"{cam_name} {photons:.0f} ph, sd {empty_std:.0f}, spread {spread:.0%}"
            print(f"{name:<34}" + "".join(f"{v:8.3f} " for v in row) + " " + "".join(cells))


def bench_frames():
    from latticeread.core.amplitudes import SiteBasis
    from latticeread.core.simulate import demo_scenario

    print("\nerror rates on amplitudes of simulated frames (demo square lattice 96x96, EMCCD, 30 shots, "
          "brightness spread 15 %, background 1 photon/pixel); fitted / counted, %")
    print(f"{'photons/atom':>12} {'peaks':>7} {'threshold':>10} {'FP':>18} {'FN':>18} {'errors':>8} {'oracle':>8}")
    kw = demo_scenario("square", frame_shape=(96, 96))
    kw.pop("pixel_size_nm")
    kw.update(background=1.0, filling=0.4, loss_probability=0.0, hop_probability=0.0)
    for photons in (50.0, 70.0, 90.0):
        kw["photons_per_atom"] = photons
        frames, truth = simulate_frames(**kw, n_shots=30, rng=5)
        ph = kw["camera"].counts_to_photons(frames)
        basis = SiteBasis(truth.geometries[0], frame_shape=ph[0].shape, psf=kw["psf"], sites=truth.sites)
        amps = np.concatenate([basis.linear(ph[k], offset=truth.geometries[k].offset).amplitudes
                               for k in range(len(ph))])
        occ_true = truth.final_occupation.ravel().astype(bool)
        best = 100 * np.mean((amps > oracle_threshold(amps, occ_true)) != occ_true)
        for shape in ("normal", "skewed"):
            res = select_threshold(amps, camera=kw["camera"], peak_shape=shape)
            occ, _ = classify(amps, res)
            fp, fn = 100 * occ[~occ_true].mean(), 100 * (1 - occ[occ_true].mean())
            print(f"{photons:12.0f} {shape:>7} {res.threshold:10.2f} {100 * res.false_positive_rate:8.3f}/{fp:<8.3f} "
                  f"{100 * res.false_negative_rate:8.3f}/{fn:<8.3f} {100 * np.mean(occ != occ_true):8.3f} {best:8.3f}")


def bench_psf(quick=False):
    print("\nPSF estimate on forward-model frames (potassium-39 at 767 nm, NA 0.75, EMCCD, 1500 photons/atom)")
    print(f"{'spacing/FWHM':>13}{'pixel nm':>10}{'FWHM true':>11}{'FWHM est':>10}{'error %':>9}"
          f"{'ellipt.':>9}{'atoms':>7}{'s':>7}")
    for ratio in ((1.0,) if quick else (1.3, 1.0, 0.8, 0.65)):
        # fix the FWHM at 3 pixels and change the lattice spacing
        pixel_nm = 0.514 * 767.0 / 0.75 / 3.0
        psf = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=pixel_nm)
        spacing = ratio * psf.fwhm
        a = np.deg2rad(8.0)
        geo = LatticeGeometry((spacing * np.cos(a), spacing * np.sin(a)), (-spacing * np.sin(a), spacing * np.cos(a)),
                              offset=(64.3, 63.7))
        frames, _ = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=psf, camera=EMCCD,
                                    region=("disk", 55 / spacing), filling=0.04 * ratio**2,
                                    photons_per_atom=1500.0, brightness_spread=0.1, background=0.5,
                                    n_shots=20, phase_jitter=0.4, rng=1)
        t0 = time.perf_counter()
        try:
            est = estimate_psf(EMCCD.counts_to_photons(frames), geo)
        except Exception as exc:  # report, do not hide
            print(f"{ratio:13.2f}  failed: {exc}")
            continue
        dt = time.perf_counter() - t0
        print(f"{ratio:13.2f}{pixel_nm:10.1f}{psf.fwhm:11.3f}{est.fwhm:10.3f}{100 * (est.fwhm / psf.fwhm - 1):9.2f}"
              f"{est.params['ellipticity']:9.3f}{est.params['n_atoms']:7d}{dt:7.2f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one PSF scenario only")
    args = parser.parse_args()
    bench_reclassify()
    bench_thresholds()
    bench_frames()
    bench_psf(quick=args.quick)


if __name__ == "__main__":
    main()
