"""Exit codes of every ``triage`` command: the one place they are defined.

Cron and systemd act on these. When several apply to one run, the lowest-numbered non-zero code
in this list wins except that ``FAILURE`` always wins (a run that failed says so first).
"""

from __future__ import annotations

from enum import IntEnum


class Exit(IntEnum):
    OK = 0  #: done; nothing needs attention
    FAILURE = 1  #: the run failed (a bug, an unreadable store, a file that cannot be opened)
    USAGE = 2  #: bad command-line options or arguments
    INPUT_REJECTED = 3  #: some input lines were quarantined; every good line was stored
    NEW_FLAGS = 4  #: the run raised flags on drives that were not flagged before
    LOCKED = 5  #: another run holds the store's lock; nothing was done
    DEVICE_ERRORS = 6  #: capture: some devices could not be read; the others were captured
    NEEDS_ROOT = 7  #: capture: the drive pass-through commands need root

    @staticmethod
    def combine(*codes: "Exit") -> "Exit":
        """The single code for a run where several outcomes happened (see module docstring)."""
        present = [c for c in codes if c != Exit.OK]
        if not present:
            return Exit.OK
        if Exit.FAILURE in present:
            return Exit.FAILURE
        return min(present)
