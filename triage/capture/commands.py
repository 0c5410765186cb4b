"""The allow-list: the only five commands ``triage capture`` can send to a drive.

Read-only by construction: every command is a constant built once at import from the standard's
table, the set is frozen, and the two functions that reach the kernel (``DeviceIO.sg_io`` and
``DeviceIO.nvme_admin`` in :mod:`triage.capture.deviceio`) both call :func:`require_allowed`
before any ioctl. Nothing in this package can build a write, a SET FEATURES, a SMART ENABLE or a
self-test and have it reach a drive; the tests try.
"""

from __future__ import annotations

import errno
from dataclasses import dataclass
from enum import Enum
from typing import TYPE_CHECKING

from triage.capture import nvme, sat
from triage.capture.sense import Outcome
from triage.capture.sgio import judge

if TYPE_CHECKING:  # pragma: no cover
    from triage.capture.deviceio import DeviceIO, Handle


@dataclass(frozen=True)
class Command:
    """One permitted read: ``request`` is the 16-byte CDB (ata) or the 72-byte admin command
    image with a zero data address (nvme); ``length`` is how many bytes it reads."""

    name: str
    bus: str  # "ata" | "nvme"
    request: bytes
    length: int


IDENTIFY_DEVICE = Command("IDENTIFY DEVICE", "ata", sat.identify_device_cdb(), 512)
SMART_READ_DATA = Command("SMART READ DATA", "ata", sat.smart_read_data_cdb(), 512)
SMART_READ_THRESHOLDS = Command("SMART READ THRESHOLDS", "ata", sat.smart_read_thresholds_cdb(), 512)
NVME_IDENTIFY_CONTROLLER = Command(
    "Identify Controller", "nvme", nvme.identify_controller_command(), nvme.IDENTIFY_BYTES
)
NVME_SMART_HEALTH_LOG = Command(
    "Get Log Page 02h", "nvme", nvme.smart_health_log_command(), nvme.HEALTH_LOG_BYTES
)

#: Exactly these five; frozen so nothing adds to it at run time.
ALLOWED: frozenset[Command] = frozenset(
    {IDENTIFY_DEVICE, SMART_READ_DATA, SMART_READ_THRESHOLDS, NVME_IDENTIFY_CONTROLLER, NVME_SMART_HEALTH_LOG}
)
_ALLOWED_REQUESTS: frozenset[tuple[str, bytes, int]] = frozenset((c.bus, c.request, c.length) for c in ALLOWED)


class CommandRefused(RuntimeError):
    """Something tried to send a command outside the allow-list (a bug, never a drive problem).

    Deliberately not an ``OSError``: it must never be mistaken for a device error and swallowed
    by the per-device error handling."""


def require_allowed(bus: str, request: bytes, length: int) -> None:
    """Raise :class:`CommandRefused` unless these exact bytes are one of the five reads."""
    if (bus, bytes(request), length) not in _ALLOWED_REQUESTS:
        raise CommandRefused(
            f"refused to send a {bus} command outside the read-only allow-list "
            f"(request {bytes(request)[:16].hex()}..., {length} bytes)"
        )


class Failure(Enum):
    """Why one device could not be captured (shown on stderr, counted in the exit code)."""

    NOT_SUPPORTED = "not supported"
    ABORTED = "command aborted"
    GONE = "device not present"
    NOT_READY = "not ready"
    MEDIUM_ERROR = "medium error"
    HARDWARE_ERROR = "hardware error"
    IO_ERROR = "I/O error"
    BAD_DATA = "bad data"


_FAILURE_OF_OUTCOME = {
    Outcome.NOT_SUPPORTED: Failure.NOT_SUPPORTED,
    Outcome.ABORTED: Failure.ABORTED,
    Outcome.NOT_READY: Failure.NOT_READY,
    Outcome.MEDIUM_ERROR: Failure.MEDIUM_ERROR,
    Outcome.HARDWARE_ERROR: Failure.HARDWARE_ERROR,
    Outcome.OTHER: Failure.IO_ERROR,
    Outcome.RETRY: Failure.IO_ERROR,
}


class DeviceError(Exception):
    """One command on one device failed; ``failure`` says how, ``detail`` has the codes."""

    def __init__(self, command: str, failure: Failure, detail: str):
        self.command = command
        self.failure = failure
        self.detail = detail
        super().__init__(f"{command}: {failure.value}" + (f" ({detail})" if detail else ""))


# A reset or a busy device reports once and then runs the command: one retry, no more
# (common practice, no source).
RETRIES = 1


def issue(io: "DeviceIO", handle: "Handle", command: Command) -> bytes:
    """Send one allow-listed command and return its data, or raise :class:`DeviceError`."""
    require_allowed(command.bus, command.request, command.length)
    for attempt in range(RETRIES + 1):
        try:
            if command.bus == "ata":
                result = io.sg_io(handle, command.request, command.length)
                verdict = judge(result, command.length)
                outcome, detail, data = verdict.outcome, verdict.detail, result.data
            else:
                status, data = io.nvme_admin(handle, command.request, command.length)
                outcome, detail = status.outcome(), (status.describe() if status.value else "")
        except OSError as exc:
            raise DeviceError(command.name, failure_of_os_error(exc), os_error_text(exc)) from exc
        if outcome is Outcome.OK:
            return data
        if outcome is not Outcome.RETRY or attempt == RETRIES:
            break
    if command == SMART_READ_DATA and outcome is Outcome.ABORTED:
        detail += "; the drive aborts SMART reads while SMART is disabled"
    raise DeviceError(command.name, _FAILURE_OF_OUTCOME[outcome], detail)


# errno values meaning the device node no longer leads to a device (hot-unplug, controller reset).
_GONE_ERRNOS = {errno.ENODEV, errno.ENXIO, errno.ENOENT}


def failure_of_os_error(exc: OSError) -> Failure:
    """Classify an error from open() or ioctl() on a device node."""
    if exc.errno in _GONE_ERRNOS:
        return Failure.GONE
    if exc.errno in (errno.ENOTTY, errno.EINVAL, errno.EOPNOTSUPP):
        # ENOTTY: the node does not take this ioctl (not a SCSI or NVMe device).
        return Failure.NOT_SUPPORTED
    return Failure.IO_ERROR


def os_error_text(exc: OSError) -> str:
    name = errno.errorcode.get(exc.errno or 0, "")
    return f"{name}: {exc.strerror}" if name and exc.strerror else str(exc)
