"""Fault injection on whole commands: ``reconstruct`` killed while writing, two ``batch`` runs at once.

A killed ``reconstruct`` must leave either no output or the previous one intact and readable,
never a half-written file; the next run removes what the killed one left and writes a complete
output, equal to that of a run that was never disturbed. The output is written under a hidden
temporary name and renamed when complete (POSIX ``rename`` replaces the target atomically:
the Python documentation of ``os.replace``). Two ``batch`` runs started at the same instant
on one new run file: one writes, the other is refused (exit 4, the README's table) naming the
first, and the file holds every frame once.

A new Python process spends seconds importing numpy, scipy, scikit-image and h5py, longer than
the writing it is meant to interrupt. So the runs are forked from one process that has done
the imports once (a "zygote"): each run is still a separate process running the command line's
``main`` with its own pid, temporary files and lock, killed with SIGKILL by this test. The
kill moments are seeded and spread over the writing time of an undisturbed run measured first
on the same machine, so they land inside the writing on a fast or a busy machine alike.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from latticeread.io.calibration_file import save_calibration
from latticeread.io.export import read_sites_csv, read_sites_metadata
from latticeread.io.run_file import read_run

from test_batch import assert_runs_identical, make_dataset

N_FRAMES = 8

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"),
                                reason="the runs are forked (os.fork) and watched through /proc")

ZYGOTE = textwrap.dedent('''
    import json, os, sys
    from latticeread.cli import main
    # everything the commands import on their way, so that a forked run starts at once
    import h5py, tqdm, latticeread.commands.reconstruct, latticeread.analysis.service, latticeread.core.pipeline
    import latticeread.core.frame_check, latticeread.io, latticeread.io.export, latticeread.io.frames
    import latticeread.io.outputs, latticeread.io.run_file, latticeread.runs.batch, tifffile, imagecodecs
    from latticeread.cli import build_parser
    build_parser()  # imports every command's module
    print("ready", flush=True)
    for line in sys.stdin:
        command, argument = line.rstrip("\\n").split(" ", 1)
        if command == "run":  # [[args, stdout file, stderr file], ...]: started at one instant
            jobs = json.loads(argument)
            gate, release = os.pipe()
            pids = []
            for args, out, err in jobs:
                pid = os.fork()
                if pid == 0:
                    os.close(release)
                    for fd, name in ((1, out), (2, err)):
                        os.dup2(os.open(name or os.devnull, os.O_WRONLY | os.O_CREAT | os.O_TRUNC), fd)
                    code = 1
                    try:
                        os.read(gate, 1)  # until the zygote closes the other end: all start together
                        code = main(args)
                    finally:
                        sys.stdout.flush()
                        sys.stderr.flush()
                        os._exit(code)
                pids.append(pid)
            os.close(gate)
            os.close(release)
            print(*pids, flush=True)
        elif command == "wait":
            _, status = os.waitpid(int(argument), 0)
            print(-os.WTERMSIG(status) if os.WIFSIGNALED(status) else os.WEXITSTATUS(status), flush=True)
''')


class Zygote:
    """A process that has imported latticeread and forks command-line runs on request."""

    def __init__(self):
        self.proc = subprocess.Popen([sys.executable, "-c", ZYGOTE], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     text=True)
        assert self._ask(None) == "ready"

    def _ask(self, line: str | None) -> str:
        if line is not None:
            self.proc.stdin.write(line + "\n")
            self.proc.stdin.flush()
        answer = self.proc.stdout.readline().strip()
        assert answer, "the zygote process died"
        return answer

    def start(self, *jobs: list[str], logs: list[tuple[Path, Path]] | None = None) -> list[int]:
        """Start ``latticeread ARGS`` for each job at one instant, output to ``logs``; return the pids."""
        logs = logs or [(None, None)] * len(jobs)
        return [int(pid) for pid in self._ask("run " + json.dumps(
            [[args, out and str(out), err and str(err)] for args, (out, err) in zip(jobs, logs)])).split()]

    def wait(self, pid: int) -> int:
        """Exit code of the run (minus the signal number when a signal ended it)."""
        return int(self._ask(f"wait {pid}"))

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait(timeout=30)
        self.proc.stdout.close()


@pytest.fixture(scope="module")
def zygote():
    z = Zygote()
    yield z
    z.close()


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """An 8-frame TIFF (4 simulated frames twice), a 2-frame TIFF of other frames, their calibration."""
    root = tmp_path_factory.mktemp("killed_reconstruct")
    cal, paths, _ = make_dataset(root / "data", n_files=1, frames_per_file=4, seed=11)
    tifffile.imwrite(paths[0], np.tile(tifffile.imread(paths[0]), (N_FRAMES // 4, 1, 1)), photometric="minisblack")
    _, old, _ = make_dataset(root / "old", n_files=1, frames_per_file=2, seed=22)
    save_calibration(root / "cal.json", cal)
    return root


def _args(data: Path, frames: Path, out: Path) -> list[str]:
    return ["reconstruct", str(frames), "-c", str(data / "cal.json"), "-o", str(out), "--quiet", "--force"]


def _outputs(out: Path) -> list[Path]:
    """The files a user reads: the output and, for a table, its companion JSON."""
    return [out, out.with_name(out.name + ".json")] if out.suffix == ".csv" else [out]


def _contents(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in _outputs(out) if p.exists()}


def _read(out: Path):
    """Read the output as a user would; raises on a damaged file."""
    if out.suffix == ".csv":
        return read_sites_csv(out), read_sites_metadata(out)
    return read_run(out)


def _same_output(new: Path, reference: Path) -> None:
    if new.suffix == ".csv":
        assert new.read_bytes() == reference.read_bytes()
        meta, ref = read_sites_metadata(new), read_sites_metadata(reference)
        assert {k: v for k, v in meta.items() if k != "created"} == {k: v for k, v in ref.items() if k != "created"}
    else:
        assert_runs_identical(read_run(new), read_run(reference))


def _ended(pid: int) -> bool:
    """The forked run has ended (a zombie until the zygote reaps it)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return True
    return stat[stat.rindex(")") + 2] in "ZX"


def _wait_for(pattern: str, folder: Path, timeout: float = 60.0, pid: int | None = None) -> float:
    """Wait until a file matching ``pattern`` is in ``folder`` (or the run ``pid`` has ended)."""
    deadline = time.monotonic() + timeout
    while not list(folder.glob(pattern)) and not (pid is not None and _ended(pid)):
        assert time.monotonic() < deadline, f"no {pattern} in {folder} after {timeout} s"
        time.sleep(0.002)
    return time.monotonic()


@pytest.mark.parametrize("suffix, old_output", [(".h5", False), (".csv", True)])
def test_reconstruct_killed_at_random_moments_of_writing(zygote, data, tmp_path, suffix, old_output):
    frames = data / "data" / "shot_0.tif"
    # An undisturbed run: the output to compare with, and how long the writing takes here
    # (from the temporary file's appearance to the rename), for the kill moments below.
    ref = tmp_path / "ref"
    ref.mkdir()
    pid, = zygote.start(_args(data, frames, ref / f"sites{suffix}"))
    began = _wait_for(".sites*.tmp", ref)
    writing = _wait_for(f"sites{suffix}", ref) - began
    assert zygote.wait(pid) == 0

    folder = tmp_path / "out"
    folder.mkdir()
    out = folder / f"sites{suffix}"
    if old_output:  # an older output of other frames, to be replaced with --force
        pid, = zygote.start(_args(data, data / "old" / "shot_0.tif", out))
        assert zygote.wait(pid) == 0
    old = _contents(out)
    assert bool(old) == old_output
    rng = np.random.default_rng(17 if old_output else 16)
    landed, scale = 0, 1.0
    for _ in range(8):
        pid, = zygote.start(_args(data, frames, out))
        _wait_for(f".sites{suffix}.{pid}-*.tmp", folder, pid=pid)
        time.sleep(rng.uniform(0.05, 0.6) * writing * scale)
        os.kill(pid, signal.SIGKILL)
        code = zygote.wait(pid)
        assert code in (-signal.SIGKILL, 0), f"the run ended with exit code {code}"
        if code == -signal.SIGKILL and _contents(out) == old:
            # no half-written output: the old one byte for byte (and readable), or none
            if old:
                _read(out)
            # the kill landed in the writing when the killed run left hidden files (its temporary
            # or lock files); a kill in the instant between two of them leaves none, which is as
            # safe but shows nothing: that one is not counted
            if [p.name for p in folder.iterdir() if f".{pid}-" in p.name and p.name.startswith(".")]:
                landed += 1
                if landed == 2:
                    break
        else:
            # The machine ran faster than in the measured run (a busy machine's speed varies) and
            # the kill came after the rename, or after the run had ended: then the output must be
            # the complete new one (a half-written one fails here). Aim earlier next time.
            _same_output(out, ref / out.name)
            old, scale = _contents(out), scale / 2
    assert landed == 2, "too few kills landed while the output was being written"
    pid, = zygote.start(_args(data, frames, out))
    assert zygote.wait(pid) == 0
    # the next run removed every leftover (temporary files, lock files) and wrote the whole output
    assert sorted(p.name for p in folder.iterdir()) == sorted(p.name for p in _outputs(out))
    _same_output(out, ref / out.name)


def test_two_batches_started_together_on_a_new_run_file(zygote, data, tmp_path):
    out = tmp_path / "run.h5"
    args = ["batch", str(data / "data"), "-c", str(data / "cal.json"), "-o", str(out), "--workers", "0", "--quiet",
            "--bootstrap", "0", "--json"]
    logs = [(tmp_path / f"out{k}.txt", tmp_path / f"err{k}.txt") for k in range(2)]
    pids = zygote.start(args, args, logs=logs)
    codes = [zygote.wait(pid) for pid in pids]
    said = [(o.read_text(), e.read_text()) for o, e in logs]
    # By design one run writes and the other is refused at the lock with exit 4 (output), naming
    # the writer; only if the first had finished before the second reached the lock could both
    # end with 0, the second finding nothing left to do.
    assert sorted(codes) in ([0, 4], [0, 0]), said
    written = []
    for k, ((stdout, stderr), code) in enumerate(zip(said, codes)):
        if code == 4:
            other = pids[1 - k]
            assert f"is being written by process {other}" in stderr, stderr
            assert stdout == "" and "internal error" not in stderr
        else:
            written.append(json.loads(stdout)["n_new"])
    run = read_run(out)
    assert sorted(run.frame_index.tolist()) == list(range(N_FRAMES))  # every frame once
    assert len(run.failures) == 0
    assert sum(written) == len(run) == N_FRAMES  # what the runs report is what the file holds
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".txt")) == ["run.h5"]  # no lock left
