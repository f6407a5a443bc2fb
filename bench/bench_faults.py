"""Many kills and Ctrl-Cs of ``batch`` / ``watch`` at random moments (run by hand; prints counts).

The test suite hurts each command a few times; this script does it as often as asked and
counts what a user would notice: exit codes, run files that no longer open, shots written
twice, shots missing after running the same command again, and the time from the signal to
the end of the process (for Ctrl-C the aim is under one second; on a busy machine it is longer).

Scenario (invented): the "square" demo setting, one TIFF of 60 frames (4 simulated frames
repeated), a fixed calibration; the signal comes 0-2 s after the run file appears.

``--command concurrent`` starts two ``batch`` runs on one new run file at the same moment and
counts exit codes, frames each says it wrote (together they must make the 60), duplicated and
missing frames. ``--command append`` is a camera that appends the 60 frames to one TIFF in
bursts of 1-8 with random pauses of 0-0.3 s while ``watch --settle 0.05`` runs, so most pauses
are longer than the settle time and the file is taken many times while it grows; at the end
every frame must be in the run file once (the pixels of a frame already stored are recognised
in each grown version), and Ctrl-C ends the watch with 130.

``--fsync`` instead measures what the power-loss safety of the run file costs (two fsync
calls per committed block, :data:`latticeread.io.run_file.SYNC_TO_DISK`): a batch of 100
frames in this process, and the run-file writer alone with one shot per block (as ``watch``
writes) and 32 shots per block (as ``batch`` writes), each with and without fsync.

Usage::

    .venv/bin/python bench/bench_faults.py --command batch --signal SIGKILL --trials 10
    .venv/bin/python bench/bench_faults.py --command watch --signal SIGINT --trials 6
    .venv/bin/python bench/bench_faults.py --command concurrent --trials 6
    .venv/bin/python bench/bench_faults.py --command append --trials 4
    .venv/bin/python bench/bench_faults.py --fsync --trials 3
"""

from __future__ import annotations

import argparse
import json
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

N_FRAMES = 60


def make_data(folder: Path, n_frames: int = N_FRAMES) -> None:
    from latticeread.core.calibration import Calibration
    from latticeread.core.simulate import demo_scenario, simulate_frames
    from latticeread.io.calibration_file import save_calibration

    kw = demo_scenario("square", frame_shape=(128, 128))
    kw.pop("pixel_size_nm")
    kw["region"] = ("rectangle", 16, 16)
    frames, truth = simulate_frames(**kw, n_shots=4, images_per_shot=1, rng=11)
    (folder / "data").mkdir(parents=True)
    tifffile.imwrite(folder / "data" / "shot_0.tif", np.tile(frames, (n_frames // 4, 1, 1)),
                     photometric="minisblack")
    rows, cols = truth.sites.rows, truth.sites.cols
    bounds = [int(rows.min()), int(rows.max()), int(cols.min()), int(cols.max())]
    cal = Calibration(geometry=kw["geometry"], psf=kw["psf"], camera=kw["camera"], frame_shape=(128, 128),
                      threshold=450.0, notes={"index_bounds": bounds})
    save_calibration(folder / "cal.json", cal)


def trial(folder: Path, command: str, sig: int, rng, out: Path) -> dict:
    from latticeread.io.run_file import read_run

    cal, data = str(folder / "cal.json"), str(folder / "data")
    if command == "batch":
        args = ["batch", data, "-c", cal, "-o", str(out), "--workers", "2", "--no-progress"]
    else:
        args = ["watch", data, "-c", cal, "-o", str(out), "--interval", "0.1", "--quiet"]
    proc = subprocess.Popen([sys.executable, "-m", "latticeread", *args], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    while not out.exists() and proc.poll() is None:
        time.sleep(0.01)
    time.sleep(rng.uniform(0.0, 2.0))
    sent = time.monotonic()
    proc.send_signal(sig)
    proc.wait(timeout=120)
    result = {"exit": proc.returncode, "seconds": time.monotonic() - sent}
    try:
        keys = read_run(out, matrices=False).keys
    except Exception:  # noqa: BLE001 - counted, whatever the reason
        return {**result, "unreadable": True}
    result["duplicated"] = len(keys) - len(set(keys))
    again = subprocess.run([sys.executable, "-m", "latticeread", "batch", data, "-c", cal, "-o", str(out),
                            "--workers", "0", "--no-progress"], capture_output=True)
    frames = sorted(read_run(out, matrices=False).frame_index.tolist())
    result["missing_after_resume"] = N_FRAMES - len(set(frames)) + (again.returncode != 0)
    return result


def _written(stdout: str) -> int:
    """Frames a batch says it wrote ("this run      N frames written")."""
    for line in stdout.splitlines():
        if line.startswith("this run"):
            return int(line.split()[2])
    return 0


def trial_concurrent(folder: Path, out: Path) -> dict:
    """Two batches started together on one new run file."""
    from latticeread.io.run_file import read_run

    args = [sys.executable, "-m", "latticeread", "batch", str(folder / "data"), "-c", str(folder / "cal.json"),
            "-o", str(out), "--workers", "0", "--no-progress"]
    t0 = time.monotonic()
    procs = [subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    done = [p.communicate(timeout=300) for p in procs]
    result = {"exit": tuple(sorted(p.returncode for p in procs)), "seconds": time.monotonic() - t0,
              "reported_written": sum(_written(stdout) for stdout, _ in done)}
    try:
        keys = read_run(out, matrices=False).keys
    except Exception:  # noqa: BLE001 - counted, whatever the reason
        return {**result, "unreadable": True}
    result["duplicated"] = len(keys) - len(set(keys))
    result["missing_after_resume"] = N_FRAMES - len({k.frame_index for k in keys})
    result["double_reported"] = result["reported_written"] != len(keys)
    return result


def trial_append(folder: Path, rng, out: Path) -> dict:
    """A camera appending bursts of frames with pauses longer than the settle time, under watch."""
    from latticeread.io.run_file import read_run

    stack = tifffile.imread(folder / "data" / "shot_0.tif")
    camera = folder / f"camera_{out.stem}"
    camera.mkdir()
    shot = camera / "shot.tif"
    proc = subprocess.Popen([sys.executable, "-m", "latticeread", "watch", str(camera), "-c", str(folder / "cal.json"),
                             "-o", str(out), "--interval", "0.05", "--settle", "0.05", "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    def stored() -> int:
        try:
            return len(read_run(out, matrices=False))
        except Exception:  # noqa: BLE001 - not created yet
            return 0

    tifffile.imwrite(shot, stack[0], photometric="minisblack", metadata=None)
    written = 1
    while stored() < 1 and proc.poll() is None:  # the watch is running and has taken frame 0
        time.sleep(0.01)
    while written < len(stack):
        burst = int(rng.integers(1, 9))
        for frame in stack[written:written + burst]:
            tifffile.imwrite(shot, frame, append=True, photometric="minisblack", metadata=None)
        written = min(len(stack), written + burst)
        time.sleep(rng.uniform(0.0, 0.3))
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None and stored() < len(stack):
        time.sleep(0.1)
    time.sleep(1.0)  # a duplicate would come after the last frame: give it time
    sent = time.monotonic()
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    result = {"exit": proc.returncode, "seconds": time.monotonic() - sent}
    try:
        run = read_run(out, matrices=False)
    except Exception:  # noqa: BLE001 - counted, whatever the reason
        return {**result, "unreadable": True}
    frames = run.frame_index.tolist()
    result["duplicated"] = len(frames) - len(set(frames))
    result["missing_after_resume"] = len(stack) - len(set(frames))
    result["versions_taken"] = len(set(run.file_hash.tolist()))
    result["grew_warnings"] = err.count("grew from")
    return result


def _writer_rate(folder: Path, block: int, n: int = 100) -> float:
    """Shots per second of RunWriter.append_many alone, ``block`` shots per call."""
    import json as _json

    from latticeread.io.run_file import RunWriter, ShotKey, ShotRecord

    rng = np.random.default_rng(0)
    shape = (16, 16)
    records = [ShotRecord(key=ShotKey("/data/shot.tif", "ab" * 16, i), occupation=rng.integers(0, 2, shape).astype(
        np.uint8), amplitude=rng.normal(500, 300, shape), p_occupied=rng.random(shape), x=rng.random(shape),
        y=rng.random(shape), flags=np.zeros(shape, np.uint8), offset=(0.0, 0.0), a1=(4.0, 0.0), a2=(0.0, 4.0),
        threshold=450.0) for i in range(n)]
    path = folder / f"writer_{block}_{time.monotonic_ns()}.h5"
    with RunWriter(path, calibration_json=_json.dumps({"format": "latticeread-calibration"})) as w:
        t0 = time.perf_counter()
        for start in range(0, n, block):
            w.append_many(records[start:start + block])
        seconds = time.perf_counter() - t0
    return n / seconds


def fsync_cost(trials: int) -> dict:
    """Frames (shots) per second with and without fsync; best of ``trials`` each, alternating."""
    import os

    import latticeread.io.run_file as run_file
    from latticeread.runs.batch import run_batch

    n_frames = 100
    out: dict = {"load_before": os.getloadavg()}
    with tempfile.TemporaryDirectory() as tmp:  # /tmp: check it is a disk, not a RAM tmpfs (df)
        folder = Path(tmp)
        make_data(folder, n_frames)
        rates: dict = {}
        for k in range(trials):
            for sync in ((True, False) if k % 2 == 0 else (False, True)):  # alternate: no order effect
                run_file.SYNC_TO_DISK = sync
                tag = "fsync" if sync else "no_fsync"
                t0 = time.perf_counter()
                run_batch([folder / "data"], calibration=folder / "cal.json", out=folder / f"run_{tag}_{k}.h5",
                          workers=0, progress=False, fidelity_bootstrap=0)
                rates.setdefault(f"batch_100_frames_per_s_{tag}", []).append(n_frames / (time.perf_counter() - t0))
                for block in (1, 32):
                    rates.setdefault(f"writer_block_{block}_shots_per_s_{tag}", []).append(
                        _writer_rate(folder, block, n_frames))
        run_file.SYNC_TO_DISK = True
    out.update({key: {"best": round(max(v), 1), "median": round(float(np.median(v)), 1)}
                for key, v in sorted(rates.items())})
    out["load_after"] = os.getloadavg()
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--fsync", action="store_true", help="measure the cost of fsync per committed block")
    ap.add_argument("--command", choices=["batch", "watch", "concurrent", "append"], default="batch")
    ap.add_argument("--signal", choices=["SIGKILL", "SIGINT", "SIGTERM"], default="SIGKILL")
    ap.add_argument("--trials", type=int, default=10)
    args = ap.parse_args()
    if args.fsync:
        print(json.dumps(fsync_cost(args.trials), indent=2))
        return
    rng = np.random.default_rng()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        make_data(folder)
        if args.command == "concurrent":
            results = [trial_concurrent(folder, folder / f"run_{k}.h5") for k in range(args.trials)]
        elif args.command == "append":
            results = [trial_append(folder, rng, folder / f"run_{k}.h5") for k in range(args.trials)]
        else:
            results = [trial(folder, args.command, getattr(signal, args.signal), rng, folder / f"run_{k}.h5")
                       for k in range(args.trials)]
    seconds = np.array([r["seconds"] for r in results])
    exits: dict = {}
    for r in results:
        exits[r["exit"]] = exits.get(r["exit"], 0) + 1
    extra = {}
    if args.command == "concurrent":
        extra["runs_reporting_more_frames_than_stored"] = sum(bool(r.get("double_reported")) for r in results)
    if args.command == "append":
        extra["versions_taken_per_run"] = [r.get("versions_taken") for r in results]
    print(json.dumps({
        "command": args.command, "signal": args.signal if args.command in ("batch", "watch") else "SIGINT at the end"
        if args.command == "append" else "none", "trials": len(results), "exit_codes": {str(k): v for k, v in
                                                                                       exits.items()}, **extra,
        "unreadable_files": sum(bool(r.get("unreadable")) for r in results),
        "runs_with_duplicated_shots": sum(r.get("duplicated", 0) > 0 for r in results),
        "runs_missing_shots_after_resume": sum(r.get("missing_after_resume", 0) > 0 for r in results),
        ("run_seconds" if args.command == "concurrent" else "signal_to_exit_seconds"):
            {"median": float(np.median(seconds)), "max": float(seconds.max())},
    }, indent=2))


if __name__ == "__main__":
    main()
