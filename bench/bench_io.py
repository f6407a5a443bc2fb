"""Speed and memory of frame loading and result export (run by hand; prints numbers).

    .venv/bin/python bench/bench_io.py [--frames 1000] [--size 256] [--sites 40]
    .venv/bin/python bench/bench_io.py --export-only --frames 60 --sites 86   # 444k CSV rows; aim >= 500k rows/s

Scenario: a stack of uint16 frames (random counts) written as plain TIFF, LZW TIFF, HDF5
and .npy, then read frame by frame; synthetic per-frame results on a sites x sites square
lattice, made beforehand, exported to CSV and HDF5 (rows/s by wall clock and per CPU-second). Peak memory is the traced Python/numpy
allocation (tracemalloc), which shows whether a writer holds all frames at once.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np
import tifffile

from latticeread.core.geometry import LatticeGeometry, lattice_sites
from latticeread.io import load_frames, write_occupation_hdf5, write_sites_csv


@dataclass(frozen=True)
class _Result:
    frame_index: int
    geometry: LatticeGeometry
    sites: object
    amplitudes: np.ndarray
    occupied: np.ndarray
    p_occupied: np.ndarray
    flags: np.ndarray
    threshold: float


def results(n_frames, n_sites, rng):
    geom = LatticeGeometry(a1=(4.0, 0.1), a2=(-0.1, 4.0), offset=(6.0, 6.0))
    sites = lattice_sites(geom, (int(4 * n_sites + 12), int(4 * n_sites + 12)), margin=4)
    for k in range(n_frames):
        n = len(sites)
        occ = (rng.random(n) < 0.5).astype(np.uint8)
        yield _Result(k, geom, sites, occ * 1000.0 + rng.normal(0, 60, n), occ, occ.astype(float), np.zeros(n, np.uint8),
                      500.0)


def timed(label, fn, unit_count, unit):
    """Time one run without tracing (wall clock and this process's CPU time), then trace a
    second run for the peak allocation. On a shared machine the CPU rate is the steadier one."""
    t0, c0 = time.perf_counter(), time.process_time()
    fn()
    dt, dc = time.perf_counter() - t0, time.process_time() - c0
    tracemalloc.start()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"{label:<34s} {dt:7.3f} s  {unit_count / dt:10.0f} {unit}/s  ({unit_count / dc:10.0f} per CPU-second)  "
          f"peak {peak / 2**20:7.1f} MiB")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=1000)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--sites", type=int, default=40)
    ap.add_argument("--export-only", action="store_true",
                    help="only the writers (e.g. --frames 60 --sites 86: 60 x 7,396 = 444k CSV rows)")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n, s = args.frames, args.size
    if args.export_only:
        export(n, args.sites, rng)
        return
    data = rng.integers(400, 3000, (n, s, s)).astype(np.uint16)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        tifffile.imwrite(tmp / "plain.tif", data, photometric="minisblack")
        tifffile.imwrite(tmp / "lzw.tif", data, photometric="minisblack", compression="lzw")
        with h5py.File(tmp / "run.h5", "w") as h5:
            h5.create_dataset("frames", data=data, chunks=(1, s, s))
        np.save(tmp / "run.npy", data)
        del data
        print(f"{n} frames of {s}x{s} uint16")
        for name in ("plain.tif", "lzw.tif", "run.h5", "run.npy"):
            def read(name=name):
                with load_frames(tmp / name) as stack:
                    total = 0.0
                    for frame in stack:
                        total += float(frame[0, 0])
            timed(f"load_frames {name} (validated)", read, n, "frames")
    export(n, args.sites, rng)


def export(n, n_sites, rng):
    """The writers on results made beforehand (their making is not timed)."""
    frames = list(results(n, n_sites, rng))
    rows = n * len(frames[0].sites)
    print(f"export: {n} frames x {len(frames[0].sites)} sites = {rows} site rows")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        timed("write_occupation_hdf5", lambda: write_occupation_hdf5(tmp / "out.h5", iter(frames), block=32),
              n, "frames")
        timed("write_sites_csv", lambda: write_sites_csv(tmp / "out.csv", iter(frames)), rows, "rows")
        print(f"file sizes: HDF5 {(tmp / 'out.h5').stat().st_size / 2**20:.1f} MiB, "
              f"CSV {(tmp / 'out.csv').stat().st_size / 2**20:.1f} MiB")


if __name__ == "__main__":
    main()
