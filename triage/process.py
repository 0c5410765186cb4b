"""Helper processes that never outlive the run that started them.

When the main process is killed outright (SIGKILL from an operator or the out-of-memory killer),
nothing in it runs again, so its pool workers must be told by the kernel: on Linux a child asks
for a signal when its parent dies with ``prctl(PR_SET_PDEATHSIG)`` (prctl(2)). The request is
made from the child itself, so the parent may already be gone by then: the child then checks
that its parent is still the one that started it, and leaves if not. Elsewhere (no prctl) the
worker falls back to that check alone, which is better than nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import signal

#: prctl(2) option number from <linux/prctl.h>.
PR_SET_PDEATHSIG = 1


def die_with_parent(parent_pid: int) -> None:
    """Pool-worker initializer: SIGKILL this process when its parent dies (Linux)."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):
        pass  # not Linux: only the check below
    if os.getppid() != parent_pid:  # the parent died before the request took effect
        os._exit(1)


def process_gone(pid: int) -> bool:
    """True when no process has id ``pid`` (its temporary files can go: nothing will finish them)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False  # alive, another user's
    return False
