"""NVMe SMART / Health Information log page (Get Log Page, log identifier 02h), 512 bytes.

Standard: NVM Express Base Specification 2.0, 5.16.1.3 "SMART / Health Information (Log
Identifier 02h)" (section number from memory). All multi-byte fields are little-endian. The
structure has no checksum. Fields read here:

=========  ==================================================================================
bytes      meaning
=========  ==================================================================================
0          critical warning, bits 0-5 (see the ``WARN_*`` constants), 6-7 reserved
1-2        composite temperature, kelvin
3          available spare, percent of the spare capacity left
4          available spare threshold, percent
5          percentage used: estimate of life used; may exceed 100 (up to 255)
32-47      data units read, in thousands of 512-byte units (128-bit)
48-63      data units written, same units (128-bit)
64-79      host read commands (128-bit)
80-95      host write commands (128-bit)
96-111     controller busy time, minutes (128-bit)
112-127    power cycles (128-bit)
128-143    power on hours (128-bit)
144-159    unsafe shutdowns (128-bit)
160-175    media and data integrity errors (128-bit)
176-191    number of error information log entries (128-bit)
192-195    warning composite temperature time, minutes (32-bit)
196-199    critical composite temperature time, minutes (32-bit)
=========  ==================================================================================
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from triage.formats import _batch
from triage.formats.errors import require_length

HEALTH_LENGTH = 512

#: One data unit is 1000 units of 512 bytes (the spec's definition, rounded up by the drive).
DATA_UNIT_BYTES = 1000 * 512

# Critical warning bits (byte 0).
WARN_SPARE_BELOW_THRESHOLD = 1 << 0
WARN_TEMPERATURE = 1 << 1
WARN_RELIABILITY_DEGRADED = 1 << 2
WARN_READ_ONLY = 1 << 3
WARN_VOLATILE_BACKUP_FAILED = 1 << 4
WARN_PMR_READ_ONLY = 1 << 5
WARN_DEFINED_BITS = 0x3F

#: Our own short words for the critical warning bits, in bit order.
CRITICAL_WARNING_NAMES = (
    (WARN_SPARE_BELOW_THRESHOLD, "spare-low"),
    (WARN_TEMPERATURE, "temperature"),
    (WARN_RELIABILITY_DEGRADED, "degraded"),
    (WARN_READ_ONLY, "read-only"),
    (WARN_VOLATILE_BACKUP_FAILED, "backup-failed"),
    (WARN_PMR_READ_ONLY, "pmr-read-only"),
)

#: (field, offset, size in bytes), defined once for the parser, builder and batch decoder.
FIELDS = (
    ("critical_warning", 0, 1),
    ("composite_temperature_k", 1, 2),
    ("available_spare_pct", 3, 1),
    ("spare_threshold_pct", 4, 1),
    ("percentage_used", 5, 1),
    ("data_units_read", 32, 16),
    ("data_units_written", 48, 16),
    ("host_read_commands", 64, 16),
    ("host_write_commands", 80, 16),
    ("controller_busy_minutes", 96, 16),
    ("power_cycles", 112, 16),
    ("power_on_hours", 128, 16),
    ("unsafe_shutdowns", 144, 16),
    ("media_errors", 160, 16),
    ("error_log_entries", 176, 16),
    ("warning_temp_minutes", 192, 4),
    ("critical_temp_minutes", 196, 4),
)


@dataclass(frozen=True)
class NvmeHealth:
    """The decoded SMART / Health Information log page (units as in the standard)."""

    critical_warning: int
    composite_temperature_k: int
    available_spare_pct: int
    spare_threshold_pct: int
    percentage_used: int
    data_units_read: int
    data_units_written: int
    host_read_commands: int
    host_write_commands: int
    controller_busy_minutes: int
    power_cycles: int
    power_on_hours: int
    unsafe_shutdowns: int
    media_errors: int
    error_log_entries: int
    warning_temp_minutes: int
    critical_temp_minutes: int


# The dataclass and the layout table must name the same fields, in the same order.
assert tuple(f.name for f in fields(NvmeHealth)) == tuple(name for name, _, _ in FIELDS)


def critical_warning_names(bits: int) -> list[str]:
    """Critical warning byte -> our short words for the bits set, in bit order.

    Reserved bits 6-7 come out as ``"reserved-bit-6"`` / ``"reserved-bit-7"`` so they are not lost.
    """
    names = [name for bit, name in CRITICAL_WARNING_NAMES if bits & bit]
    names += [f"reserved-bit-{n}" for n in (6, 7) if bits & (1 << n)]
    return names


def parse_nvme_health(data: bytes) -> NvmeHealth:
    """512 bytes of log page 02h -> :class:`NvmeHealth` (128-bit counters as exact Python ints).

    Raises ``LayoutError`` with field ``nvme_health.length``.
    """
    data = require_length(data, HEALTH_LENGTH, "nvme_health.length")
    return NvmeHealth(
        **{
            name: int.from_bytes(data[offset : offset + size], "little")
            for name, offset, size in FIELDS
        }
    )


def build_nvme_health(health: NvmeHealth) -> bytes:
    """The 512-byte log page for ``health`` (reserved and unread bytes zero).

    Raises ``ValueError`` when a value does not fit its field.
    """
    data = bytearray(HEALTH_LENGTH)
    for name, offset, size in FIELDS:
        value = getattr(health, name)
        if not 0 <= value < 1 << (8 * size):
            raise ValueError(f"{name} must fit in {8 * size} unsigned bits, got {value}")
        data[offset : offset + size] = value.to_bytes(size, "little")
    return bytes(data)


def decode_nvme_health_batch(a: np.ndarray) -> pd.DataFrame:
    """Many log pages at once: ``a`` is uint8 of shape (N, 512), one page per row.

    One column per :class:`NvmeHealth` field, int64, one row per input row in order; the 128-bit
    counters are saturated at 2**63-1 (the store keeps int64).
    """
    a = _batch.check_batch(a, HEALTH_LENGTH, "nvme_health.length")
    columns = {}
    for name, offset, size in FIELDS:
        if size == 16:
            columns[name] = _batch.le_uint128_saturated(a, offset)
        else:
            columns[name] = _batch.le_uint(a, offset, size).astype(np.int64)
    return pd.DataFrame(columns)
