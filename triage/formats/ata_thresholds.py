"""SMART READ THRESHOLDS: the 512-byte answer to SMART subcommand D1h (command B0h).

Standard: SFF-8035i rev 2.0, "Attribute thresholds data structure" (section number from memory:
3.9). ACS-3 made this subcommand obsolete but drives still answer it; its layout mirrors SMART
READ DATA:

=======  ======================================================================================
bytes    meaning
=======  ======================================================================================
0-1      data structure revision (little-endian)
2-361    30 entries of 12 bytes: 0 attribute id (0 = empty slot), 1 threshold, 2-11 reserved
511      checksum: all 512 bytes sum to 0 mod 256
=======  ======================================================================================

A normalized attribute value at or below its threshold means the attribute has "tripped"; a
threshold of 0 means the attribute never trips (SFF-8035i; the comparison itself lives in the
rules layer).
"""

from __future__ import annotations

import struct
from typing import Mapping

import numpy as np
import pandas as pd

from triage.formats import _batch
from triage.formats.ata_smart import (
    CHECKSUM_OFFSET,
    ENTRY_COUNT,
    ENTRY_ID,
    ENTRY_SIZE,
    REVISION_OFFSET,
    TABLE_END,
    TABLE_OFFSET,
    attribute_table_batch,
    check_checksum,
    checksum_byte,
)
from triage.formats.errors import require_length

THRESHOLDS_LENGTH = 512
ENTRY_THRESHOLD = 1  # within one 12-byte entry; ENTRY_ID (0) is shared with SMART READ DATA


def parse_smart_thresholds(data: bytes) -> dict[int, int]:
    """512 bytes of SMART READ THRESHOLDS -> {attribute id: threshold}, empty slots skipped.

    Raises ``LayoutError`` with field ``thresholds.length`` or ``thresholds.checksum``.
    """
    data = require_length(data, THRESHOLDS_LENGTH, "thresholds.length")
    check_checksum(data, "thresholds.checksum")
    thresholds: dict[int, int] = {}
    for start in range(TABLE_OFFSET, TABLE_END, ENTRY_SIZE):
        attribute_id = data[start + ENTRY_ID]
        if attribute_id:
            thresholds[attribute_id] = data[start + ENTRY_THRESHOLD]
    return thresholds


def parse_smart_thresholds_revision(data: bytes) -> int:
    """The data structure revision (bytes 0-1) of a thresholds sector."""
    data = require_length(data, THRESHOLDS_LENGTH, "thresholds.length")
    return int.from_bytes(data[REVISION_OFFSET : REVISION_OFFSET + 2], "little")


def build_smart_thresholds(thresholds: Mapping[int, int], revision: int = 16) -> bytes:
    """A SMART READ THRESHOLDS sector, one slot per mapping entry in order, checksum right."""
    if len(thresholds) > ENTRY_COUNT:
        raise ValueError(f"the table has {ENTRY_COUNT} slots, got {len(thresholds)} thresholds")
    if not 0 <= revision < 1 << 16:
        raise ValueError(f"revision must fit in 16 bits, got {revision}")
    sector = bytearray(THRESHOLDS_LENGTH)
    struct.pack_into("<H", sector, REVISION_OFFSET, revision)
    for slot, (attribute_id, threshold) in enumerate(thresholds.items()):
        if not 1 <= attribute_id <= 255:
            raise ValueError(f"attribute id must be 1-255 (0 is an empty slot), got {attribute_id}")
        if not 0 <= threshold <= 255:
            raise ValueError(f"attribute {attribute_id}: threshold must be 0-255, got {threshold}")
        start = TABLE_OFFSET + slot * ENTRY_SIZE
        sector[start + ENTRY_ID] = attribute_id
        sector[start + ENTRY_THRESHOLD] = threshold
    sector[CHECKSUM_OFFSET] = checksum_byte(sector[:CHECKSUM_OFFSET])
    return bytes(sector)


def decode_thresholds_batch(a: np.ndarray) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Many SMART READ THRESHOLDS sectors at once: ``a`` is uint8 of shape (N, 512).

    Returns ``(sectors, thresholds)``: ``sectors`` has one row per input row with ``checksum_ok``
    and ``revision``; ``thresholds`` is long format, one row per non-empty slot: ``row`` (input
    row index), ``attribute_id``, ``threshold`` (int64), sorted by row then slot. When a sector repeats an
    id, only its last slot is kept, as in :func:`parse_smart_thresholds`.
    """
    a = _batch.check_batch(a, THRESHOLDS_LENGTH, "thresholds.length")
    sectors = pd.DataFrame(
        {
            "checksum_ok": _batch.byte_sum_is_zero(a),
            "revision": _batch.le_uint(a, REVISION_OFFSET, 2).astype(np.int64),
        }
    )
    thresholds = attribute_table_batch(a, {"threshold": (ENTRY_THRESHOLD, 1)})
    thresholds = thresholds.drop_duplicates(["row", "attribute_id"], keep="last").reset_index(drop=True)
    return sectors, thresholds
