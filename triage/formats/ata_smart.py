"""SMART READ DATA: the 512-byte answer to SMART subcommand D0h (command B0h).

Standards: ACS-3, SMART READ DATA (B0h/D0h) and its "Device SMART data structure" table for the
header fields (section numbers from memory: 7.44.2 / table "Device SMART data structure"); the
attribute table inside the vendor-specific bytes 2-361 follows SFF-8035i rev 2.0, 3.8 "Attribute
data structure" (12-byte entries), as carried by ATA drives. Layout:

=======  ========================================================================================
bytes    meaning
=======  ========================================================================================
0-1      data structure revision (little-endian)
2-361    30 attribute entries of 12 bytes: 0 id (0 = empty slot), 1-2 flags (LE; bit 0 =
         pre-failure, clear = advisory), 3 normalized value, 4 worst value, 5-10 raw value
         (48-bit little-endian), 11 reserved
362      off-line data collection status
363      self-test execution status
364-365  total time to complete off-line data collection, seconds
367      off-line data collection capability
368-369  SMART capability
370      error logging capability
372      short self-test polling time, minutes
373      extended self-test polling time, minutes (FFh: see bytes 375-376)
374      conveyance self-test polling time, minutes
375-376  extended self-test polling time, minutes (word)
511      checksum: all 512 bytes sum to 0 mod 256
=======  ========================================================================================
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from typing import Iterable

import numpy as np
import pandas as pd

from triage.formats import _batch
from triage.formats.errors import LayoutError, require_length

SMART_LENGTH = 512

REVISION_OFFSET = 0  # 2 bytes
TABLE_OFFSET = 2
ENTRY_SIZE = 12
ENTRY_COUNT = 30
TABLE_END = TABLE_OFFSET + ENTRY_SIZE * ENTRY_COUNT  # 362
# Within one 12-byte attribute entry:
ENTRY_ID, ENTRY_FLAGS, ENTRY_VALUE, ENTRY_WORST = 0, 1, 3, 4
ENTRY_RAW, ENTRY_RAW_SIZE = 5, 6

OFFLINE_STATUS_OFFSET = 362
SELF_TEST_STATUS_OFFSET = 363
OFFLINE_SECONDS_OFFSET = 364  # 2 bytes
OFFLINE_CAPABILITY_OFFSET = 367
SMART_CAPABILITY_OFFSET = 368  # 2 bytes
ERROR_LOGGING_OFFSET = 370
SHORT_POLLING_OFFSET = 372
EXTENDED_POLLING_OFFSET = 373
CONVEYANCE_POLLING_OFFSET = 374
EXTENDED_POLLING_WORD_OFFSET = 375  # 2 bytes, used when byte 373 is FFh
CHECKSUM_OFFSET = 511

EXTENDED_POLLING_SEE_WORD = 0xFF
FLAG_PREFAILURE = 1 << 0
RAW_LIMIT = 1 << 48

#: (field, offset, size) of the header fields read the same way by the parser and the batch.
HEADER_FIELDS = (
    ("revision", REVISION_OFFSET, 2),
    ("offline_status", OFFLINE_STATUS_OFFSET, 1),
    ("self_test_status", SELF_TEST_STATUS_OFFSET, 1),
    ("offline_collection_seconds", OFFLINE_SECONDS_OFFSET, 2),
    ("offline_capability", OFFLINE_CAPABILITY_OFFSET, 1),
    ("smart_capability", SMART_CAPABILITY_OFFSET, 2),
    ("error_logging_capability", ERROR_LOGGING_OFFSET, 1),
    ("short_test_minutes", SHORT_POLLING_OFFSET, 1),
    ("conveyance_test_minutes", CONVEYANCE_POLLING_OFFSET, 1),
)


@dataclass(frozen=True)
class SmartAttribute:
    """One SFF-8035i attribute entry."""

    id: int
    flags: int
    value: int
    worst: int
    raw: int  # 48-bit raw value, little-endian as stored by the drive

    @property
    def prefailure(self) -> bool:
        """Flags bit 0: a value at or below threshold predicts failure (else advisory)."""
        return bool(self.flags & FLAG_PREFAILURE)


@dataclass(frozen=True)
class SmartData:
    """The decoded SMART READ DATA sector."""

    revision: int
    attributes: tuple[SmartAttribute, ...]  # non-empty slots, in slot order
    offline_status: int
    self_test_status: int
    offline_collection_seconds: int
    offline_capability: int
    smart_capability: int
    error_logging_capability: int
    short_test_minutes: int
    extended_test_minutes: int
    conveyance_test_minutes: int


def check_checksum(data: bytes, field: str) -> None:
    """SFF-8035i / ACS checksum rule: the 512 bytes sum to 0 mod 256, else ``LayoutError``."""
    remainder = sum(data) % 256
    if remainder:
        raise LayoutError(
            field,
            f"the 512 bytes sum to {remainder:#04x} mod 256, not 0 (byte 511 is the checksum)",
        )


def checksum_byte(data_without_checksum: bytes | bytearray) -> int:
    """The byte 511 that makes the first 511 bytes plus itself sum to 0 mod 256."""
    return (-sum(data_without_checksum)) % 256


def _uint(data: bytes, offset: int, size: int) -> int:
    return int.from_bytes(data[offset : offset + size], "little")


def parse_smart_data(data: bytes) -> SmartData:
    """512 bytes of SMART READ DATA -> :class:`SmartData`.

    Raises ``LayoutError`` with field ``smart.length`` or ``smart.checksum``.
    """
    data = require_length(data, SMART_LENGTH, "smart.length")
    check_checksum(data, "smart.checksum")

    attributes = []
    for start in range(TABLE_OFFSET, TABLE_END, ENTRY_SIZE):
        attribute_id = data[start + ENTRY_ID]
        if attribute_id == 0:
            continue  # empty slot
        attributes.append(
            SmartAttribute(
                id=attribute_id,
                flags=_uint(data, start + ENTRY_FLAGS, 2),
                value=data[start + ENTRY_VALUE],
                worst=data[start + ENTRY_WORST],
                raw=_uint(data, start + ENTRY_RAW, ENTRY_RAW_SIZE),
            )
        )

    header = {name: _uint(data, offset, size) for name, offset, size in HEADER_FIELDS}
    extended = data[EXTENDED_POLLING_OFFSET]
    if extended == EXTENDED_POLLING_SEE_WORD:
        extended = _uint(data, EXTENDED_POLLING_WORD_OFFSET, 2)
    return SmartData(attributes=tuple(attributes), extended_test_minutes=extended, **header)


def build_smart_data(
    attributes: Iterable[SmartAttribute],
    *,
    revision: int = 16,
    offline_status: int = 0x82,
    self_test_status: int = 0,
    offline_collection_seconds: int = 0,
    offline_capability: int = 0x5B,
    smart_capability: int = 0x0003,
    error_logging_capability: int = 0x01,
    short_test_minutes: int = 2,
    extended_test_minutes: int = 600,
    conveyance_test_minutes: int = 0,
) -> bytes:
    """A SMART READ DATA sector with the given attributes (slot order kept) and a right checksum.

    Defaults are plausible, not from any product: off-line collection completed without error
    (82h), self-test "completed without error" (0), short test 2 min, extended test 600 min (more
    than 254, so byte 373 holds FFh and bytes 375-376 hold the minutes).
    Raises ``ValueError`` for more than 30 attributes or a field that does not fit.
    """
    attributes = tuple(attributes)
    if len(attributes) > ENTRY_COUNT:
        raise ValueError(f"the table has {ENTRY_COUNT} slots, got {len(attributes)} attributes")
    sector = bytearray(SMART_LENGTH)
    struct.pack_into("<H", sector, REVISION_OFFSET, _fits(revision, 16, "revision"))
    for slot, attribute in enumerate(attributes):
        if not 1 <= attribute.id <= 255:
            raise ValueError(f"attribute id must be 1-255 (0 is an empty slot), got {attribute.id}")
        if not 0 <= attribute.raw < RAW_LIMIT:
            raise ValueError(f"attribute {attribute.id}: raw {attribute.raw} does not fit 48 bits")
        start = TABLE_OFFSET + slot * ENTRY_SIZE
        sector[start + ENTRY_ID] = attribute.id
        struct.pack_into("<H", sector, start + ENTRY_FLAGS, _fits(attribute.flags, 16, "flags"))
        sector[start + ENTRY_VALUE] = _fits(attribute.value, 8, "value")
        sector[start + ENTRY_WORST] = _fits(attribute.worst, 8, "worst")
        sector[start + ENTRY_RAW : start + ENTRY_RAW + ENTRY_RAW_SIZE] = attribute.raw.to_bytes(
            ENTRY_RAW_SIZE, "little"
        )

    sector[OFFLINE_STATUS_OFFSET] = _fits(offline_status, 8, "offline_status")
    sector[SELF_TEST_STATUS_OFFSET] = _fits(self_test_status, 8, "self_test_status")
    seconds = _fits(offline_collection_seconds, 16, "offline_collection_seconds")
    struct.pack_into("<H", sector, OFFLINE_SECONDS_OFFSET, seconds)
    sector[OFFLINE_CAPABILITY_OFFSET] = _fits(offline_capability, 8, "offline_capability")
    capability = _fits(smart_capability, 16, "smart_capability")
    struct.pack_into("<H", sector, SMART_CAPABILITY_OFFSET, capability)
    sector[ERROR_LOGGING_OFFSET] = _fits(error_logging_capability, 8, "error_logging_capability")
    sector[SHORT_POLLING_OFFSET] = _fits(short_test_minutes, 8, "short_test_minutes")
    sector[CONVEYANCE_POLLING_OFFSET] = _fits(conveyance_test_minutes, 8, "conveyance_test_minutes")
    _fits(extended_test_minutes, 16, "extended_test_minutes")
    sector[EXTENDED_POLLING_OFFSET] = min(extended_test_minutes, EXTENDED_POLLING_SEE_WORD)
    struct.pack_into("<H", sector, EXTENDED_POLLING_WORD_OFFSET, extended_test_minutes)
    sector[CHECKSUM_OFFSET] = checksum_byte(sector[:CHECKSUM_OFFSET])
    return bytes(sector)


def _fits(value: int, bits: int, name: str) -> int:
    if not 0 <= value < (1 << bits):
        raise ValueError(f"{name} must fit in {bits} unsigned bits, got {value}")
    return value


def attribute_table_batch(a: np.ndarray, value_fields: dict[str, tuple[int, int]]) -> pd.DataFrame:
    """Long table of the non-empty 12-byte slots of every row (shared with the thresholds page).

    ``value_fields`` maps column name -> (offset within the entry, size in bytes); the result has
    ``row`` (input row index) and ``attribute_id`` first, rows sorted by input row then slot.
    """
    n = a.shape[0]
    entries = a[:, TABLE_OFFSET:TABLE_END].reshape(n, ENTRY_COUNT, ENTRY_SIZE)
    occupied = entries[:, :, ENTRY_ID] != 0
    rows, _slots = np.nonzero(occupied)  # row-major: by row, then slot
    used = entries[occupied]  # (M, 12), same order as rows
    columns = {
        "row": rows.astype(np.int64),
        "attribute_id": used[:, ENTRY_ID].astype(np.int64),
    }
    for name, (offset, size) in value_fields.items():
        columns[name] = _batch.le_uint(used, offset, size).astype(np.int64)
    return pd.DataFrame(columns)


def decode_smart_batch(a: np.ndarray) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Many SMART READ DATA sectors at once: ``a`` is uint8 of shape (N, 512).

    Returns ``(sectors, attributes)``: ``sectors`` has one row per input row with ``revision``,
    ``checksum_ok`` and the other :class:`SmartData` header fields; ``attributes`` is long format,
    one row per non-empty slot: ``row`` (input row index), ``attribute_id``, ``status_flags``,
    ``normalized``, ``worst_normalized``, ``raw_value`` (all int64; the store's names for the
    SFF-8035i entry fields), sorted by row then slot. Rows with a bad checksum are decoded anyway;
    the caller decides (``checksum_ok``) whether to keep them.
    """
    a = _batch.check_batch(a, SMART_LENGTH, "smart.length")
    columns = {"revision": _batch.le_uint(a, REVISION_OFFSET, 2).astype(np.int64)}
    columns["checksum_ok"] = _batch.byte_sum_is_zero(a)
    for name, offset, size in HEADER_FIELDS[1:]:
        columns[name] = _batch.le_uint(a, offset, size).astype(np.int64)
    extended = a[:, EXTENDED_POLLING_OFFSET].astype(np.int64)
    extended_word = _batch.le_uint(a, EXTENDED_POLLING_WORD_OFFSET, 2).astype(np.int64)
    columns["extended_test_minutes"] = np.where(
        extended == EXTENDED_POLLING_SEE_WORD, extended_word, extended
    )
    attributes = attribute_table_batch(
        a,
        {
            "status_flags": (ENTRY_FLAGS, 2),
            "normalized": (ENTRY_VALUE, 1),
            "worst_normalized": (ENTRY_WORST, 1),
            "raw_value": (ENTRY_RAW, ENTRY_RAW_SIZE),
        },
    )
    return pd.DataFrame(columns), attributes
