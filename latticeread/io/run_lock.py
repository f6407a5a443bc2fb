"""One writer per results file: an advisory lock file beside it, holding the owner's pid.

Before a run file is created or opened for writing, the writer takes an exclusive
``flock`` on ``.<name>.lock`` in the same folder and writes ``pid host`` into it. The
kernel drops the lock when the owner exits for any reason (SIGKILL included), so a lock
file left behind by a dead process is stale by construction and the next writer takes it
over. A second writer that finds the lock held stops with
:class:`~latticeread.errors.ExportError` naming the owner's pid. Readers never take the
lock: they open the run file in HDF5's single-writer/multiple-reader mode.
"""

from __future__ import annotations

import errno
import fcntl
import logging
import os
import socket
import time
from pathlib import Path

from latticeread.errors import ExportError

from .atomic import describe_os_error

__all__ = ["RunFileLock", "lock_path_for"]

log = logging.getLogger(__name__)

#: How long a refused writer waits for the lock holder to write its pid into the lock file
#: (seconds), in this many looks.
_OWNER_WAIT_SECONDS = 0.5
_OWNER_WAIT_STEPS = 50


def lock_path_for(path) -> Path:
    """The lock file of a results file: ``run.h5`` -> ``.run.h5.lock`` in the same folder."""
    path = Path(os.fspath(path))
    return path.with_name(f".{path.name}.lock")


def _read_owner(fd: int) -> str:
    try:
        text = os.pread(fd, 200, 0).decode("utf-8", "replace").strip()
    except OSError:
        return ""
    return text


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunFileLock:
    """Exclusive writer lock of one results file.

    Parameters
    ----------
    path : str or PathLike
        The results file (the lock file is :func:`lock_path_for` of it).

    Notes
    -----
    Use :meth:`acquire` / :meth:`release` or the context manager. The lock file is removed
    on release; a lock file of a killed writer stays behind and is taken over by the next
    writer (its pid is logged).
    """

    def __init__(self, path):
        self.path = Path(os.fspath(path))
        self.lock_path = lock_path_for(self.path)
        self._fd: int | None = None

    @property
    def held(self) -> bool:
        return self._fd is not None

    def acquire(self) -> None:
        """Take the lock or raise :class:`ExportError` naming the process that holds it."""
        if self._fd is not None:
            return
        for _ in range(10):
            try:
                fd = os.open(self.lock_path, os.O_RDWR | os.O_CREAT, 0o666)
            except OSError as exc:
                raise ExportError(describe_os_error(exc, self.path)) from exc
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                # The holder writes its pid just after taking the lock: a writer that started at
                # the same instant may look in between (and find the file empty, or the pid of a
                # dead earlier writer); give the holder a moment to name itself.
                owner = _read_owner(fd)
                for _ in range(_OWNER_WAIT_STEPS):
                    pid = owner.split()[0] if owner else ""
                    if pid.isdigit() and _pid_alive(int(pid)):
                        break
                    time.sleep(_OWNER_WAIT_SECONDS / _OWNER_WAIT_STEPS)
                    owner = _read_owner(fd)
                os.close(fd)
                if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    who = f"process {owner.split()[0]}" if owner else "another process"
                    raise ExportError(
                        f"the results file {self.path} is being written by {who} (lock file {self.lock_path}); "
                        "only one program may write it at a time: wait for that run to end or choose "
                        "another output file") from None
                raise ExportError(f"cannot lock {self.path} for writing: {exc.strerror or exc}") from exc
            # The previous owner may have removed the lock file between our open and flock:
            # then we hold a lock on a deleted file and must start again.
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.lock_path))
            except FileNotFoundError:
                same = False
            if not same:
                os.close(fd)
                continue
            previous = _read_owner(fd)
            if previous:
                pid = previous.split()[0]
                alive = pid.isdigit() and int(pid) != os.getpid() and _pid_alive(int(pid))
                log.info("taking over the lock of %s left by process %s (%s)", self.path, pid,
                         "no longer holding it" if alive else "no longer running")
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()} {socket.gethostname()}\n".encode(), 0)
            self._fd = fd
            return
        raise ExportError(f"cannot lock {self.path} for writing: its lock file {self.lock_path} keeps changing")

    def release(self) -> None:
        """Remove the lock file and drop the lock (safe to call twice)."""
        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            os.unlink(self.lock_path)
        except OSError:
            pass
        finally:
            os.close(fd)

    def __enter__(self) -> "RunFileLock":
        self.acquire()
        return self

    def __exit__(self, *exc) -> None:
        self.release()
