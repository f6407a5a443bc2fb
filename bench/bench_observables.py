"""Time every observable on 1,000 shots of 100 x 100 sites (target: <= 2 s on 2 cores).

Run by hand:  python bench/bench_observables.py [--shots 1000] [--size 100] [--bootstrap 200] [--repeat 3]
Prints the wall time of each step and of ``compute_observables`` (all of them, with the
misread correction), best of ``--repeat`` runs. Input: independent random filling 0.45 with
a disk-shaped region (255 outside), as a run file would hold it.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from latticeread.core import observables as ob


def _best(fn, repeat):
    """Best wall time and the CPU time of that run (seconds)."""
    best = (float("inf"), 0.0)
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        best = min(best, (time.perf_counter() - t0, time.process_time() - c0))
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shots", type=int, default=1000)
    ap.add_argument("--size", type=int, default=100)
    ap.add_argument("--bootstrap", type=int, default=200)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n, s = args.shots, args.size
    occ = (rng.random((n, s, s)) < 0.45).astype(np.uint8)
    ii, jj = np.indices((s, s))
    occ[:, np.hypot(ii - s / 2, jj - s / 2) > 0.48 * s] = 255
    rates = ob.MisreadRates(0.01, 0.02, 0.015, false_positive_err=0.002, false_negative_err=0.003, loss_err=0.003)
    prep, region, _ = ob.region_of(occ)
    vec = np.array([[5.0, 0.7], [-0.7, 5.0]])
    steps = [
        ("validate + region", lambda: ob.region_of(occ)),
        ("density map", lambda: ob._density(prep, region)),
        ("radial profile", lambda: ob._radial(prep, region, centre=(s / 2, s / 2), vectors=vec, bin_width=1.0)),
        ("azimuthal profile", lambda: ob._azimuthal(prep, region, centre=(s / 2, s / 2), vectors=vec, n_bins=12)),
        ("line profiles a1 + a2", lambda: [ob._line(prep, region, axis=a, centre=(s / 2, s / 2), half_width=2)
                                           for a in ("a1", "a2")]),
        ("atom number", lambda: ob._atom_number(prep)),
        (f"correlator K=4, {args.bootstrap} bootstrap", lambda: ob._correlator(
            prep, region, max_distance=4, vectors=vec, n_bootstrap=args.bootstrap, rng=1)),
        ("structure factor", lambda: ob._structure_factor(prep, region)),
        ("staggered order + local map", lambda: ob._staggered(prep, region, origin=(0, 0), window=3, n_bins=40)),
    ]
    print(f"{n} shots of {s} x {s} sites ({int(region.sum())} in the region), CPUs available: "
          f"{len(os.sched_getaffinity(0))}, best of {args.repeat}")
    print(f"load average {os.getloadavg()[0]:.1f} (wall times grow when other processes share the cores)")
    print(f"{'step':40s} {'wall s':>8s} {'CPU s':>8s}")
    for name, fn in steps:
        print(f"{name:40s} {'%8.3f %8.3f' % _best(fn, args.repeat)}")
    total = _best(lambda: ob.compute_observables(occ, vectors=vec, n_bootstrap=args.bootstrap, rates=rates, rng=1),
                  args.repeat)
    print(f"{'compute_observables (all, corrected)':40s} {'%8.3f %8.3f' % total}   target <= 2 s wall on 2 cores")


if __name__ == "__main__":
    main()
