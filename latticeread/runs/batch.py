"""Reconstruct a whole data set into one resumable run file.

The main process finds the input files, hashes them, lists the shots (file, hash, frame)
not yet in the run file, and hands them out to an executor of
:mod:`latticeread.analysis.executor`: by default a process pool on this machine, optionally
a Dask cluster or this process alone. Each worker builds the
:class:`~latticeread.analysis.service.FrameAnalyser` once (the factorisation is never rebuilt
per frame) and receives only the file path and frame index, never the pixels. Results come
back as :class:`~latticeread.io.run_file.ShotRecord` and are written by the main process
alone, in input order (so the run file of a run is the same whatever ran the shots, and a
kill loses nothing already written). With the pooled threshold policy (a calibration
without a fixed threshold) the shots of a file are classified together, against the
threshold of their pooled histogram, when the last of them is back
(:func:`latticeread.analysis.service.classify_records`), and then written.

A shot that fails (corrupt file, no lattice, wrong frame size) is recorded in the run
file's failures table with its reason and the run goes on. Running the same command again
skips the shots already in the run file and the shots that failed before (their files are
unchanged, so they would fail again; ``retry_failed=True`` tries them anyway). A file that
changed since some of its frames were stored (it grew, or was rewritten) is a new input; of
its frames, those whose pixels equal the stored frame at the same position (same digest,
:func:`latticeread.analysis.service.frame_digest`) are the same exposures and are skipped,
so a file that grew between two runs adds only its new frames.
"""

from __future__ import annotations

import dataclasses
import glob
import logging
import os
import re
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from latticeread.analysis.executor import (  # noqa: F401 - names kept for callers of this module
    PoolExecutor,
    SerialExecutor,
    calibration_digest,
    make_executor,
    worker_analyser,
)
from latticeread.analysis.service import (  # noqa: F401 - names kept for callers of this module
    FrameAnalyser,
    ShotFailure,
    classify_records,
    close_stack,
    frame_digests,
    hash_file,
    open_stack,
    shot_record,
)
from latticeread.core.calibration import Calibration
from latticeread.errors import ExportError, FrameFileError
from latticeread.io.calibration_file import calibration_to_json, load_calibration
from latticeread.io.run_file import RunWriter, ShotKey, ShotRecord, describe_keys, read_run
from latticeread.runs.stopping import interrupt_guard, raise_if_interrupted

#: Earlier names of the executor layer's parts.
ShotReconstructor, SerialRunner, PoolRunner, worker_reconstructor = (FrameAnalyser, SerialExecutor, PoolExecutor,
                                                                     worker_analyser)

__all__ = [
    "FRAME_SUFFIXES",
    "BatchSummary",
    "ShotFailure",
    "ShotReconstructor",
    "find_input_files",
    "hash_file",
    "plan_shots",
    "shot_record",
    "run_batch",
    "summarize_run",
    "group_shots",
]

log = logging.getLogger(__name__)

#: File name endings recognised as frame files when a folder or glob pattern is given.
FRAME_SUFFIXES = (".tif", ".tiff", ".h5", ".hdf5", ".npy", ".npz")
_GLOB_CHARS = re.compile(r"[*?\[]")


# --- input files ---------------------------------------------------------------------------

def _natural_key(path: Path):
    """Sort ``shot_2.tif`` before ``shot_10.tif``."""
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", str(path))]


def _is_frame_file(path: Path) -> bool:
    return path.is_file() and path.suffix.lower() in FRAME_SUFFIXES and not path.name.startswith(".")


def find_input_files(inputs, *, exclude=()) -> list[Path]:
    """Expand files, folders and glob patterns into a list of frame files.

    Parameters
    ----------
    inputs : iterable of str or PathLike
        Files (taken as given), folders (their frame files, not recursive) or glob patterns
        (``**`` recurses). Folders and patterns keep files ending in :data:`FRAME_SUFFIXES`
        and skip hidden files (names starting with ``.``, e.g. files being written).
    exclude : iterable of str or PathLike
        Files never to take as input (the run file itself).

    Returns
    -------
    list of Path
        Absolute paths, each once, in the order given; inside a folder or pattern in
        natural order (``shot_2`` before ``shot_10``).

    Raises
    ------
    FrameFileError
        An input does not exist, or a folder/pattern holds no frame file.
    """
    excluded = {Path(os.fspath(p)).resolve() for p in exclude}
    found: list[Path] = []
    for item in inputs:
        text = os.fspath(item)
        path = Path(text)
        if path.is_file():
            candidates = [path]
        elif path.is_dir():
            candidates = sorted((p for p in path.iterdir() if _is_frame_file(p)), key=_natural_key)
            candidates = [p for p in candidates if p.resolve() not in excluded]
            if not candidates:
                raise FrameFileError(f"the folder {path} holds no frame files ({', '.join(FRAME_SUFFIXES)})")
        elif _GLOB_CHARS.search(text):
            candidates = sorted((Path(p) for p in glob.glob(text, recursive=True) if _is_frame_file(Path(p))),
                                key=_natural_key)
            candidates = [p for p in candidates if p.resolve() not in excluded]
            if not candidates:
                raise FrameFileError(f"no frame file matches {text!r} ({', '.join(FRAME_SUFFIXES)})")
        else:
            raise FrameFileError(f"input {text} does not exist")
        found.extend(p.resolve() for p in candidates)
    unique = list(dict.fromkeys(p for p in found if p not in excluded))
    return unique


# --- planning ------------------------------------------------------------------------------

@dataclass(frozen=True)
class ShotPlan:
    """The work of one run.

    Attributes
    ----------
    tasks : list of ShotKey
        Shots to reconstruct, in input order.
    failures : list of ShotFailure
        Files that could not be opened (new failures, to be recorded).
    n_files : int
        Input files considered.
    n_done_before : int
        Shots skipped because they are already in the run file.
    n_failed_before : int
        Shots (or files) skipped because they failed in an earlier run.
    same : list of ShotKey
        Shots of a file that changed since it was stored (it grew) whose frame, with the
        same pixels at the same position of the file, is already in the run file; skipped.
    """

    tasks: list
    failures: list
    n_files: int
    n_done_before: int
    n_failed_before: int
    same: list = dataclasses.field(default_factory=list)

    @property
    def n_same_before(self) -> int:
        return len(self.same)


def _open_stack(path):
    return open_stack(path)


_close_stack = close_stack


def _count_frames(path: Path) -> int:
    stack = _open_stack(path)
    try:
        return len(stack)
    finally:
        _close_stack(stack)


def plan_shots(files, *, done=frozenset(), failed=frozenset(), retry_failed: bool = False,
               count_frames=_count_frames, stored=None, digest_frames=frame_digests) -> ShotPlan:
    """List the shots of ``files`` that still have to be reconstructed.

    Parameters
    ----------
    files : iterable of Path
        Input files (absolute paths).
    done : set of ShotKey
        Shots already in the run file; skipped.
    failed : set of ShotKey
        Unresolved failures of earlier runs; skipped unless ``retry_failed``.
    retry_failed : bool
        Try earlier failures again.
    count_frames : callable, optional
        ``count_frames(path) -> int``; by default opens the file with
        :func:`latticeread.io.frames.load_frames` (headers only).
    stored : dict, optional
        Frame digests in the run file per ``(source, frame_index)``
        (:attr:`latticeread.io.run_file.RunWriter.stored_digests`). A frame of a changed file
        whose digest is stored for the same file and position is skipped (it is in the run
        file from the earlier version); only such frames are read here.
    digest_frames : callable, optional
        ``digest_frames(path, indices) -> {index: digest}``; default
        :func:`latticeread.analysis.service.frame_digests`.

    Returns
    -------
    ShotPlan
    """
    tasks: list[ShotKey] = []
    failures: list[ShotFailure] = []
    same: list[ShotKey] = []
    stored = stored or {}
    n_done = n_failed = n_files = 0
    for path in files:
        n_files += 1
        source = str(path)
        try:
            digest = hash_file(path)
        except OSError as exc:
            failures.append(ShotFailure(ShotKey(source, "", -1), type(exc).__name__,
                                        f"cannot read {path}: {exc.strerror or exc}"))
            continue
        whole = ShotKey(source, digest, -1)
        if whole in failed and not retry_failed:
            n_failed += 1
            continue
        try:
            n_frames = int(count_frames(path))
        except Exception as exc:  # noqa: BLE001 - any unreadable file is recorded, not fatal
            failures.append(ShotFailure(whole, type(exc).__name__, str(exc) or repr(exc)))
            continue
        if n_frames == 0:
            failures.append(ShotFailure(whole, "FrameFileError", f"{path.name} holds no frames"))
            continue
        todo = []
        for i in range(n_frames):
            key = ShotKey(source, digest, i)
            if key in done:
                n_done += 1
            elif key in failed and not retry_failed:
                n_failed += 1
            else:
                todo.append(key)
        known = [k for k in todo if (source, k.frame_index) in stored]
        if known:
            pixels = digest_frames(path, [k.frame_index for k in known])
            if pixels and hash_file(path) != digest:
                pixels = {}  # changed again while it was read: the reconstruction will say so
            taken = {k for k in known if pixels.get(k.frame_index, "") in stored[(source, k.frame_index)] - {""}}
            unknown = [k for k in known if k not in taken and "" in stored[(source, k.frame_index)]]
            if taken:
                log.warning("%s changed after %s were stored (it grew or was rewritten); those frames have the "
                            "same pixels as stored and are not stored again", path.name,
                            describe_keys(sorted(taken))[len(path.name) + 1:])
            if unknown:
                log.warning("%s changed after %s were stored by a version of latticeread that did not record "
                            "frame pixels; they are stored again and may be duplicates of the stored rows",
                            path.name, describe_keys(unknown)[len(path.name) + 1:])
            same.extend(sorted(taken))
            todo = [k for k in todo if k not in taken]
        tasks.extend(todo)
    return ShotPlan(tasks, failures, n_files, n_done, n_failed, same)


# --- summary ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class BatchSummary:
    """What a batch (or watch) run did, and what its run file now holds.

    Attributes
    ----------
    run_file : Path
    n_files : int
        Input files considered.
    n_new : int
        Shots reconstructed and written by this run.
    n_failed : int
        Shots or files that failed in this run.
    n_skipped_done, n_skipped_failed : int
        Shots skipped: already in the run file / failed in an earlier run.
    n_shots_total : int
        Shots in the run file after this run.
    n_failures_total : int
        Unresolved failures in the run file after this run.
    mean_filling, filling_std : float
        Mean and standard deviation over all shots in the file of the filling fraction
        (occupied / region sites).
    offset_shift_px : (2,) tuple of float
        Mean lattice offset of the shots minus the calibration offset, ``(x, y)`` pixels.
    phase_scatter_px : float
        RMS distance of the per-shot offsets from their mean, pixels (shot-to-shot phase jitter).
    phase_drift_max_sites : float
        Largest distance of a shot's offset from the calibration offset, in lattice
        spacings (the smaller of the two spacings).
    seconds : float
        Wall time of the run.
    frames_per_second : float
        New shots per second of wall time (NaN when none).
    failure_examples : tuple of str
        Up to five failures of this run, "file frame: reason".
    workers : str
        What ran the shots.
    warnings : tuple of str
        What the user should look at.
    fidelity : FidelityReport or None
        Loss and hopping between consecutive images, when the run was told that shots hold
        several images (``images_per_shot`` > 1) and enough complete shots exist.
    n_skipped_same : int
        Frames of inputs that changed since they were stored (a file that grew) skipped
        because the run file holds the same frame (same file, position and pixels).
    """

    run_file: Path
    n_files: int
    n_new: int
    n_failed: int
    n_skipped_done: int
    n_skipped_failed: int
    n_shots_total: int
    n_failures_total: int
    mean_filling: float
    filling_std: float
    offset_shift_px: tuple
    phase_scatter_px: float
    phase_drift_max_sites: float
    seconds: float
    frames_per_second: float
    failure_examples: tuple = ()
    workers: str = ""
    warnings: tuple = ()
    fidelity: object = None
    n_skipped_same: int = 0

    def format(self) -> str:
        """Several lines of plain text for the terminal."""
        lines = [
            f"run file      {self.run_file}",
            f"input files   {self.n_files}",
            f"this run      {self.n_new} frames written, {self.n_failed} failed, "
            f"{self.n_skipped_done} already done, {self.n_skipped_failed} skipped (failed before)"
            + (f", {self.n_skipped_same} already stored from an earlier version of their file (same pixels)"
               if self.n_skipped_same else ""),
            f"time          {self.seconds:.1f} s" + (f", {self.frames_per_second:.1f} frames/s on {self.workers}"
                                                     if np.isfinite(self.frames_per_second) else ""),
            f"run file now  {self.n_shots_total} frames, {self.n_failures_total} unresolved failures",
        ]
        if self.n_shots_total:
            lines += [
                f"filling       {self.mean_filling:.4f} +- {self.filling_std:.4f} (mean +- std over frames)",
                f"lattice phase mean shift ({self.offset_shift_px[0]:+.3f}, {self.offset_shift_px[1]:+.3f}) px "
                f"from the calibration, frame-to-frame scatter {self.phase_scatter_px:.3f} px rms, "
                f"largest shift {self.phase_drift_max_sites:.3f} sites",
            ]
        if self.fidelity is not None:
            fid = self.fidelity

            def pct(e):
                if np.isfinite(e.low) and np.isfinite(e.high):
                    return f"{100 * e.value:.2f} % [{100 * e.low:.2f}, {100 * e.high:.2f}]"
                return f"{100 * e.value:.2f} %"

            lines.append(f"fidelity      loss {pct(fid.loss)}, hopping {pct(fid.hop)}, read correctly "
                         f"{pct(fid.read_correctly)} per atom and image ({fid.n_shots} shots of {fid.n_images} "
                         "images)")
            misread = fid.settings.get("misread") or {}
            lines.append(f"fidelity how  intervals: {fid.settings.get('interval', 'none')}; misread rates: "
                         f"{misread.get('method', 'not estimated')}")
            lines += [f"fidelity note {text}" for text in fid.warnings]
        lines += [f"failed        {text}" for text in self.failure_examples]
        lines += [f"warning       {text}" for text in self.warnings]
        return "\n".join(lines)


def group_shots(run, images_per_shot: int) -> tuple[np.ndarray, np.ndarray]:
    """Group consecutive frames of each input file into shots of ``images_per_shot`` images.

    Frames ``k*n ... k*n + n - 1`` of one file form shot ``k``; a shot is kept only when all
    its images are in the run (none failed).

    Parameters
    ----------
    run : RunData
        Read with at least the ``occupation`` matrices.
    images_per_shot : int

    Returns
    -------
    occupations : (n_shots, images_per_shot, rows, cols) ndarray of uint8
    rows : (n_shots, images_per_shot) ndarray of int
        Row of each image in the run file.
    """
    n = int(images_per_shot)
    by_source: dict[str, dict[int, int]] = {}
    for k, (s, i) in enumerate(zip(run.source, run.frame_index)):
        by_source.setdefault(str(s), {})[int(i)] = k
    groups = []
    for frames in by_source.values():
        for first in sorted({f - f % n for f in frames}):
            rows = [frames.get(first + j) for j in range(n)]
            if None not in rows:
                groups.append(rows)
    rows = np.array(groups, dtype=int).reshape(-1, n)
    shape = run.occupation.shape[1:] if run.occupation is not None and run.occupation.ndim == 3 else (0, 0)
    occupations = run.occupation[rows.ravel()].reshape(-1, n, *shape) if rows.size else \
        np.zeros((0, n, *shape), np.uint8)
    return occupations, rows


def _fidelity(path, calibration: Calibration, images_per_shot: int, n_bootstrap: int):
    from latticeread.core.fidelity import fidelity_from_frames
    from latticeread.errors import FidelityError

    run = read_run(path, matrices=("occupation", "amplitude"))
    occupations, rows = group_shots(run, images_per_shot)
    if occupations.shape[0] == 0:
        return None, (f"no complete shot of {images_per_shot} consecutive images: fidelity not estimated",)
    try:
        return fidelity_from_frames(occupations, amplitudes=run.amplitude[rows.ravel()],
                                    thresholds=run.threshold[rows.ravel()], camera=calibration.camera,
                                    geometry=calibration.geometry, n_bootstrap=n_bootstrap), ()
    except FidelityError as exc:
        return None, (f"fidelity not estimated: {exc}",)


def summarize_run(path, calibration: Calibration, *, counts: dict, seconds: float, workers: str = "",
                  failure_examples=(), images_per_shot: int = 1, fidelity_bootstrap: int = 200) -> BatchSummary:
    """Build a :class:`BatchSummary` from the run file's per-shot table and this run's counters.

    With ``images_per_shot`` > 1 the loss and hopping between consecutive images are
    estimated (:func:`latticeread.core.fidelity.fidelity_from_frames`, the estimate every
    front end uses) on every complete shot in the run file, from its occupations, amplitudes
    and thresholds, with ``fidelity_bootstrap`` bootstrap replicates for the intervals
    (0: no intervals).
    """
    run = read_run(path, matrices=False)
    n = len(run)
    if n:
        filling = run.filling[np.isfinite(run.filling)]
        mean_filling = float(filling.mean()) if filling.size else float("nan")
        filling_std = float(filling.std()) if filling.size else float("nan")
        ref = np.asarray(calibration.geometry.offset, dtype=float)
        shift = run.offset - ref
        mean_shift = shift.mean(axis=0)
        scatter = float(np.sqrt(np.mean(np.sum((shift - mean_shift) ** 2, axis=1))))
        spacing = min(calibration.geometry.spacings)
        drift_max = float(np.max(np.hypot(shift[:, 0], shift[:, 1])) / spacing)
    else:
        mean_filling = filling_std = scatter = drift_max = float("nan")
        mean_shift = np.array([np.nan, np.nan])
    n_failures_total = int(np.count_nonzero(~run.failures.resolved))
    new = counts.get("new", 0)
    warnings = []
    if counts.get("failed", 0):
        warnings.append(f"{counts['failed']} frame(s) or file(s) failed in this run; their reasons are in the "
                        "run file's failures table (latticeread.io.read_run(path).failures)")
    if n and np.isfinite(drift_max) and drift_max > 0.5:
        warnings.append(f"the lattice offset moved by up to {drift_max:.2f} sites from the calibration: "
                        "site indices may have jumped; check the lattice phase per shot")
    fidelity = None
    if images_per_shot > 1 and n:
        fidelity, notes = _fidelity(path, calibration, images_per_shot, fidelity_bootstrap)
        warnings.extend(notes)
    return BatchSummary(
        run_file=Path(path), n_files=counts.get("files", 0), n_new=new, n_failed=counts.get("failed", 0),
        n_skipped_done=counts.get("skipped_done", 0), n_skipped_failed=counts.get("skipped_failed", 0),
        n_skipped_same=counts.get("skipped_same", 0),
        n_shots_total=n, n_failures_total=n_failures_total, mean_filling=mean_filling, filling_std=filling_std,
        offset_shift_px=tuple(float(v) for v in mean_shift), phase_scatter_px=scatter,
        phase_drift_max_sites=drift_max, seconds=float(seconds),
        frames_per_second=new / seconds if new and seconds > 0 else float("nan"),
        failure_examples=tuple(failure_examples)[:5], workers=workers, warnings=tuple(warnings),
        fidelity=fidelity)


# --- the run ---------------------------------------------------------------------------------

def _as_calibration(calibration) -> Calibration:
    if isinstance(calibration, Calibration):
        return calibration
    return load_calibration(calibration)


def _describe_failure(failure: ShotFailure) -> str:
    where = Path(failure.key.source).name
    if failure.key.frame_index >= 0:
        where += f" frame {failure.key.frame_index}"
    return f"{where}: {failure.reason}"


def _progress_bar(total: int, enabled: bool, description: str):
    from tqdm import tqdm

    return tqdm(total=total, unit="frame", desc=description, file=sys.stderr, disable=not enabled,
                dynamic_ncols=True, smoothing=0.1)


def run_batch(inputs, *, calibration, out, workers: int | None = None, scheduler: str | None = None,
              retry_failed: bool = False, progress: bool = True, metadata: dict | None = None,
              window: int | None = None, images_per_shot: int = 1, fidelity_bootstrap: int = 200) -> BatchSummary:
    """Reconstruct every frame of ``inputs`` into the run file ``out`` (resumable).

    Parameters
    ----------
    inputs : iterable of str or PathLike
        Files, folders or glob patterns (see :func:`find_input_files`).
    calibration : Calibration or str or PathLike
        The calibration, or its JSON file.
    out : str or PathLike
        The run file; created, or resumed when it exists.
    workers : int, optional
        Worker processes on this machine (default: number of CPUs). ``0`` reconstructs in
        this process (no pool). Ignored when ``scheduler`` is given.
    scheduler : str, optional
        ``"local"`` starts a Dask ``LocalCluster``; any other value is the address of a Dask
        scheduler (``tcp://host:8786``). Needs the optional extra ``latticeread[cluster]``.
    retry_failed : bool
        Try again the shots that failed in an earlier run.
    progress : bool
        Show a tqdm progress bar on stderr (frames/s and time left).
    metadata : dict, optional
        Stored with the run file when it is created.
    window : int, optional
        Shots in flight at once (default about three tasks per worker, at least 48 so that
        blocks of 32 shots fill); bounds the memory of the main process.
    images_per_shot : int
        Consecutive frames of each file that image the same atoms (2 or more: the summary
        estimates loss and hopping between them). Default 1: frames are independent.
    fidelity_bootstrap : int
        Bootstrap replicates for the fidelity intervals (0: point estimates only, faster).

    Returns
    -------
    BatchSummary

    Raises
    ------
    FrameFileError
        An input does not exist or holds no frame files.
    ExportError
        The run file cannot be written or belongs to another calibration.
    CalibrationError
        The calibration file is unusable.
    """
    t_start = time.perf_counter()
    if int(images_per_shot) < 1:
        raise ValueError(f"images per shot must be at least 1, got {images_per_shot}")
    cal = _as_calibration(calibration)
    cal_json = calibration_to_json(cal)
    out = Path(os.fspath(out))
    files = find_input_files(inputs, exclude=[out])
    meta = {"inputs": [os.fspath(i) for i in inputs], "workers": workers, "scheduler": scheduler,
            **(metadata or {})}
    counts = {"files": len(files), "new": 0, "failed": 0, "skipped_done": 0, "skipped_failed": 0, "skipped_same": 0}
    examples: list[str] = []
    with RunWriter(out, calibration_json=cal_json, metadata=meta) as writer:
        plan = plan_shots(files, done=writer.done, failed=writer.failed, retry_failed=retry_failed,
                          stored=writer.stored_digests)
        counts["skipped_done"] = plan.n_done_before
        counts["skipped_failed"] = plan.n_failed_before
        counts["skipped_same"] = plan.n_same_before
        for failure in plan.failures:
            writer.record_failure(failure.key, error=failure.error, reason=failure.reason)
            counts["failed"] += 1
            examples.append(_describe_failure(failure))
            log.warning("%s", _describe_failure(failure))
        description = "nothing to do"
        if plan.tasks:
            runner = make_executor(cal_json, workers=workers, scheduler=scheduler)
            description = runner.description
            try:
                with interrupt_guard():
                    _drive(runner, plan.tasks, writer, counts, examples, progress=progress,
                           window=window or _default_window(runner), calibration=cal)
            finally:
                runner.close(cancel=True)
    return summarize_run(out, cal, counts=counts, seconds=time.perf_counter() - t_start, workers=description,
                         failure_examples=examples, images_per_shot=images_per_shot,
                         fidelity_bootstrap=fidelity_bootstrap)


def _default_window(runner) -> int:
    """Shots in flight: about three tasks per worker, at least 48 so that blocks of 32 fill."""
    return max(48, 3 * runner.n_workers * getattr(runner, "shots_per_task", 1))


class _BlockWriter:
    """Gather results in input order and write them to the run file in blocks.

    A block is written when it holds ``block_size`` shots or ``max_wait`` seconds have
    passed since the last write, before a failure is recorded, and at the end. Writing a
    block costs about as much as writing one shot, so this keeps the main process light.
    """

    def __init__(self, writer: RunWriter, counts: dict, examples: list, *, block_size: int = 32,
                 max_wait: float = 0.5):
        self.writer, self.counts, self.examples = writer, counts, examples
        self.block_size, self.max_wait = int(block_size), float(max_wait)
        self._records: list[ShotRecord] = []
        self._last = time.monotonic()

    def add(self, outcome) -> None:
        if isinstance(outcome, ShotFailure):
            self.flush()
            self.writer.record_failure(outcome.key, error=outcome.error, reason=outcome.reason)
            self.counts["failed"] += 1
            self.examples.append(_describe_failure(outcome))
            log.warning("%s", _describe_failure(outcome))
            return
        self._records.append(outcome)
        if len(self._records) >= self.block_size or time.monotonic() - self._last >= self.max_wait:
            self.flush()

    def flush(self) -> None:
        records, self._records = self._records, []
        if records:
            written = self.writer.append_many(records)
            self.counts["new"] += written
            # the writer skips a frame it holds from an earlier version of the same file
            self.counts["skipped_same"] = self.counts.get("skipped_same", 0) + len(records) - written
        self._last = time.monotonic()


class _FileClassifier:
    """Hold the shots of one input file until the last is back, then classify them together.

    Used with the pooled threshold policy: the threshold of a file comes from the histogram
    of all its shots (:func:`latticeread.analysis.service.classify_records`), as in the
    window and ``reconstruct``. Shots arrive in input order, so a file is complete when a
    shot of another file arrives, or at the end.
    """

    def __init__(self, out: _BlockWriter, calibration: Calibration):
        self.out, self.calibration = out, calibration
        self._held: list = []

    def add(self, outcome) -> None:
        if self._held and outcome.key.source != self._held[0].key.source:
            self.flush()
        self._held.append(outcome)

    def flush(self) -> None:
        held, self._held = self._held, []
        for outcome in classify_records(held, self.calibration):
            self.out.add(outcome)
        self.out.flush()


def _drive(runner, tasks: list, writer: RunWriter, counts: dict, examples: list, *, progress: bool,
           window: int, block_size: int = 32, calibration: Calibration | None = None) -> None:
    """Submit shots (at most ``window`` unwritten at once) and write them in input order.

    Raises
    ------
    ExportError
        A block could not be written (full disk...); the message names the shots of this
        run that are not in the run file. Everything written before stays.
    """
    buffered: dict[int, object] = {}
    next_submit = next_write = 0
    out = _BlockWriter(writer, counts, examples, block_size=block_size)
    if calibration is not None and calibration.threshold_policy.kind == "pooled":
        out = _FileClassifier(out, calibration)
    bar = _progress_bar(len(tasks), progress, "reconstructing")
    try:
        while next_write < len(tasks):
            while next_submit < len(tasks) and next_submit - next_write < window:
                runner.submit(next_submit, tasks[next_submit])
                next_submit += 1
            raise_if_interrupted()
            index, outcome = runner.next_done()
            buffered[index] = outcome
            while next_write in buffered:
                out.add(buffered.pop(next_write))
                next_write += 1
                bar.update(1)
            bar.set_postfix(failed=counts["failed"], refresh=False)
        out.flush()
    except ExportError as exc:
        raise _not_written_error(exc, tasks, writer) from exc
    except BaseException:
        # Ctrl-C or an error elsewhere: keep what already came back (order does not matter
        # for keys); a failure to write it is reported, never swallowed.
        try:
            for index in sorted(buffered):
                out.add(buffered.pop(index))
            out.flush()
        except ExportError as exc:
            raise _not_written_error(exc, tasks, writer) from exc
        raise
    finally:
        bar.close()


def _not_written_error(exc: ExportError, tasks: list, writer: RunWriter) -> ExportError:
    """The write error, plus which shots of this run are not in the run file."""
    missing = [k for k in tasks if k not in writer.done and k not in writer.failed]
    cls = type(exc) if isinstance(exc, ExportError) else ExportError
    return cls(f"{exc}; {len(missing)} frame(s) of this run not written: {describe_keys(missing)}. The run file keeps "
               f"its {writer.n_shots} frames: free space (or fix the cause) and run the same command again to "
               "continue")


def summary_dict(summary: BatchSummary) -> dict:
    """The summary as plain JSON-able values (for ``--json`` output or the GUI)."""
    fidelity = summary.fidelity
    data = dataclasses.asdict(dataclasses.replace(summary, fidelity=None))
    data["run_file"] = str(summary.run_file)
    data["fidelity"] = None if fidelity is None else fidelity.to_dict()
    return data
