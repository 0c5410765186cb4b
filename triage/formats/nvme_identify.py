"""NVMe Identify Controller data structure (Identify command, CNS 01h), 4096 bytes.

Standard: NVM Express Base Specification 2.0, 5.17.2.1 "Identify Controller data structure"
(figure "Identify - Identify Controller Data Structure, I/O Command Set Independent"; section
number from memory). Fields read here:

=========  ==================================================================================
bytes      meaning
=========  ==================================================================================
0-1        PCI vendor ID (VID)
2-3        PCI subsystem vendor ID (SSVID)
4-23       serial number (SN), ASCII, space padded
24-63      model number (MN), ASCII, space padded
64-71      firmware revision (FR), ASCII, space padded
80-83      version (VER): major in bits 31-16, minor in 15-8, tertiary in 7-0
280-295    total NVM capacity (TNVMCAP), bytes, 128-bit little-endian
=========  ==================================================================================

Unlike ATA, NVMe strings are in plain memory order: no byte swapping.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.formats import _batch
from triage.formats.errors import require_length
from triage.formats.text import clean_ascii, encode_ascii_field

IDENTIFY_CONTROLLER_LENGTH = 4096

VID_OFFSET = 0  # 2 bytes
SSVID_OFFSET = 2  # 2 bytes
SERIAL = slice(4, 24)
MODEL = slice(24, 64)
FIRMWARE = slice(64, 72)
VERSION_OFFSET = 80  # 4 bytes
TOTAL_CAPACITY_OFFSET, TOTAL_CAPACITY_SIZE = 280, 16

#: Made-up vendor ids written by the builder: zero, which no real PCI vendor holds.
BUILDER_VENDOR_ID = 0x0000
#: Version written by the builder: 2.0.0, the revision this module follows.
BUILDER_VERSION = (2 << 16) | (0 << 8) | 0


@dataclass(frozen=True)
class NvmeIdentify:
    """The identity and size of an NVMe controller."""

    serial: str
    model: str
    firmware: str
    total_capacity_bytes: int  # TNVMCAP; 0 when the controller does not report it


def parse_nvme_identify(data: bytes) -> NvmeIdentify:
    """4096 bytes of Identify Controller data -> :class:`NvmeIdentify`.

    Raises ``LayoutError`` with field ``nvme_identify.length``. The structure has no checksum.
    """
    data = require_length(data, IDENTIFY_CONTROLLER_LENGTH, "nvme_identify.length")
    capacity = data[TOTAL_CAPACITY_OFFSET : TOTAL_CAPACITY_OFFSET + TOTAL_CAPACITY_SIZE]
    return NvmeIdentify(
        serial=clean_ascii(data[SERIAL]),
        model=clean_ascii(data[MODEL]),
        firmware=clean_ascii(data[FIRMWARE]),
        total_capacity_bytes=int.from_bytes(capacity, "little"),
    )


def build_nvme_identify(
    *,
    serial: str | bytes,
    model: str | bytes,
    firmware: str | bytes,
    total_capacity_bytes: int,
) -> bytes:
    """An Identify Controller structure carrying the given identity (for demo data and tests).

    Vendor ids are zero (made up: no real vendor), VER says 2.0.0, everything else is zero.
    String arguments given as ``bytes`` are stored as they are (to plant odd bytes in tests).
    """
    if not 0 <= total_capacity_bytes < 1 << 128:
        raise ValueError(f"total_capacity_bytes must fit in 128 bits, got {total_capacity_bytes}")
    data = bytearray(IDENTIFY_CONTROLLER_LENGTH)
    struct.pack_into("<HH", data, VID_OFFSET, BUILDER_VENDOR_ID, BUILDER_VENDOR_ID)
    data[SERIAL] = encode_ascii_field(serial, SERIAL.stop - SERIAL.start, "serial")
    data[MODEL] = encode_ascii_field(model, MODEL.stop - MODEL.start, "model")
    data[FIRMWARE] = encode_ascii_field(firmware, FIRMWARE.stop - FIRMWARE.start, "firmware")
    struct.pack_into("<I", data, VERSION_OFFSET, BUILDER_VERSION)
    data[TOTAL_CAPACITY_OFFSET : TOTAL_CAPACITY_OFFSET + TOTAL_CAPACITY_SIZE] = (
        total_capacity_bytes.to_bytes(TOTAL_CAPACITY_SIZE, "little")
    )
    return bytes(data)


def decode_nvme_identify_batch(a: np.ndarray) -> pd.DataFrame:
    """Many Identify Controller structures at once: ``a`` is uint8 of shape (N, 4096).

    Columns, one row per input row in order: ``serial``, ``model``, ``firmware`` (str, cleaned as
    :func:`parse_nvme_identify` does), ``total_capacity_bytes`` (int64, saturated at 2**63-1).
    """
    a = _batch.check_batch(a, IDENTIFY_CONTROLLER_LENGTH, "nvme_identify.length")
    return pd.DataFrame(
        {
            "serial": _batch.clean_ascii_columns(a[:, SERIAL]),
            "model": _batch.clean_ascii_columns(a[:, MODEL]),
            "firmware": _batch.clean_ascii_columns(a[:, FIRMWARE]),
            "total_capacity_bytes": _batch.le_uint128_saturated(a, TOTAL_CAPACITY_OFFSET),
        }
    )
