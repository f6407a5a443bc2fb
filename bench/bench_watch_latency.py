"""Benchmark: time from a new frame file in a watched folder to the window's live panel (run by hand).

Scenario: the demo_square stack (256x256 frames) and its calibration; the window's live
watch controller (the same object the window uses) polls a temporary folder every 0.2 s with
the default settle time; each frame is written as a camera program should (hidden temporary
name, then an atomic rename). The latency is measured from the rename to the controller's
statistics signal, over ``--frames`` files one after another.

Target: <= 1 s from the file to the panel (median and largest printed; the machine's load
average is printed beside them, since other processes on the cores lengthen every number).

Usage::

    QT_QPA_PLATFORM=offscreen .venv/bin/python bench/bench_watch_latency.py --frames 10
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=10, help="files written one after another")
    args = parser.parse_args()

    from PySide6 import QtWidgets

    from latticeread.gui.watch_mode import LiveWatchController
    from latticeread.io import load_calibration

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    frames = tifffile.imread(SAMPLE / "demo_square.tif")
    calibration = load_calibration(SAMPLE / "demo_square.calibration.json")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "camera"
        folder.mkdir()
        controller = LiveWatchController(folder, calibration=calibration, out=Path(tmp) / "run.h5")
        delivered: list[float] = []
        controller.statsChanged.connect(lambda _stats: delivered.append(time.perf_counter()))
        controller.start()
        deadline = time.monotonic() + 60
        while not controller.timer_active and time.monotonic() < deadline:
            app.processEvents()
            time.sleep(0.01)
        latencies = []
        try:
            for i in range(args.frames):
                n_before = len(delivered)
                part = folder / f".shot_{i:04d}.tif.part"
                tifffile.imwrite(part, frames[i % len(frames)])
                os.replace(part, folder / f"shot_{i:04d}.tif")
                written = time.perf_counter()
                deadline = time.monotonic() + 30
                while len(delivered) == n_before and time.monotonic() < deadline:
                    app.processEvents()
                    time.sleep(0.002)
                if len(delivered) == n_before:
                    raise SystemExit(f"frame {i} did not reach the panel within 30 s")
                latencies.append(delivered[-1] - written)
        finally:
            controller.stop()
    ms = 1000 * np.asarray(latencies)
    print(f"watch latency, {args.frames} frames of {frames.shape[1]}x{frames.shape[2]}, load average "
          f"{os.getloadavg()[0]:.1f}: median {np.median(ms):.0f} ms, largest {ms.max():.0f} ms "
          f"(target <= 1000 ms)")


if __name__ == "__main__":
    main()
