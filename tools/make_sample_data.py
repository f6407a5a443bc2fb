"""Regenerate the bundled demo stacks in sample_data/ with the forward model.

Run from the repository root:  python tools/make_sample_data.py
The scenario is invented (sodium-23 at 589 nm, NA 0.70, 160 nm pixels; see
latticeread.core.simulate.demo_scenario). Seeds are fixed so the files are reproducible.
"""

from __future__ import annotations

import sys
from pathlib import Path

from latticeread.cli import main

ROOT = Path(__file__).resolve().parents[1]

#: (file name, scenario, shots, images per shot, seed, further simulate options)
SAMPLES = [
    ("demo_square.tif", "square", 6, 2, 20261, []),
    ("demo_folded.tif", "folded", 2, 2, 20262, []),
    ("demo_triangular.tif", "triangular", 2, 2, 20263, []),
    # for the observables: many single images of an ordered state (invented scenarios)
    ("demo_checkerboard.tif", "square", 40, 1, 20264,
     ["--pattern", "checkerboard", "--filling", "0.9", "--size", "128", "128"]),
    ("demo_mott.tif", "square", 40, 1, 20265, ["--pattern", "mott", "--filling", "0.93", "--size", "128", "128"]),
    # every imperfection of a real microscope at once (invented sizes): hot pixels, cosmic rays, a
    # Gaussian imaging beam, stray light changing per frame, barrel distortion (about 0.15 spacing
    # at the corners), aberrations growing toward the edge, slow drift on top of the jitter
    ("demo_realistic.tif", "square", 4, 1, 20266,
     ["--hot-pixels", "12", "--cosmic-rays", "3", "--illumination-waist", "150", "--stray-light", "3",
      "--distortion=-8e-8", "--aberrations", "0.3", "--drift", "0.15", "0.1"]),
]


def make_all(folder: Path = ROOT / "sample_data") -> None:
    folder.mkdir(exist_ok=True)
    for name, scenario, shots, images, seed, extra in SAMPLES:
        code = main(["simulate", str(folder / name), "--scenario", scenario, "--shots", str(shots),
                     "--images-per-shot", str(images), "--seed", str(seed), *extra])
        if code != 0:
            sys.exit(code)


if __name__ == "__main__":
    make_all()
