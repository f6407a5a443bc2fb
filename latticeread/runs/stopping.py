"""Stopping long runs: Ctrl-C that is never lost, and helper processes that die with the run.

* :func:`interrupt_guard` installs a SIGINT handler for the duration of a run that both
  raises :class:`KeyboardInterrupt` (the usual immediate stop) and remembers the request.
  Python drops an exception raised inside a weakref callback or a ``__del__`` method (it
  only prints "Exception ignored in ..."), so a Ctrl-C landing there used to vanish and the
  run went on to the end; the run loop calls :func:`raise_if_interrupted` between shots (and
  at least every :data:`POLL_SECONDS` while it waits) and stops anyway.
* :func:`die_with_parent` asks Linux to send SIGKILL to the calling process when its
  parent dies (``prctl(PR_SET_PDEATHSIG)``, through ctypes), so worker processes never
  outlive a killed run. Elsewhere it does nothing.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import logging
import os
import signal
import sys
import threading

__all__ = ["POLL_SECONDS", "interrupt_guard", "raise_if_interrupted", "interrupted", "die_with_parent"]

log = logging.getLogger(__name__)

#: Longest wait of a run loop before it looks at a pending Ctrl-C again (seconds).
POLL_SECONDS = 0.2

_REQUESTED = threading.Event()
_PR_SET_PDEATHSIG = 1


def interrupted() -> bool:
    """True once Ctrl-C was pressed inside :func:`interrupt_guard`."""
    return _REQUESTED.is_set()


def raise_if_interrupted() -> None:
    """Raise :class:`KeyboardInterrupt` if Ctrl-C was pressed, even if it was swallowed."""
    if _REQUESTED.is_set():
        raise KeyboardInterrupt


def _handler(signum, frame):
    _REQUESTED.set()
    raise KeyboardInterrupt


@contextlib.contextmanager
def interrupt_guard():
    """Remember every Ctrl-C of the block; restore the previous SIGINT handler afterwards.

    Outside the main thread (a GUI worker) signals cannot be handled, and the block runs
    unchanged.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _REQUESTED.clear()
    previous = signal.signal(signal.SIGINT, _handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        _REQUESTED.clear()


def die_with_parent(sig: int = signal.SIGKILL) -> bool:
    """Have the kernel send ``sig`` to this process when its parent dies (Linux only).

    Returns
    -------
    bool
        True when the request was registered. If the parent already died before the
        call, the process exits at once (status 1).
    """
    if not sys.platform.startswith("linux"):
        return False
    parent = os.getppid()
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        ok = libc.prctl(_PR_SET_PDEATHSIG, int(sig), 0, 0, 0) == 0
    except (OSError, AttributeError):
        ok = False
    if not ok:
        log.debug("prctl(PR_SET_PDEATHSIG) is not available")
        return False
    if os.getppid() != parent or parent == 1:  # the parent died before the request took effect
        os._exit(1)
    return True
