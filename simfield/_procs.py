"""Worker processes that die with their parent.

:func:`die_with_parent` is the ``initializer`` of the tile and detection process pools: a
worker whose parent is killed (``kill -9``, out of memory) exits at once instead of rendering
on for tens of seconds holding hundreds of MB. On Linux the kernel sends the worker SIGKILL when
its parent thread dies (``prctl(PR_SET_PDEATHSIG)``); elsewhere a daemon thread polls
``os.getppid()``.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading

__all__ = ["die_with_parent"]

_PR_SET_PDEATHSIG = 1  # <linux/prctl.h>
_POLL_S = 0.5  # fallback: seconds between checks of the parent


def _set_pdeathsig() -> bool:
    """Ask the kernel for SIGKILL when the parent dies; False where prctl is unavailable."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch_parent(parent: int) -> None:
    def watch():
        while True:
            if os.getppid() != parent:
                os._exit(1)
            threading.Event().wait(_POLL_S)

    threading.Thread(target=watch, name="simfield-parent-watch", daemon=True).start()


def die_with_parent(parent: int | None = None) -> None:
    """Make this (worker) process exit when its parent dies.

    Parameters
    ----------
    parent : int, optional
        Process id of the expected parent; default ``os.getppid()`` now. If the parent is
        already gone (it died between the fork and this call), exit at once.
    """
    expected = os.getppid() if parent is None else parent
    if not _set_pdeathsig():
        _watch_parent(expected)
    # the parent may have died before prctl took effect: then we were re-parented already
    if os.getppid() != expected:
        os._exit(1)
