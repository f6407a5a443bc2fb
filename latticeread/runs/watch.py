"""Reconstruct frame files as the camera writes them into a folder.

:class:`FolderWatcher` is a plain poll-based detector (no threads, no Qt): call
:meth:`FolderWatcher.poll` every fraction of a second (the GUI does it from a timer, the
command line from a loop) and it returns the files that became complete since the last
call. A file counts as complete when its size and modification time did not change
between two polls, have not changed for at least a settle time (``settle`` seconds since
the file's modification time, or since the watcher saw the change when that time lies in
the future), **and** it opens as a valid frame file whose last frame can be read, with the
same size and time after reading as before (a TIFF still being written fails that test).
The settle time covers a
camera that appends frames to one file: between two frames the file is unchanged and
readable, but it is not complete. A camera that pauses longer than the settle time is taken
at the pause; when the file grows, the new version is reported as a new input and
:class:`LiveRun` stores only its new frames (the frames already stored are recognised by
their pixels at the same position of the file, :func:`latticeread.runs.batch.plan_shots`). A file that stays unchanged but unreadable for
``give_up_polls`` polls is reported as broken, once.

A file is reported once per distinct content. Changes are noticed by size, modification
time, inode and status-change time together (a file copied over the old one keeping its
size and time still gets a new inode or status-change time); a complete file is then
identified by a hash of its content, and a content already reported under that name
(a camera that restarts and writes the same frames again, a file touched or copied back)
is not reported again, while every new content is.

:class:`LiveRun` ties the watcher to a reconstructor (built once) and a run file, one poll
per :meth:`LiveRun.step` (the GUI's timer or worker calls it); every new frame is
reconstructed and appended (resumable like a batch run; files already in the run file are
skipped). :func:`watch_folder` is the command-line loop around it.
"""

from __future__ import annotations

import logging
import os
import time
from collections import deque
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from latticeread.analysis.service import classify_records
from latticeread.errors import ExportError
from latticeread.io.calibration_file import calibration_to_json
from latticeread.io.run_file import RunWriter, ShotKey, describe_keys
from latticeread.runs.stopping import interrupt_guard, raise_if_interrupted
from latticeread.runs.batch import (
    FRAME_SUFFIXES,
    BatchSummary,
    ShotFailure,
    ShotReconstructor,
    _as_calibration,
    _close_stack,
    _describe_failure,
    _open_stack,
    hash_file,
    plan_shots,
    summarize_run,
)

__all__ = ["WatchEvent", "FolderWatcher", "RunningStats", "LiveRun", "watch_folder", "validate_frame_file"]

log = logging.getLogger(__name__)

#: Warning of the summary of a watch stopped with Ctrl-C (the command then exits with 130).
INTERRUPTED_NOTE = "interrupted (Ctrl-C); every frame shown above is in the run file"


@dataclass(frozen=True)
class WatchEvent:
    """A file the watcher reports.

    Attributes
    ----------
    path : Path
        The file (absolute).
    status : {"ready", "broken"}
        "ready": complete and readable; "broken": unchanged for a while but unreadable.
    reason : str
        Why a broken file cannot be read (empty for ready files).
    file_hash : str
        Hash of the content reported (:func:`latticeread.runs.batch.hash_file`; empty for
        broken files).
    """

    path: Path
    status: str
    reason: str = ""
    file_hash: str = ""


def validate_frame_file(path) -> int:
    """Open a frame file and read its last frame; return the number of frames.

    Raises
    ------
    Exception
        Whatever :func:`latticeread.io.frames.load_frames` raises for an incomplete or
        corrupt file (FrameFileError, FrameError...), or FrameFileError for no frames.
    """
    from latticeread.errors import FrameFileError

    stack = _open_stack(path)
    try:
        n = len(stack)
        if n == 0:
            raise FrameFileError(f"{Path(path).name} holds no frames")
        np.asarray(stack[n - 1])
        return n
    finally:
        _close_stack(stack)


def _identity(st: os.stat_result) -> tuple:
    """What tells one version of a file from the next: size, modification time (ns), inode and
    status-change time (ns). The first two come first (the watcher reads them by position)."""
    return (st.st_size, st.st_mtime_ns, st.st_ino, st.st_ctime_ns)


@dataclass
class _FileState:
    stat: tuple
    since: float = 0.0  # watcher clock when this stat was first seen
    stable: int = 0  # consecutive polls with an unchanged stat
    reported: tuple | None = None  # stat at the time it was reported
    last_error: str = ""
    n_frames: int | None = None  # frames when it was reported


#: Seconds a file must stay unchanged before it is taken: longer than the pause of a camera
#: appending the frames of one shot to one file (a readout, tens to a hundred milliseconds),
#: short enough that the window shows a new file within a second (common practice, no source).
DEFAULT_SETTLE_SECONDS = 0.3


class FolderWatcher:
    """Detect frame files that appear (and finish being written) in a folder, by polling.

    Parameters
    ----------
    folder : str or PathLike
        The folder the camera writes to (not recursive).
    suffixes : tuple of str
        File endings to watch (default: TIFF, HDF5, npy). Hidden files (``.name``), which
        cameras and our own writers use while writing, are ignored.
    exclude : iterable of paths
        Files never reported (e.g. the run file when it lies in the same folder).
    include_existing : bool
        Report files already present at the first poll (default True). With False only
        files created or changed afterwards are reported.
    give_up_polls : int
        A file unchanged but unreadable for this many polls is reported as broken.
    validate : callable, optional
        ``validate(path)`` raises when the file is not a complete frame file (and may return
        its number of frames); default :func:`validate_frame_file`.
    settle : float
        Seconds a file's size and modification time must stay unchanged before it is taken
        (default :data:`DEFAULT_SETTLE_SECONDS`); counted from the modification time (from
        when the watcher saw the change if that time lies in the future). 0 takes a file at
        the first poll that finds it unchanged.
    clock : callable
        Seconds on the wall clock (``time.time``; tests may replace it).

    Notes
    -----
    A file is reported once per version: if it is rewritten (size or time changes) after
    it was reported, it is reported again when it is complete again, with a note in the log
    when it had been taken with fewer frames (it grew after it was taken; :class:`LiveRun`
    then stores only the frames it did not hold).
    """

    def __init__(self, folder, *, suffixes=FRAME_SUFFIXES, exclude=(), include_existing: bool = True,
                 give_up_polls: int = 10, validate=None, settle: float = DEFAULT_SETTLE_SECONDS,
                 clock=time.time, content_hash=None):
        from latticeread.errors import FrameFileError

        self.folder = Path(os.fspath(folder)).resolve()
        if not self.folder.is_dir():
            raise FrameFileError(f"cannot watch {folder}: it is not a folder")
        self.suffixes = tuple(s.lower() for s in suffixes)
        self._exclude = {Path(os.fspath(p)).resolve() for p in exclude}
        self._validate = validate or validate_frame_file
        self._give_up = max(2, int(give_up_polls))
        self._files: dict[Path, _FileState] = {}
        self._first = True
        self._include_existing = bool(include_existing)
        if not settle >= 0:
            raise ValueError(f"settle time must be 0 or more seconds, got {settle!r}")
        self.settle = float(settle)
        self._clock = clock
        self._hash = content_hash or hash_file
        # content hashes reported per file name; kept when the file disappears for a while
        self._taken: dict[Path, set[str]] = {}

    def _scan(self) -> dict[Path, tuple]:
        found = {}
        try:
            entries = list(os.scandir(self.folder))
        except OSError as exc:
            log.warning("cannot list %s: %s", self.folder, exc)
            return found
        for entry in entries:
            name = entry.name
            if name.startswith(".") or not name.lower().endswith(self.suffixes):
                continue
            try:
                if not entry.is_file():
                    continue
                st = entry.stat()
            except OSError:  # vanished between listing and stat
                continue
            path = Path(entry.path)
            if path in self._exclude:
                continue
            found[path] = _identity(st)
        return found

    def poll(self) -> list[WatchEvent]:
        """Look at the folder once; return files that became complete (or broken) since last time.

        Returns
        -------
        list of WatchEvent
            In natural file-name order.
        """
        current = self._scan()
        now = self._clock()
        events: list[WatchEvent] = []
        for path in [p for p in self._files if p not in current]:
            del self._files[path]  # deleted or renamed away
        for path, stat in current.items():
            state = self._files.get(path)
            if state is None:
                state = self._files[path] = _FileState(stat, since=now)
                if self._first and not self._include_existing:
                    state.reported = stat
                continue
            if stat != state.stat:
                state.stat, state.since, state.stable, state.last_error = stat, now, 0, ""
                continue
            state.stable += 1
            if state.reported == stat or (stat[0] == 0 and state.stable < self._give_up):
                continue
            # unchanged since its modification time (since the change seen here when that
            # time lies in the future: the clock of a network share may run ahead)
            changed = stat[1] / 1e9
            if now - (changed if changed <= now else state.since) < self.settle:
                continue
            try:
                n_frames = self._validate(path)
                digest = self._hash(path)
                if self._stat(path) != stat:
                    continue  # written to while it was read: look again at the next poll
            except Exception as exc:  # noqa: BLE001 - any failure means "not (yet) a frame file"
                state.last_error = str(exc) or type(exc).__name__
                if state.stable >= self._give_up:
                    state.reported = stat
                    reason = state.last_error if stat[0] else f"{path.name} is empty"
                    events.append(WatchEvent(path, "broken", reason))
                continue
            if state.reported is not None and state.n_frames is not None and isinstance(n_frames, int) \
                    and n_frames > state.n_frames:
                log.warning("%s grew from %d to %d frames after it was taken; it is taken again, and its frames "
                            "already stored are recognised by their pixels and not stored twice (raise the settle "
                            "time if the camera pauses this long within one acquisition)", path.name,
                            state.n_frames, n_frames)
            state.reported = stat
            taken = self._taken.setdefault(path, set())
            if digest in taken:
                log.info("%s was rewritten with content already taken; not taken again", path.name)
                continue
            taken.add(digest)
            state.n_frames = n_frames if isinstance(n_frames, int) else None
            events.append(WatchEvent(path, "ready", file_hash=digest))
        self._first = False
        from latticeread.runs.batch import _natural_key

        return sorted(events, key=lambda e: _natural_key(e.path))

    @staticmethod
    def _stat(path: Path) -> tuple | None:
        try:
            st = os.stat(path)
        except OSError:
            return None
        return _identity(st)

    @property
    def pending(self) -> list[Path]:
        """Files seen but not yet reported (still being written or not yet readable)."""
        return [p for p, s in self._files.items() if s.reported != s.stat]


@dataclass
class RunningStats:
    """Running statistics of a watch: updated per shot, for the terminal or the GUI trend plots.

    Attributes
    ----------
    n_shots, n_failed : int
        Shots written / shots or files failed in this watch.
    filling : list of float
        Filling fraction per written shot (occupied / region sites).
    offsets : list of (float, float)
        Lattice offset ``(x, y)`` in pixels per written shot.
    """

    n_shots: int = 0
    n_failed: int = 0
    filling: list = field(default_factory=list)
    offsets: list = field(default_factory=list)

    def add(self, outcome) -> None:
        if isinstance(outcome, ShotFailure):
            self.n_failed += 1
        else:
            self.n_shots += 1
            self.filling.append(outcome.filling)
            self.offsets.append(tuple(outcome.offset))

    @property
    def mean_filling(self) -> float:
        values = np.asarray(self.filling, dtype=float)
        values = values[np.isfinite(values)]
        return float(values.mean()) if values.size else float("nan")

    def describe(self, outcome) -> str:
        """One line about the latest shot and the running mean."""
        if isinstance(outcome, ShotFailure):
            return f"failed  {_describe_failure(outcome)}"
        key: ShotKey = outcome.key
        return (f"{Path(key.source).name}[{key.frame_index}]  filling {outcome.filling:.3f}  "
                f"(mean {self.mean_filling:.3f} over {self.n_shots} frames, {self.n_failed} failed)  "
                f"offset ({outcome.offset[0]:.2f}, {outcome.offset[1]:.2f}) px  "
                f"threshold {outcome.threshold:.0f} photons")


class LiveRun:
    """A watched folder, a reconstructor and a run file, advanced one poll at a time.

    The command line calls :meth:`step` in a loop (:func:`watch_folder`); the GUI calls it
    from a timer or a worker thread and reads :attr:`stats` for its trend plots. Each step
    looks at the folder once, reconstructs every file that became complete and appends
    the shots to the run file (files already in it are skipped).

    Parameters
    ----------
    folder : str or PathLike
        Folder the camera writes to.
    calibration : Calibration or str or PathLike
        The calibration, or its JSON file.
    out : str or PathLike
        The run file (created, or resumed).
    include_existing : bool
        Also reconstruct files present at the first step (default True).
    retry_failed : bool
        Try files again that failed in an earlier run of the same run file.
    metadata : dict, optional
        Stored with the run file when it is created.
    give_up_polls : int
        Polls after which an unchanged but unreadable file is recorded as a failure.
    settle : float
        Seconds a file must stay unchanged before it is taken (see :class:`FolderWatcher`).
    """

    def __init__(self, folder, *, calibration, out, include_existing: bool = True, retry_failed: bool = False,
                 metadata: dict | None = None, give_up_polls: int = 10, settle: float = DEFAULT_SETTLE_SECONDS):
        self._t_start = time.perf_counter()
        self.calibration = _as_calibration(calibration)
        self.out = Path(os.fspath(out))
        self.retry_failed = bool(retry_failed)
        self.stats = RunningStats()
        self.counts = {"files": 0, "new": 0, "failed": 0, "skipped_done": 0, "skipped_failed": 0, "skipped_same": 0}
        self._examples: list[str] = []
        self._queue: deque = deque()  # reported by the watcher, not handled yet
        self.watcher = FolderWatcher(folder, exclude=[self.out], include_existing=include_existing,
                                     give_up_polls=give_up_polls, settle=settle)
        meta = {"watched_folder": str(self.watcher.folder), **(metadata or {})}
        self._writer = RunWriter(self.out, calibration_json=calibration_to_json(self.calibration), metadata=meta)
        try:
            self._reconstruct = ShotReconstructor(self.calibration)
        except BaseException:
            self._writer.close()
            raise

    def _outcomes(self, event: WatchEvent) -> list:
        writer = self._writer
        if event.status == "broken":
            try:
                digest = hash_file(event.path)
            except OSError:
                digest = ""
            failure = ShotFailure(ShotKey(str(event.path), digest, -1), "FrameFileError", event.reason)
            if failure.key in writer.failed and not self.retry_failed:
                self.counts["skipped_failed"] += 1
                return []
            return [failure]
        plan = plan_shots([event.path], done=writer.done, failed=writer.failed, retry_failed=self.retry_failed,
                          stored=writer.stored_digests)
        self.counts["skipped_done"] += plan.n_done_before
        self.counts["skipped_failed"] += plan.n_failed_before
        self.counts["skipped_same"] += plan.n_same_before
        shots = []
        for key in plan.tasks:
            raise_if_interrupted()
            shots.append(self._reconstruct(key))
        # the shots of one file are classified together (pooled threshold policy)
        return list(plan.failures) + classify_records(shots, self.calibration)

    def step(self, *, on_shot=None, max_files: int | None = None) -> list:
        """Poll the folder once and handle the files that became complete.

        Parameters
        ----------
        on_shot : callable, optional
            ``on_shot(outcome, stats)`` after each shot is written.
        max_files : int, optional
            Stop handling files once this many were handled in total (the others stay
            queued for the next step).

        Returns
        -------
        list of ShotRecord or ShotFailure
            What this step wrote, in order.
        """
        done = []
        self._queue.extend(self.watcher.poll())
        while self._queue and (max_files is None or self.counts["files"] < max_files):
            event = self._queue.popleft()
            self.counts["files"] += 1
            outcomes = self._outcomes(event)
            for position, outcome in enumerate(outcomes):
                raise_if_interrupted()
                try:
                    if isinstance(outcome, ShotFailure):
                        self._writer.record_failure(outcome.key, error=outcome.error, reason=outcome.reason)
                    elif not self._writer.append(outcome):
                        if self._writer.same_frame_stored(outcome.key, outcome.frame_digest):
                            self.counts["skipped_same"] += 1
                        continue
                except ExportError as exc:
                    missing = [o.key for o in outcomes[position:]]
                    raise type(exc)(f"{exc}; not written: {describe_keys(missing)}. The run file keeps its "
                                    f"{self._writer.n_shots} frames: free space (or fix the cause) and run the "
                                    "same command again to continue") from exc
                if isinstance(outcome, ShotFailure):
                    self.counts["failed"] += 1
                    self._examples.append(_describe_failure(outcome))
                else:
                    self.counts["new"] += 1
                self.stats.add(outcome)
                done.append(outcome)
                if on_shot is not None:
                    on_shot(outcome, self.stats)
        return done

    def close(self) -> None:
        self._reconstruct.close()
        self._writer.close()

    def summary(self, *, interrupted: bool = False) -> BatchSummary:
        """Summary of the run file and of this watch so far (call after :meth:`close`)."""
        summary = summarize_run(self.out, self.calibration, counts=self.counts,
                                seconds=time.perf_counter() - self._t_start, workers="this process",
                                failure_examples=self._examples)
        if interrupted:
            summary = replace(summary, warnings=(*summary.warnings, INTERRUPTED_NOTE))
        return summary

    def __enter__(self) -> "LiveRun":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def watch_folder(folder, *, calibration, out, interval: float = 0.5, max_files: int | None = None,
                 timeout: float | None = None, include_existing: bool = True, on_shot=None,
                 retry_failed: bool = False, metadata: dict | None = None, sleep=time.sleep,
                 settle: float = DEFAULT_SETTLE_SECONDS) -> BatchSummary:
    """Reconstruct frame files as they appear in ``folder`` and append them to a run file.

    Parameters
    ----------
    folder : str or PathLike
        Folder the camera writes to.
    calibration : Calibration or str or PathLike
        The calibration, or its JSON file.
    out : str or PathLike
        The run file (created, or resumed: shots already in it are skipped).
    interval : float
        Seconds between polls of the folder.
    max_files : int, optional
        Stop after this many files were handled (ready or broken).
    timeout : float, optional
        Stop when no new file was handled for this many seconds.
    include_existing : bool
        Also reconstruct files present when the watch starts (default True).
    on_shot : callable, optional
        ``on_shot(outcome, stats)`` after each shot, with a ShotRecord or ShotFailure and the
        :class:`RunningStats`.
    retry_failed : bool
        Try files again that failed in an earlier run of the same run file.
    metadata : dict, optional
        Stored with the run file when it is created.
    sleep : callable
        Waits between polls (tests may replace it).
    settle : float
        Seconds a file must stay unchanged before it is taken (see :class:`FolderWatcher`).

    Returns
    -------
    BatchSummary
        Also when stopped with Ctrl-C: the KeyboardInterrupt is caught, the run file closed
        and the summary returned with ``interrupted`` in its warnings.
    """
    interrupted = False
    with LiveRun(folder, calibration=calibration, out=out, include_existing=include_existing,
                 retry_failed=retry_failed, metadata=metadata, settle=settle) as live:
        last_activity = time.monotonic()
        try:
            with interrupt_guard():
                while True:
                    handled = live.counts["files"]
                    live.step(on_shot=on_shot, max_files=max_files)
                    if live.counts["files"] != handled:
                        last_activity = time.monotonic()
                    if max_files is not None and live.counts["files"] >= max_files:
                        break
                    if timeout is not None and time.monotonic() - last_activity > timeout:
                        break
                    raise_if_interrupted()
                    sleep(interval)
                    raise_if_interrupted()
        except KeyboardInterrupt:
            interrupted = True
    return live.summary(interrupted=interrupted)
