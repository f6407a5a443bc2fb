"""Benchmark of ``latticeread batch``: throughput and memory on this machine (run by hand).

Scenario (invented): the "square" demo setting (532 nm lattice spacing = 3.3 pixels of
160 nm, EMCCD), 512x512 frames with a 50x50-site region (2,500 sites) at filling 0.45, one
frame per TIFF file, reconstructed with a fixed calibration (the simulation's own geometry,
PSF and camera; threshold 450 photons).

Targets: >= 50 frames/s on 2 cores; peak memory < 1 GB and flat in the number of
frames; the Dask LocalCluster within 30% of the process pool.

Every measured run happens in a fresh subprocess so that ``resource.getrusage`` peaks belong
to that run alone; a sampler thread also adds up the resident memory of the process and all
its descendants (workers) every 0.1 s, which gives the peak of the whole run at one moment.

Usage::

    .venv/bin/python bench/bench_batch.py                 # 1,000 frames, pool and Dask
    .venv/bin/python bench/bench_batch.py --frames 200    # quicker
    .venv/bin/python bench/bench_batch.py --data /tmp/lr_bench_frames   # reuse the frames
    .venv/bin/python bench/bench_batch.py --frames 200 --modes 2,2:pooled   # also without a fixed
        # threshold: the pooled policy, each file's shots classified together in the main process
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

SHAPE = (512, 512)
REGION = 50  # sites per side: 2,500 sites


def _calibration_and_kwargs():
    from latticeread.core.calibration import Calibration
    from latticeread.core.simulate import demo_scenario, make_region

    kw = demo_scenario("square", frame_shape=SHAPE)
    kw.pop("pixel_size_nm")
    kw["region"] = ("rectangle", REGION, REGION)
    sites = make_region(kw["geometry"], SHAPE, region=kw["region"], psf=kw["psf"])
    bounds = [int(sites.rows.min()), int(sites.rows.max()), int(sites.cols.min()), int(sites.cols.max())]
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=SHAPE,
                      threshold=450.0, notes={"index_bounds": bounds})
    return cal, kw


def make_frames(folder: Path, n_frames: int, *, seed: int = 0, chunk: int = 50) -> float:
    """Simulate ``n_frames`` single-frame TIFFs into ``folder`` (kept if already complete); seconds."""
    import tifffile

    from latticeread.core.simulate import simulate_frames
    from latticeread.io.calibration_file import save_calibration

    folder.mkdir(parents=True, exist_ok=True)
    existing = sorted(folder.glob("shot_*.tif"))
    if len(existing) >= n_frames and (folder / "cal.json").exists():
        return 0.0
    t0 = time.perf_counter()
    cal, kw = _calibration_and_kwargs()
    save_calibration(folder / "cal.json", cal)
    for start in range(0, n_frames, chunk):
        n = min(chunk, n_frames - start)
        frames, _ = simulate_frames(**kw, n_shots=n, phase_jitter=0.3, rng=seed + start)
        for k in range(n):
            tifffile.imwrite(folder / f"shot_{start + k:05d}.tif", frames[k], photometric="minisblack")
        print(f"  simulated {start + n}/{n_frames} frames", file=sys.stderr, flush=True)
    return time.perf_counter() - t0


# --- memory sampling --------------------------------------------------------------------------

def _rss_tree_kib(root: int) -> int:
    """Resident memory (KiB) of ``root`` and all its descendants, from /proc."""
    parents: dict[int, int] = {}
    rss: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                stat = fh.read()
            with open(f"/proc/{entry}/statm") as fh:
                pages = int(fh.read().split()[1])
        except OSError:
            continue
        pid = int(entry)
        parents[pid] = int(stat.rsplit(")", 1)[1].split()[1])
        rss[pid] = pages * (os.sysconf("SC_PAGE_SIZE") // 1024)
    total = 0
    for pid in rss:
        p = pid
        while p > 1:
            if p == root:
                total += rss[pid]
                break
            p = parents.get(p, 0)
    return total


class _Sampler(threading.Thread):
    def __init__(self):
        super().__init__(daemon=True)
        self.peak_kib = 0
        self._halt = threading.Event()

    def run(self):
        me = os.getpid()
        while not self._halt.wait(0.1):
            self.peak_kib = max(self.peak_kib, _rss_tree_kib(me))

    def stop(self):
        self._halt.set()
        self.join()


# --- one measured run (in its own process) ----------------------------------------------------

def one_run(data: Path, n_frames: int, mode: str, out: Path) -> dict:
    from latticeread.runs.batch import run_batch

    files = sorted(data.glob("shot_*.tif"))[:n_frames]
    calibration = data / "cal.json"
    if mode.endswith(":pooled"):  # the calibration without its fixed threshold: pooled policy
        from latticeread.io.calibration_file import load_calibration, save_calibration

        mode = mode.split(":")[0]
        calibration = data / "cal_pooled.json"
        save_calibration(calibration, load_calibration(data / "cal.json").replace(threshold=None))
    sampler = _Sampler()
    sampler.start()
    t0 = time.perf_counter()
    kwargs = {"scheduler": "local", "workers": 2} if mode == "dask" else {"workers": int(mode)}
    summary = run_batch(files, calibration=calibration, out=out, progress=False, **kwargs)
    wall = time.perf_counter() - t0
    sampler.stop()
    self_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    child_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return {
        "mode": mode + (" pooled" if calibration.name == "cal_pooled.json" else ""), "frames": summary.n_new, "failed": summary.n_failed, "wall_s": wall,
        "frames_per_s": summary.n_new / wall, "main_peak_MiB": self_kib / 1024,
        "largest_child_peak_MiB": child_kib / 1024, "tree_peak_MiB": sampler.peak_kib / 1024,
        "mean_filling": summary.mean_filling, "workers": summary.workers,
        "run_file_MiB": out.stat().st_size / 2**20,
    }


def _write_cost(n: int = 320, block: int = 1) -> float:
    """Main-process cost of appending one 50x50 shot to the run file (ms), flush included.

    ``block=1`` is how the watch writes (every shot at once); the batch writes blocks of up
    to 32 shots.
    """
    import numpy as np

    from latticeread.io.run_file import RunWriter, ShotKey, ShotRecord

    rng = np.random.default_rng(0)
    shape = (REGION, REGION)
    amp = np.where(rng.random(shape) < 0.45, rng.normal(900, 120, shape), rng.normal(0, 30, shape))
    rows, cols = np.mgrid[0:REGION, 0:REGION].astype(float)
    x, y = 100 + 3.29 * rows + 0.46 * cols, 100 - 0.46 * rows + 3.29 * cols
    records = [ShotRecord(ShotKey("/x.tif", "0" * 32, i), (amp > 450).astype(np.uint8), amp,
                          1 / (1 + np.exp(-(amp - 450) / 40)), x, y, np.zeros(shape, np.uint8),
                          (0.0, 0.0), (3.3, 0.0), (0.0, 3.3), 450.0) for i in range(n)]
    with tempfile.TemporaryDirectory() as tmp:
        with RunWriter(Path(tmp) / "w.h5", calibration_json="{}") as w:
            t0 = time.perf_counter()
            for i in range(0, n, block):
                w.append_many(records[i:i + block])
            return (time.perf_counter() - t0) / n * 1e3


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--frames", type=int, default=1000)
    parser.add_argument("--data", type=Path, default=Path(tempfile.gettempdir()) / "latticeread_bench_frames")
    parser.add_argument("--modes", default="2,dask", help="comma list of worker counts and/or 'dask'; "
                        "append ':pooled' to run without the fixed threshold (e.g. 2:pooled)")
    parser.add_argument("--flat", type=int, default=200, help="also run the pool on this many frames (memory)")
    parser.add_argument("--one-run", nargs=3, metavar=("N", "MODE", "OUT"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one_run:
        n, mode, out = args.one_run
        print(json.dumps(one_run(args.data, int(n), mode, Path(out))))
        return 0

    print(f"load average before: {os.getloadavg()}, CPUs: {os.cpu_count()}")
    sim = make_frames(args.data, args.frames)
    if sim:
        print(f"simulated {args.frames} frames of {SHAPE[0]}x{SHAPE[1]} in {sim:.0f} s into {args.data}")
    print(f"run file append cost per 2,500-site shot (flush included): {_write_cost(block=1):.2f} ms one at a "
          f"time (watch), {_write_cost(block=32):.2f} ms in blocks of 32 (batch)")
    plan = [(args.frames, m) for m in args.modes.split(",")]
    if args.flat and args.flat < args.frames:
        plan.append((args.flat, args.modes.split(",")[0]))
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        for k, (n, mode) in enumerate(plan):
            out = Path(tmp) / f"run_{k}.h5"
            proc = subprocess.run([sys.executable, __file__, "--data", str(args.data), "--one-run", str(n), mode,
                                   str(out)], capture_output=True, text=True)
            if proc.returncode:
                print(proc.stderr)
                return 1
            r = json.loads(proc.stdout.strip().splitlines()[-1])
            results.append(r)
            who = r["workers"] + (", pooled threshold" if "pooled" in r["mode"] else "")
            print(f"{r['frames']:5d} frames  {who:<42s} {r['wall_s']:7.1f} s  "
                  f"{r['frames_per_s']:6.1f} frames/s  peak: main {r['main_peak_MiB']:.0f} MiB, largest child "
                  f"{r['largest_child_peak_MiB']:.0f} MiB, all processes together {r['tree_peak_MiB']:.0f} MiB; "
                  f"run file {r['run_file_MiB']:.1f} MiB; filling {r['mean_filling']:.3f}", flush=True)
    pool = next((r for r in results if r["mode"] != "dask" and r["frames"] == args.frames), None)
    dask = next((r for r in results if r["mode"] == "dask"), None)
    if pool and dask:
        print(f"Dask / pool throughput: {dask['frames_per_s'] / pool['frames_per_s']:.2f}")
    print(f"load average after: {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
