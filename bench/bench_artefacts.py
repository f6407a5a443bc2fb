"""Cost of the per-frame cosmic-ray search: the whole-frame shape test against the screened one.

``find_artefacts`` scores every filter only on tiles near pixels that a cheap bound cannot
clear; ``_excess_reference`` is the whole-frame computation it replaced (kept for the tests).
For simulated frames (atoms in a disk, cosmic-ray hits, hot pixels, sCMOS noise) the bench
prints the CPU milliseconds per frame of both, whether their masks agree, how many pixels
the screen passed on, and the machine's load beside every number; and the cost of the frame
check's whole-frame part (:func:`latticeread.core.frame_check.outside_light`).

Run by hand, one benchmark at a time (numbers vary with the load)::

    python bench/bench_artefacts.py
    python bench/bench_artefacts.py --sizes 1024 --frames 5
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from latticeread.core import artefacts
from latticeread.core.camera import CameraModel
from latticeread.core.frame_check import outside_light
from latticeread.core.geometry import LatticeGeometry
from latticeread.core.psf import airy_psf
from latticeread.core.simulate import simulate_frames

FWHM = 4.5
SPACING = 1.1 * FWHM
PSF = airy_psf(wavelength_nm=FWHM / 0.5145, numerical_aperture=1.0, pixel_size_nm=1.0)
CAMERA = CameraModel(kind="scmos", counts_per_electron=2.0, bias=100.0, read_noise=3.0)


def frames(size: int, n: int, seed: int) -> list[np.ndarray]:
    c, s = np.cos(0.3), np.sin(0.3)
    geometry = LatticeGeometry((SPACING * c, SPACING * s), (-SPACING * s, SPACING * c),
                               offset=(size / 2 + 0.3, size / 2 - 0.4))
    raw, _ = simulate_frames(geometry=geometry, frame_shape=(size, size), psf=PSF, camera=CAMERA,
                             region=("disk", size / SPACING / 2.4), filling=0.45, photons_per_atom=700.0,
                             background=1.5, n_shots=n, hot_pixels=20, cosmic_rays=5.0, rng=seed)
    return [CAMERA.counts_to_photons(f) for f in raw]


def cpu_ms(fn, repeat: int) -> float:
    fn()
    t = time.process_time()
    for _ in range(repeat):
        fn()
    return 1e3 * (time.process_time() - t) / repeat


def load() -> str:
    return "load " + "/".join(f"{v:.1f}" for v in os.getloadavg())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[512, 1024])
    parser.add_argument("--frames", type=int, default=3)
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args()
    ks = artefacts.bounds(PSF)
    for size in args.sizes:
        stack = frames(size, args.frames, seed=size)
        whole, fast, same, screened, hits = [], [], True, 0, 0
        for frame in stack:
            finite = np.isfinite(frame)
            kw = dict(ks=ks, camera=CAMERA, block=32, n_sigma=5.5, grow_sigma=3.0, finite=finite)
            whole.append(cpu_ms(lambda: artefacts._excess_reference(frame, **kw), args.repeat))
            fast.append(cpu_ms(lambda: artefacts._excess_windows(frame, **kw), args.repeat))
            ref, _ = artefacts._excess_reference(frame, **kw)
            new, _ = artefacts._excess_windows(frame, **kw)
            same &= bool(np.array_equal(ref, new))
            screened += int(artefacts._screen(frame, artefacts._block_levels(frame, 32), ks=ks, camera=CAMERA,
                                              n_sigma=5.5).sum())
            hits += artefacts.find_artefacts(frame, camera=CAMERA, ks=ks).n_hits
        total = cpu_ms(lambda: [artefacts.find_artefacts(f, camera=CAMERA, ks=ks) for f in stack], 1) / len(stack)
        crop = (slice(size // 4, 3 * size // 4), slice(size // 4, 3 * size // 4))
        outside = cpu_ms(lambda: [outside_light(f, crop=crop, background=1.5, camera=CAMERA) for f in stack],
                         1) / len(stack)
        print(f"{size}x{size}: frame check's light outside the region {outside:.1f} ms/frame; {load()}")
        print(f"{size}x{size}: shape test whole frame {np.median(whole):7.1f} ms/frame, screened "
              f"{np.median(fast):7.1f} ms/frame (x{np.median(whole) / np.median(fast):.1f}); find_artefacts "
              f"{total:.1f} ms/frame; masks identical: {same}; {screened / len(stack):.0f} pixels screened "
              f"in, {hits / len(stack):.1f} hits per frame; {load()}")


if __name__ == "__main__":
    main()
