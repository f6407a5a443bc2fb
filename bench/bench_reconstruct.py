"""Benchmark of the reconstruction: fidelity against the truth, and speed. Run by hand:

    .venv/bin/python bench/bench_reconstruct.py            # fidelity table + speed
    .venv/bin/python bench/bench_reconstruct.py --quick    # fewer scenarios and shots

Fidelity table (forward-model frames, invented setting: potassium-39 at 767 nm, NA 0.75,
180 nm pixels -> Airy FWHM 2.92 px; the lattice spacing is set as a multiple of the FWHM):

* ours     -- the full pipeline: ``calibrate`` (geometry estimated from the frames when the
              lattice's Fourier peaks are visible, else the true vectors with a wrong offset;
              PSF = Airy from the optics; threshold from the pooled histogram), then
              ``reconstruct_stack`` (phase re-fitted per frame);
* oracle   -- true per-frame geometry and true PSF, linear least squares, and the
              error-minimising threshold (``classify.oracle_threshold``);
* baseline -- scikit-image ``restoration.richardson_lucy`` (30 iterations) on the photon image,
              summed over each site's cell at the true geometry, threshold
              ``skimage.filters.threshold_otsu``.

Fidelity = fraction of region sites classified correctly. FP = empty sites called occupied /
empty sites; FN = atoms called empty / atoms (ours). ms/frame = ours, per frame once calibrated.

Speed: amplitudes + classification of a 1024x1024 frame with ~6,000 sites on one core (BLAS
limited to one thread), with and without the per-frame phase fit; the reconstruct command on a
100-frame stack (frames/s); peak memory for 20 and 100 frames.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # "one core": set before numpy loads BLAS
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
from skimage import filters, restoration  # noqa: E402

from latticeread.core.amplitudes import SiteBasis, cell_integrate, cell_labels  # noqa: E402
from latticeread.core.camera import CameraModel  # noqa: E402
from latticeread.core.classify import oracle_threshold  # noqa: E402
from latticeread.core.geometry import LatticeGeometry, SiteGrid  # noqa: E402
from latticeread.core.pipeline import Reconstructor, calibrate, reconstruct_stack  # noqa: E402
from latticeread.core.psf import airy_psf  # noqa: E402
from latticeread.core.simulate import simulate_frames  # noqa: E402
from latticeread.errors import LatticeReadError  # noqa: E402

PSF = airy_psf(wavelength_nm=767.0, numerical_aperture=0.75, pixel_size_nm=180.0)
CAMERAS = {
    "emccd": CameraModel(kind="emccd", em_gain=200.0, counts_per_electron=0.05, bias=100.0, read_noise=6.0,
                         quantum_efficiency=0.9, clock_induced_charge=0.005),
    "scmos": CameraModel(kind="scmos", em_gain=1.0, counts_per_electron=2.0, bias=100.0, read_noise=3.0,
                         quantum_efficiency=0.8),
}


def lattice(ratio, *, angle=0.0, skew=0.0, offset=(64.3, 63.6)):
    """Square (skew 0) or oblique lattice; spacing = ratio x PSF FWHM; angle in radians."""
    s = ratio * PSF.fwhm
    a1 = (s * np.cos(angle), s * np.sin(angle))
    b = angle + np.pi / 2 + skew
    a2 = (s * np.cos(b), s * np.sin(b))
    return LatticeGeometry(a1=a1, a2=a2, offset=offset)


def scenarios(quick: bool):
    out = []
    for ratio in (1.3, 1.0, 0.8, 0.65):
        for photons in (2000.0, 800.0, 300.0):
            for cam in ("emccd", "scmos"):
                if quick and (cam == "scmos" and photons != 800.0):
                    continue
                out.append(dict(name=f"{ratio:.2f} {int(photons):4d} {cam}", ratio=ratio, photons=photons, cam=cam,
                                angle=0.0, skew=0.0))
    out.append(dict(name="1.00  800 emccd rot30", ratio=1.0, photons=800.0, cam="emccd", angle=np.radians(30), skew=0.0))
    out.append(dict(name="0.80  800 emccd rot30", ratio=0.8, photons=800.0, cam="emccd", angle=np.radians(30), skew=0.0))
    out.append(dict(name="1.00  800 emccd oblique", ratio=1.0, photons=800.0, cam="emccd", angle=np.radians(10),
                    skew=np.radians(-20)))
    return out


def _match(sites: SiteGrid, truth) -> np.ndarray:
    lut = {(r, c): i for i, (r, c) in enumerate(zip(sites.rows, sites.cols))}
    return np.array([lut.get((r, c), -1) for r, c in zip(truth.sites.rows, truth.sites.cols)])


def _match_by_position(x, y, truth, frame) -> np.ndarray:
    g = truth.geometries[frame]
    tx, ty = g.site_positions(truth.sites.rows, truth.sites.cols)
    d = np.hypot(x[:, None] - tx[None], y[:, None] - ty[None])
    idx = np.argmin(d, axis=0)
    idx[d[idx, np.arange(tx.size)] > 0.5 * min(g.spacings)] = -1
    return idx


def run_scenario(sc, *, n_shots: int, rng: int):
    cam = CAMERAS[sc["cam"]]
    geo = lattice(sc["ratio"], angle=sc["angle"], skew=sc["skew"])
    radius = 11.0 / max(sc["ratio"], 0.8) * 0.9
    frames, truth = simulate_frames(geometry=geo, frame_shape=(128, 128), psf=PSF, camera=cam,
                                    region=("disk", radius), filling=0.45, photons_per_atom=sc["photons"],
                                    background=1.0, n_shots=n_shots, phase_jitter=0.5, rng=rng)
    occ = truth.initial_occupation.astype(bool)

    # ours: geometry estimated when possible
    given = ""
    try:
        cal = calibrate(frames, psf=PSF, camera=cam)
        if not np.allclose(sorted(cal.geometry.spacings), sorted(geo.spacings), rtol=0.02):
            raise LatticeReadError("wrong lattice")
    except LatticeReadError:
        given = "*"
        wrong = geo.with_offset((geo.offset[0] + 0.37, geo.offset[1] - 0.29))
        cal = calibrate(frames, psf=PSF, camera=cam, geometry=wrong)
    t0 = time.perf_counter()
    results = list(reconstruct_stack(frames, cal))
    ms = 1e3 * (time.perf_counter() - t0) / len(frames)
    calls = []
    for f, res in enumerate(results):
        idx = _match_by_position(res.sites.x, res.sites.y, truth, f)
        got = np.where(idx >= 0, res.occupied[np.clip(idx, 0, None)], 0).astype(bool)
        calls.append(got)
    calls = np.array(calls)
    ours = np.mean(calls == occ)
    fp = np.sum(calls & ~occ) / max(np.sum(~occ), 1)
    fn = np.sum(~calls & occ) / max(np.sum(occ), 1)

    # oracle: true geometry and PSF, linear least squares, best threshold
    basis = SiteBasis(geo, frame_shape=(128, 128), psf=PSF, sites=truth.sites)
    amps = np.array([basis.linear(cam.counts_to_photons(f), offset=g.offset).amplitudes
                     for f, g in zip(frames, truth.geometries)])
    t = oracle_threshold(amps.ravel(), occ.ravel())
    oracle = np.mean((amps > t) == occ)

    # baseline: scikit-image Richardson-Lucy + cell sums + Otsu
    psf_img = PSF.image()
    cells = []
    for f, g in zip(frames, truth.geometries):
        photons = np.clip(cam.counts_to_photons(f) - 1.0, 0, None)
        deconv = restoration.richardson_lucy(photons, psf_img, num_iter=30, clip=False)
        tx, ty = g.site_positions(truth.sites.rows, truth.sites.cols)
        grid = SiteGrid(truth.sites.rows, truth.sites.cols, tx, ty, truth.sites.row_min, truth.sites.col_min,
                        truth.sites.n_rows, truth.sites.n_cols)
        labels = cell_labels(g, grid, (128, 128))
        cells.append(cell_integrate(deconv, labels=labels, n_sites=len(grid)))
    cells = np.array(cells)
    baseline = np.mean((cells > filters.threshold_otsu(cells.ravel())) == occ)
    return dict(ours=ours, oracle=oracle, baseline=baseline, fp=fp, fn=fn, ms=ms, given=given,
                method=cal.amplitude_method, n=int(occ.size))


def fidelity_table(quick: bool):
    rows = scenarios(quick)
    n_shots = 4 if quick else 8
    print(f"{'scenario (spacing/FWHM, photons, camera)':42s} {'ours':>8s} {'oracle':>8s} {'baseline':>8s} "
          f"{'ours-orc':>8s} {'FP':>7s} {'FN':>7s} {'ms/fr':>7s} {'method':>10s} {'sites':>6s}")
    for i, sc in enumerate(rows):
        r = run_scenario(sc, n_shots=n_shots, rng=100 + i)
        print(f"{sc['name'] + r['given']:42s} {100 * r['ours']:7.3f}% {100 * r['oracle']:7.3f}% "
              f"{100 * r['baseline']:7.3f}% {100 * (r['ours'] - r['oracle']):+7.3f} {100 * r['fp']:6.3f}% "
              f"{100 * r['fn']:6.3f}% {r['ms']:7.1f} {r['method']:>10s} {r['n']:6d}", flush=True)
    print("* lattice vectors given (Fourier peaks beyond the optical cut-off); the offset still re-fitted")


def speed_1024(n_frames: int = 10):
    """Amplitudes + classification per 1024x1024 frame with ~6,000 sites, one core."""
    cam = CAMERAS["emccd"]
    geo = lattice(1.0, angle=0.1, offset=(512.3, 511.6))
    frames, truth = simulate_frames(geometry=geo, frame_shape=(1024, 1024), psf=PSF, camera=cam,
                                    region=("rectangle", 78, 78), filling=0.45, photons_per_atom=1000.0,
                                    background=1.0, n_shots=n_frames, phase_jitter=0.5, rng=5)
    t0 = time.perf_counter()
    cal = calibrate(frames[:4], psf=PSF, camera=cam, geometry=geo)
    t_cal = time.perf_counter() - t0
    rec = Reconstructor(cal)
    n_sites = len(rec.sites)
    for refit in (False, True):
        rec.refit_phase = refit
        rec(frames[0])
        wall, cpu, errors = 0.0, 0.0, 0
        for f, frame in enumerate(frames):
            t0, c0 = time.perf_counter(), time.process_time()
            res = rec(frame, frame_index=f)
            wall += time.perf_counter() - t0
            cpu += time.process_time() - c0
            idx = _match(res.sites, truth)
            errors += int(np.sum(res.occupied[idx] != truth.initial_occupation[f]))
        print(f"1024x1024, {n_sites} sites ({len(truth.sites)} in the atom region): "
              f"{1e3 * wall / len(frames):.1f} ms/frame wall, {1e3 * cpu / len(frames):.1f} ms CPU, "
              f"{'with' if refit else 'without'} phase fit; {errors} errors in {len(frames)} frames"
              + ("" if refit else " (the lattice jitters from frame to frame: without the fit errors are expected)"))
    amps = res.amplitudes
    from latticeread.core.pipeline import reclassify

    t0 = time.perf_counter()
    for k in range(50):
        reclassify(res, 200.0 + k)
    print(f"re-classify {amps.size} sites: {1e3 * (time.perf_counter() - t0) / 50:.2f} ms "
          f"(calibration took {t_cal:.1f} s)")


def command_speed(n_frames: int):
    """The reconstruct command on an n-frame TIFF stack (own process): frames/s and peak memory."""
    import tifffile

    cam = CAMERAS["emccd"]
    geo = lattice(1.0, angle=0.1, offset=(256.3, 255.6))
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        stack = tmp / "stack.tif"
        frames, _ = simulate_frames(geometry=geo, frame_shape=(512, 512), psf=PSF, camera=cam,
                                    region=("rectangle", 60, 60), filling=0.45, photons_per_atom=1000.0,
                                    background=1.0, n_shots=n_frames, phase_jitter=0.5, rng=6)
        tifffile.imwrite(stack, frames)
        cal = tmp / "cal.json"
        cam_args = ["--em-gain", "200", "--counts-per-electron", "0.05", "--bias", "100", "--read-noise", "6",
                    "--qe", "0.9"]
        subprocess.run([sys.executable, "-m", "latticeread", "calibrate", str(stack), "-o", str(cal), "--psf", "airy",
                        "--wavelength-nm", "767", "--na", "0.75", "--pixel-size-nm", "180", "--max-frames", "8",
                        *cam_args], check=True, capture_output=True)
        out = tmp / "sites.h5"
        t0 = time.perf_counter()
        proc = subprocess.run(["/usr/bin/time", "-f", "%M %U %S", sys.executable, "-m", "latticeread", "reconstruct",
                               str(stack), "-c", str(cal), "-o", str(out), "--quiet"], check=True,
                              capture_output=True, text=True)
        dt = time.perf_counter() - t0
        peak_kb, user, system = proc.stderr.strip().splitlines()[-1].split()
        cpu = float(user) + float(system)
        print(f"reconstruct command, {n_frames} frames of 512x512 (3,600 sites), one process: "
              f"{n_frames / dt:.1f} frames/s wall including start-up ({dt:.1f} s, {cpu:.1f} s CPU, "
              f"{n_frames / cpu:.1f} frames per CPU-second); peak RSS {int(peak_kb) / 1024:.0f} MB")


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--skip-fidelity", action="store_true")
    parser.add_argument("--skip-speed", action="store_true")
    args = parser.parse_args()
    if not args.skip_fidelity:
        fidelity_table(args.quick)
    if not args.skip_speed:
        speed_1024()
        command_speed(20)
        command_speed(100)


if __name__ == "__main__":
    main()
