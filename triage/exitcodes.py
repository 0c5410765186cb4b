"""Exit codes of every ``triage`` command: the one place they are defined.

Cron and systemd act on these. When several apply to one run, the one that comes first in
``PRECEDENCE`` wins (a failure first; then what leaves the operator blind -- a locked run, drives
that stopped reporting, input that was quarantined -- before news about the drives themselves).
``nightly --summary FILE`` writes every outcome of the run, not only the winning code.
"""

from __future__ import annotations

from enum import IntEnum


class Exit(IntEnum):
    OK = 0  #: done; nothing needs attention
    FAILURE = 1  #: the run failed (a bug, a missing or unreadable store, a file that cannot be opened, capture read no drive)
    USAGE = 2  #: bad command-line options or arguments
    INPUT_REJECTED = 3  #: some input lines were quarantined; every good line was stored
    NEW_FLAGS = 4  #: the run raised flags on drives that were not flagged before
    LOCKED = 5  #: another run holds the store's lock; nothing was done
    DEVICE_ERRORS = 6  #: capture: some devices could not be read; the others were captured
    NEEDS_ROOT = 7  #: capture: the drive pass-through commands need root
    NOT_REPORTING = 8  #: rank/tickets/nightly: drives, hosts or sites stopped reporting, or the newest capture is stale

    @staticmethod
    def combine(*codes: "Exit") -> "Exit":
        """The single code for a run where several outcomes happened (see ``PRECEDENCE``)."""
        present = {c for c in codes if c != Exit.OK}
        return next((c for c in PRECEDENCE if c in present), Exit.OK)


#: Worst first: which code a run reports when several outcomes happened.
PRECEDENCE = (
    Exit.FAILURE, Exit.USAGE, Exit.NEEDS_ROOT, Exit.LOCKED, Exit.NOT_REPORTING, Exit.INPUT_REJECTED,
    Exit.DEVICE_ERRORS, Exit.NEW_FLAGS,
)
