"""Atomic file writing: a file is either the complete new version or untouched.

Every writer of latticeread goes through :func:`atomic_write` (for Python file objects) or
:func:`atomic_path` (for libraries such as h5py that open the file themselves). The data
are written to a hidden temporary file in the *same* folder as the target, flushed to disk
with ``fsync`` and then moved over the target with :func:`os.replace`, which is atomic on
POSIX and Windows file systems. If anything fails before the rename (an exception in the
caller's code, a full disk, a read-only folder) the temporary file is removed and an
existing target keeps its old content.

Operating-system errors are turned into :class:`latticeread.errors.ExportError` with a
message that names the file and the reason ("cannot write /data/run.csv: the folder
/data is read-only").
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import re
import secrets
import shutil
import stat
import time
from collections.abc import Iterable, Iterator
from pathlib import Path

from latticeread.errors import ExportError, LatticeReadError

__all__ = ["atomic_write", "atomic_path", "describe_os_error", "DiskFullError", "reserve_space",
           "clean_stale_temps", "temp_name"]

log = logging.getLogger(__name__)


def describe_os_error(exc: OSError, path: Path) -> str:
    """Plain-language reason why ``path`` could not be written.

    Parameters
    ----------
    exc : OSError
        The error raised by the operating system.
    path : Path
        The file the user asked for (not the temporary file).

    Returns
    -------
    str
        ``"cannot write PATH: REASON"``.
    """
    folder = path.parent
    code = getattr(exc, "errno", None)
    if code in (errno.EACCES, errno.EPERM, errno.EROFS):
        reason = f"the folder {folder} is read-only (permission denied)"
    elif code in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        reason = f"the disk holding {folder} is full (or the quota is exhausted)"
    elif code == errno.ENOENT:
        reason = f"the folder {folder} does not exist"
    elif code == errno.ENOTDIR:
        reason = f"{_first_file_ancestor(folder)} is a file, not a folder"
    elif code == errno.EISDIR:
        reason = "a folder of that name already exists"
    elif code == errno.EFBIG:
        reason = "the file is too large for this file system"
    elif code == errno.ENAMETOOLONG:
        reason = "the file name is too long"
    else:
        reason = exc.strerror or str(exc)
    return f"cannot write {path}: {reason}"


class DiskFullError(ExportError):
    """Not enough free disk space to write the next block of an output file.

    Raised *before* anything is written, so the file keeps everything committed so far.
    """


_NO_SPACE = (errno.ENOSPC, getattr(errno, "EDQUOT", -1), errno.EFBIG)


def reserve_space(path, end: int) -> None:
    """Give the first ``end`` bytes of the file ``path`` real disk blocks, or raise.

    Writers call this before each block (with the file's current size plus an upper bound
    of what the block adds), so that a full disk stops the run *between* blocks with a
    clear message instead of failing inside the HDF5 library in the middle of a write.
    Uses ``posix_fallocate`` where available (the space is then held by the file); on
    other systems it compares with the free space of the file system.

    Parameters
    ----------
    path : str or PathLike
        An existing file.
    end : int
        Bytes from the start of the file that must be backed by disk blocks.

    Raises
    ------
    DiskFullError
        The disk (or quota, or file size limit) cannot hold ``end`` bytes.
    """
    path = Path(os.fspath(path))
    end = int(end)
    if hasattr(os, "posix_fallocate"):
        try:
            fd = os.open(path, os.O_WRONLY)
        except OSError as exc:
            raise ExportError(describe_os_error(exc, path)) from exc
        try:
            os.posix_fallocate(fd, 0, end)
            return
        except OSError as exc:
            if exc.errno in _NO_SPACE:
                raise DiskFullError(_full_message(path, end)) from exc
            if exc.errno not in (errno.EOPNOTSUPP, errno.EINVAL, getattr(errno, "ENOTSUP", -1)):
                raise ExportError(describe_os_error(exc, path)) from exc
        finally:
            os.close(fd)
    try:
        size = path.stat().st_size
        free = shutil.disk_usage(path.parent).free
    except OSError as exc:
        raise ExportError(describe_os_error(exc, path)) from exc
    if end - size > free:
        raise DiskFullError(_full_message(path, end))


def _full_message(path: Path, end: int) -> str:
    try:
        free = shutil.disk_usage(path.parent).free
        detail = f"{free / 2**20:.1f} MiB free"
    except OSError:
        detail = "free space unknown"
    return (f"the disk holding {path.parent} is full ({detail}; the next block needs up to "
            f"{max(end - _size(path), 0) / 2**20:.1f} MiB more)")


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0


def temp_name(path) -> Path:
    """Hidden temporary name beside ``path`` that records the writer's pid.

    ``run.csv`` -> ``.run.csv.<pid>-<random>.tmp``; :func:`clean_stale_temps` removes such
    files of processes that no longer run.
    """
    path = Path(os.fspath(path))
    return path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.tmp")


_TEMP_WITH_PID = re.compile(r"^\..+\.(\d+)-[0-9a-f]{8}\.tmp$")
#: The writer lock of such a temporary file (an HDF5 output is written as a run file under its
#: temporary name, and a run file's writer takes ``.<name>.lock``): same pid, removed with it.
_TEMP_LOCK_WITH_PID = re.compile(r"^\.\..+\.(\d+)-[0-9a-f]{8}\.tmp\.lock$")
#: Temporary names of earlier versions (no pid): removed once they are this old (seconds).
_OLD_TEMP = re.compile(r"^\..+\.([0-9a-f]{8}\.tmp|[A-Za-z0-9_]{8}\.part)$")
_OLD_TEMP_AGE = 3600.0


def _pid_running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def clean_stale_temps(folder) -> list[Path]:
    """Remove hidden temporary files that killed latticeread runs left in ``folder``.

    A temporary file named by :func:`temp_name` is removed when its pid no longer runs, and so
    is the lock file of such a temporary file; temporary files of earlier versions (no pid in
    the name) when older than an hour.
    Files that cannot be removed are left alone.

    Returns
    -------
    list of Path
        The files removed.
    """
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    now = time.time()
    for entry in entries:
        name = entry.name
        if not name.startswith("."):
            continue
        m = _TEMP_WITH_PID.match(name) or _TEMP_LOCK_WITH_PID.match(name)
        try:
            if m:
                stale = int(m.group(1)) != os.getpid() and not _pid_running(int(m.group(1)))
            elif _OLD_TEMP.match(name):
                stale = now - entry.stat().st_mtime > _OLD_TEMP_AGE
            else:
                continue
            if stale and entry.is_file(follow_symlinks=False):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
        except OSError:
            continue
    if removed:
        log.info("removed %d temporary file(s) left by killed runs in %s", len(removed), folder)
    return removed


def _first_file_ancestor(folder: Path) -> Path:
    """The first component of ``folder`` that exists and is not a directory."""
    for parent in [*reversed(folder.parents), folder]:
        if parent.exists() and not parent.is_dir():
            return parent
    return folder


def _check_target(path: Path, protect: Iterable | None) -> None:
    if path.is_dir():
        raise ExportError(f"cannot write {path}: a folder of that name already exists")
    folder = path.parent
    if not folder.exists():
        if any(p.exists() and not p.is_dir() for p in [folder, *folder.parents]):
            raise ExportError(f"cannot write {path}: {_first_file_ancestor(folder)} is a file, not a folder")
        raise ExportError(f"cannot write {path}: the folder {folder} does not exist")
    if not folder.is_dir():
        raise ExportError(f"cannot write {path}: {folder} is a file, not a folder")
    if protect:
        target = path.resolve()
        for item in protect:
            other = Path(item)
            try:
                same = other.resolve() == target or (other.exists() and path.exists() and os.path.samefile(other, path))
            except OSError:
                same = False
            if same:
                raise ExportError(
                    f"refusing to overwrite {path}: it is one of the input frame files; choose another output name")


@contextlib.contextmanager
def atomic_path(path, *, protect: Iterable | None = None) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; move it onto ``path`` when the block succeeds.

    The caller writes the temporary file (e.g. with ``h5py.File(tmp, "w")``) and must close
    it before the block ends. The file is then fsync'ed and renamed over ``path``.

    Parameters
    ----------
    path : str or PathLike
        Final file name.
    protect : iterable of str or PathLike, optional
        Files that must never be overwritten (the input frame files of a run).

    Yields
    ------
    Path
        Temporary file in the same folder (already created, empty).

    Raises
    ------
    ExportError
        The folder is read-only or missing, the disk is full, ``path`` is a folder or a
        protected input file.
    """
    path = Path(os.fspath(path))
    _check_target(path, protect)
    clean_stale_temps(path.parent)
    tmp = temp_name(path)
    try:
        # 0o666 lets the user's umask decide the permissions, like an ordinary new file.
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        os.close(fd)
    except OSError as exc:
        raise ExportError(describe_os_error(exc, path)) from exc
    try:
        yield tmp
        _fsync_file(tmp)
        if path.exists():
            with contextlib.suppress(OSError):
                os.chmod(tmp, stat.S_IMODE(path.stat().st_mode))
        os.replace(tmp, path)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, OSError) and not isinstance(exc, LatticeReadError):
            raise ExportError(describe_os_error(exc, path)) from exc
        raise
    _fsync_dir(path.parent)
    log.debug("wrote %s", path)


@contextlib.contextmanager
def atomic_write(path, mode: str = "wb", *, protect: Iterable | None = None, encoding: str | None = None,
                 newline: str | None = None) -> Iterator:
    """Open a file for writing so that it appears complete or not at all.

    Parameters
    ----------
    path : str or PathLike
        Final file name.
    mode : {"wb", "w"}
        Binary or text mode.
    protect : iterable of str or PathLike, optional
        Files that must never be overwritten (the input frame files of a run).
    encoding, newline : str, optional
        Text mode only; the encoding defaults to UTF-8.

    Yields
    ------
    file object
        Writable file; closed, fsync'ed and renamed onto ``path`` when the block ends
        without an exception. On an exception the temporary file is deleted and ``path``
        keeps its previous content (or stays absent).

    Raises
    ------
    ExportError
        See :func:`atomic_path`; also for write errors such as a full disk.

    Examples
    --------
    >>> with atomic_write("sites.csv", "w") as fh:  # doctest: +SKIP
    ...     fh.write("frame,row,col\\n")
    """
    if mode not in ("w", "wb"):
        raise ValueError(f"atomic_write supports modes 'w' and 'wb', got {mode!r}")
    if "b" not in mode and encoding is None:
        encoding = "utf-8"
    with atomic_path(path, protect=protect) as tmp:
        with open(tmp, mode, encoding=encoding, newline=newline) as fh:
            yield fh
            fh.flush()


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(folder: Path) -> None:
    """Make the rename durable; not possible on every platform, so best effort."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
