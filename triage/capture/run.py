"""One capture run on one host: read every drive, write one capture file atomically.

:func:`capture_host` is the library behind ``triage capture``. It needs root (the pass-through
ioctls do), reads each device with the five allow-listed commands, looks the drive up in the
slot / group map, and writes ``<host>-<YYYY-MM-DD>.jsonl.gz`` (UTC date of the run) in the output
directory. The file appears whole or not at all: it is written under a dot-name in the same
directory, flushed to disk, then renamed over the final name, so the central ingest (which
ignores dot-files) never reads half a file. A second run on the same day replaces the file.

A device that fails does not stop the run: it is reported (stderr, exit code) and the others are
written. The capture file layout is the input contract in docs/capture-format.md.
"""

from __future__ import annotations

import gzip
import json
import os
import socket
import tempfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterable

from triage.capture.commands import (
    IDENTIFY_DEVICE,
    NVME_IDENTIFY_CONTROLLER,
    NVME_SMART_HEALTH_LOG,
    SMART_READ_DATA,
    SMART_READ_THRESHOLDS,
    DeviceError,
    Failure,
    failure_of_os_error,
    issue,
    os_error_text,
)
from triage.capture.deviceio import DeviceIO
from triage.capture.devices import Skipped, Target
from triage.capture.groupmap import GroupMap, Placement
from triage.exitcodes import Exit
from triage.formats import (
    LayoutError,
    parse_ata_identify,
    parse_nvme_identify,
    parse_smart_data,
    parse_smart_thresholds,
)

CAPTURE_VERSION = 1


class NeedsRoot(PermissionError):
    """The run was not started as root; nothing was read."""


class OutputError(OSError):
    """The capture file could not be written; nothing was replaced."""


@dataclass(frozen=True)
class DeviceFailure:
    device: str
    command: str
    failure: Failure
    detail: str

    def describe(self) -> str:
        text = f"{self.device}: {self.command}: {self.failure.value}"
        return text + (f" ({self.detail})" if self.detail else "")


@dataclass
class CaptureResult:
    """What one run did: the file written (None when nothing was captured) and every problem."""

    path: Path | None
    host: str
    captured: list[str] = field(default_factory=list)
    failures: list[DeviceFailure] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    skipped: list[Skipped] = field(default_factory=list)

    @property
    def exit_code(self) -> Exit:
        """FAILURE when no drive was read at all (nothing captured is not "some drives unreadable",
        which a service unit may accept as success); DEVICE_ERRORS when some were."""
        if self.path is None:
            return Exit.FAILURE
        return Exit.DEVICE_ERRORS if self.failures else Exit.OK


def require_root(geteuid: Callable[[], int] | None = None) -> None:
    """Raise :class:`NeedsRoot` unless the effective user is root (``geteuid`` for tests)."""
    if (geteuid or os.geteuid)() != 0:
        raise NeedsRoot(
            "capture needs root: the drive pass-through ioctls (SG_IO, NVMe admin) are refused "
            "to other users; run it from root's crontab or a root systemd service"
        )


def capture_file_name(host: str, when: datetime) -> str:
    """``<host>-<YYYY-MM-DD>.jsonl.gz`` with the UTC date of ``when``."""
    if not host or "/" in host or host.startswith(".") or "\x00" in host:
        raise ValueError(f"host name {host!r} cannot be used in a file name")
    return f"{host}-{when.astimezone(timezone.utc):%Y-%m-%d}.jsonl.gz"


def rfc3339_utc(moment: datetime) -> str:
    """RFC 3339 §5.6 date-time in UTC with the "Z" offset; microseconds (time-secfrac) when the
    clock has them, so two reads of one drive within a second stay in order."""
    utc = moment.astimezone(timezone.utc)
    return utc.isoformat(timespec="microseconds" if utc.microsecond else "seconds").replace("+00:00", "Z")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def capture_host(
    targets: Iterable[Target],
    out_dir: Path,
    group_map: GroupMap | None = None,
    *,
    io: DeviceIO | None = None,
    hostname: str | None = None,
    now: Callable[[], datetime] = _utc_now,
    geteuid: Callable[[], int] | None = None,
) -> CaptureResult:
    """Read ``targets`` and write this run's capture file into ``out_dir``.

    Raises :class:`NeedsRoot` before touching any device when not root, ``FileNotFoundError``
    when ``out_dir`` is not a directory and :class:`OutputError` when the file cannot be written.
    """
    require_root(geteuid)
    out_dir = Path(out_dir)
    if not out_dir.is_dir():
        raise FileNotFoundError(f"output directory {out_dir} does not exist")
    io = io if io is not None else DeviceIO()
    group_map = group_map if group_map is not None else GroupMap()
    host = hostname if hostname is not None else socket.gethostname()
    started = now()
    name = capture_file_name(host, started)  # validates the host before any device is read

    result = CaptureResult(path=None, host=host)
    records = []
    for target in targets:
        try:
            record, warnings = read_device(io, target, host, group_map, now)
        except DeviceError as exc:
            result.failures.append(DeviceFailure(target.path, exc.command, exc.failure, exc.detail))
            continue
        records.append(record)
        result.captured.append(target.path)
        result.warnings += [f"{target.path}: {w}" for w in warnings]

    if records:
        result.path = write_capture_file(records, out_dir / name)
    return result


def read_device(
    io: DeviceIO,
    target: Target,
    host: str,
    group_map: GroupMap,
    now: Callable[[], datetime] = _utc_now,
) -> tuple[dict, list[str]]:
    """One device -> (capture record, warnings); :class:`DeviceError` when it cannot be read."""
    try:
        handle = io.open(target.path)
    except OSError as exc:
        raise DeviceError("open", failure_of_os_error(exc), os_error_text(exc)) from exc
    warnings: list[str] = []
    try:
        if target.bus == "ata":
            payloads, placement = _read_ata(io, handle, group_map, warnings)
        elif target.bus == "nvme":
            payloads, placement = _read_nvme(io, handle, group_map)
        else:
            raise DeviceError("open", Failure.NOT_SUPPORTED, f"unknown bus {target.bus!r}")
    finally:
        try:
            io.close(handle)
        except OSError:
            pass  # the data is already read; a vanished node may refuse close()
    record = {
        "capture": CAPTURE_VERSION,
        "host": host,
        "device": target.path,
        "slot": placement.slot,
        "group": placement.group,
        "taken_at": rfc3339_utc(now()),
        "bus": target.bus,
        **{key: value.hex() for key, value in payloads.items()},
    }
    return record, warnings


def _read_ata(io: DeviceIO, handle, group_map: GroupMap, warnings: list[str]):
    identify = issue(io, handle, IDENTIFY_DEVICE)
    _require_not_blank(identify, IDENTIFY_DEVICE.name)
    if identify[1] & 0x80:
        # ACS-4 IDENTIFY DEVICE word 0 bit 15: 0 = ATA device. A packet device answered.
        raise DeviceError(IDENTIFY_DEVICE.name, Failure.NOT_SUPPORTED, "not an ATA device (word 0 bit 15 set)")
    try:
        identity = parse_ata_identify(identify)
    except LayoutError as exc:
        raise DeviceError(IDENTIFY_DEVICE.name, Failure.BAD_DATA, str(exc)) from exc

    smart = issue(io, handle, SMART_READ_DATA)
    try:
        parse_smart_data(smart)  # the checksum ingest would reject it for
    except LayoutError as exc:
        raise DeviceError(SMART_READ_DATA.name, Failure.BAD_DATA, str(exc)) from exc

    payloads = {"identify": identify, "smart": smart}
    try:
        thresholds = issue(io, handle, SMART_READ_THRESHOLDS)
        parse_smart_thresholds(thresholds)
        payloads["thresholds"] = thresholds
    except DeviceError as exc:
        # The command is obsolete since ACS-2; a drive that lacks it is still worth capturing.
        if exc.failure not in (Failure.NOT_SUPPORTED, Failure.ABORTED):
            raise
        warnings.append(f"captured without thresholds: {exc}")
    except LayoutError as exc:
        warnings.append(f"captured without thresholds: {exc}")
    return payloads, group_map.lookup(identity.serial, identity.wwn)


def _read_nvme(io: DeviceIO, handle, group_map: GroupMap):
    identify = issue(io, handle, NVME_IDENTIFY_CONTROLLER)
    _require_not_blank(identify, NVME_IDENTIFY_CONTROLLER.name)
    try:
        identity = parse_nvme_identify(identify)
    except LayoutError as exc:
        raise DeviceError(NVME_IDENTIFY_CONTROLLER.name, Failure.BAD_DATA, str(exc)) from exc
    health = issue(io, handle, NVME_SMART_HEALTH_LOG)
    placement: Placement = group_map.lookup(identity.serial, None)
    return {"identify": identify, "health": health}, placement


def _require_not_blank(data: bytes, command: str) -> None:
    # Some USB bridges and broken translation layers answer GOOD with a zero-filled buffer.
    if not any(data):
        raise DeviceError(command, Failure.BAD_DATA, "the device returned all zero bytes")


def write_capture_file(records: list[dict], path: Path) -> Path:
    """Write JSON Lines, gzip, atomically: temp dot-file in the same directory, fsync, rename.

    The rename is atomic within one file system (POSIX rename(2)); the directory is fsynced
    afterwards so the new name survives a crash. On any error the temp file is removed and
    whatever was at ``path`` before is untouched.
    """
    path = Path(path)
    fd, temp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    temp = Path(temp_name)
    try:
        with os.fdopen(fd, "wb") as raw:
            # mkstemp makes the file 0600; the central collector may run as another user.
            os.fchmod(raw.fileno(), 0o644)
            with gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0) as gz:
                for record in records:
                    gz.write(json.dumps(record, separators=(",", ":")).encode("ascii"))
                    gz.write(b"\n")
            raw.flush()
            os.fsync(raw.fileno())
        os.replace(temp, path)
    except BaseException as exc:
        temp.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise OutputError(exc.errno, f"cannot write {path}: {exc.strerror or exc}") from exc
        raise
    _fsync_dir(path.parent)
    return path


def _fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on a directory; the rename itself is done
    finally:
        os.close(fd)
