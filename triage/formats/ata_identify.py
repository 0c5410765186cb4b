"""ATA IDENTIFY DEVICE data: the 512-byte answer to command ECh.

Standard: ATA/ATAPI Command Set - 3 (ACS-3), 7.12.7 "IDENTIFY DEVICE data" (the word table; section
numbering from memory). The sector is 256 little-endian 16-bit words. Fields read here:

=========  ===================================================================================
word       meaning
=========  ===================================================================================
10-19      serial number, ATA string (20 characters, first character in the HIGH byte)
23-26      firmware revision, ATA string (8 characters)
27-46      model number, ATA string (40 characters)
60-61      total user addressable logical sectors for 28-bit commands (32-bit, word 60 low)
83         command sets supported; bit 10 = 48-bit address feature set supported, bit 14 = 1
100-103    total user addressable logical sectors for 48-bit commands (64-bit, word 100 low)
106        physical/logical sector size; valid when bit 14 = 1 and bit 15 = 0; bit 12 = the
           logical sector is longer than 256 words and words 117-118 give its length
108-111    world wide name: 64-bit NAA identifier, word 108 MOST significant
117-118    logical sector size in WORDS (32-bit, word 117 low)
217        nominal media rotation rate: 0 not reported, 1 non-rotating, 0401h-FFFEh rpm
255        integrity word: low byte A5h = signature, high byte = checksum making the sum of
           all 512 bytes 0 mod 256
=========  ===================================================================================
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.formats import _batch
from triage.formats.errors import LayoutError, require_length
from triage.formats.text import clean_ata_string, encode_ata_string

IDENTIFY_LENGTH = 512

# Byte offsets and lengths (byte = 2 * word), defined once for the parser, builder and batch.
SERIAL = slice(2 * 10, 2 * 20)  # words 10-19
FIRMWARE = slice(2 * 23, 2 * 27)  # words 23-26
MODEL = slice(2 * 27, 2 * 47)  # words 27-46
LBA28_OFFSET, LBA28_SIZE = 2 * 60, 4  # words 60-61
COMMAND_SETS_83_OFFSET = 2 * 83
COMMAND_SETS_86_OFFSET = 2 * 86  # command sets enabled (same bit numbering as word 83)
LBA48_OFFSET, LBA48_SIZE = 2 * 100, 8  # words 100-103
SECTOR_SIZE_INFO_OFFSET = 2 * 106
WWN_WORD_OFFSETS = (2 * 108, 2 * 109, 2 * 110, 2 * 111)  # most significant word first
LOGICAL_SECTOR_WORDS_OFFSET, LOGICAL_SECTOR_WORDS_SIZE = 2 * 117, 4  # words 117-118
ROTATION_OFFSET = 2 * 217
INTEGRITY_SIGNATURE_OFFSET = 2 * 255  # low byte of word 255
INTEGRITY_CHECKSUM_OFFSET = 2 * 255 + 1  # high byte of word 255

INTEGRITY_SIGNATURE = 0xA5
WORD83_48BIT_SUPPORTED = 1 << 10
WORD83_VALID = 1 << 14  # word 83 bit 14 "shall be set to one", bit 15 zero
WORD106_VALID_MASK, WORD106_VALID = 0xC000, 0x4000  # bit 15 = 0, bit 14 = 1
WORD106_LONG_LOGICAL_SECTOR = 1 << 12
DEFAULT_LOGICAL_SECTOR_SIZE = 512
ROTATION_NOT_REPORTED, ROTATION_NON_ROTATING = 0x0000, 0x0001
ROTATION_RPM_MIN, ROTATION_RPM_MAX = 0x0401, 0xFFFE
LBA28_MAX = 0x0FFFFFFF


@dataclass(frozen=True)
class AtaIdentify:
    """The identity and size of an ATA drive, as its IDENTIFY DEVICE data reports them."""

    serial: str
    firmware: str
    model: str
    user_capacity_bytes: int
    logical_sector_size: int
    wwn: str | None  # 16 lowercase hex digits; None when words 108-111 are all zero
    rotation_rpm: int | None  # 0 = solid state, None = not reported / reserved value
    integrity_checked: bool  # True when the A5h signature was present (and the sum was right)


def _word(data: bytes, offset: int) -> int:
    return data[offset] | (data[offset + 1] << 8)


def _rotation_rpm(word217: int) -> int | None:
    if word217 == ROTATION_NON_ROTATING:
        return 0
    if ROTATION_RPM_MIN <= word217 <= ROTATION_RPM_MAX:
        return word217
    return None  # 0 = not reported; 0002h-0400h and FFFFh are reserved


def parse_ata_identify(data: bytes) -> AtaIdentify:
    """512 bytes of IDENTIFY DEVICE data -> :class:`AtaIdentify`.

    Raises ``LayoutError`` with field ``identify.length`` (not 512 bytes), ``identify.integrity``
    (A5h signature present but the bytes do not sum to 0 mod 256) or
    ``identify.logical_sector_size`` (words 117-118 announced but shorter than 512 bytes).
    """
    data = require_length(data, IDENTIFY_LENGTH, "identify.length")
    integrity_checked = data[INTEGRITY_SIGNATURE_OFFSET] == INTEGRITY_SIGNATURE
    if integrity_checked and sum(data) % 256:
        raise LayoutError(
            "identify.integrity",
            f"word 255 has the A5h signature but the 512 bytes sum to {sum(data) % 256:#04x} "
            "mod 256, not 0",
        )

    lba48 = int.from_bytes(data[LBA48_OFFSET : LBA48_OFFSET + LBA48_SIZE], "little")
    lba28 = int.from_bytes(data[LBA28_OFFSET : LBA28_OFFSET + LBA28_SIZE], "little")
    sectors = lba48 if lba48 else lba28

    logical_sector_size = DEFAULT_LOGICAL_SECTOR_SIZE
    info = _word(data, SECTOR_SIZE_INFO_OFFSET)
    if (info & WORD106_VALID_MASK) == WORD106_VALID and info & WORD106_LONG_LOGICAL_SECTOR:
        size_words = int.from_bytes(
            data[LOGICAL_SECTOR_WORDS_OFFSET : LOGICAL_SECTOR_WORDS_OFFSET + 4], "little"
        )
        logical_sector_size = 2 * size_words
        if logical_sector_size < DEFAULT_LOGICAL_SECTOR_SIZE:
            raise LayoutError(
                "identify.logical_sector_size",
                f"word 106 bit 12 says words 117-118 hold the logical sector size, but they give "
                f"{size_words} words ({logical_sector_size} bytes), less than 512 bytes",
            )

    wwn_value = 0
    for offset in WWN_WORD_OFFSETS:
        wwn_value = (wwn_value << 16) | _word(data, offset)

    return AtaIdentify(
        serial=clean_ata_string(data[SERIAL]),
        firmware=clean_ata_string(data[FIRMWARE]),
        model=clean_ata_string(data[MODEL]),
        user_capacity_bytes=sectors * logical_sector_size,
        logical_sector_size=logical_sector_size,
        wwn=f"{wwn_value:016x}" if wwn_value else None,
        rotation_rpm=_rotation_rpm(_word(data, ROTATION_OFFSET)),
        integrity_checked=integrity_checked,
    )


def build_ata_identify(
    *,
    serial: str | bytes,
    firmware: str | bytes,
    model: str | bytes,
    sectors: int,
    logical_sector_size: int = DEFAULT_LOGICAL_SECTOR_SIZE,
    wwn: str | None = None,
    rotation_rpm: int | None = None,
    integrity: bool = True,
) -> bytes:
    """An IDENTIFY DEVICE sector carrying the given identity (for demo data and tests).

    ``sectors`` is the count of logical sectors: words 100-103 hold it, words 60-61 hold it capped
    at 0FFFFFFFh (the 28-bit limit), word 83 (and 86) bit 10 says 48-bit addressing is supported.
    ``rotation_rpm`` 0 means solid state (word 217 = 1), None means not reported (0).
    String arguments given as ``bytes`` are stored as they are (to plant odd bytes in tests).
    """
    if not 0 <= sectors < 2**64:
        raise ValueError(f"sectors must fit in 64 bits, got {sectors}")
    if logical_sector_size < DEFAULT_LOGICAL_SECTOR_SIZE or logical_sector_size % 2:
        raise ValueError(
            f"logical_sector_size must be an even number of bytes >= 512, got {logical_sector_size}"
        )
    sector = bytearray(IDENTIFY_LENGTH)
    sector[SERIAL] = encode_ata_string(serial, SERIAL.stop - SERIAL.start, "serial")
    sector[FIRMWARE] = encode_ata_string(firmware, FIRMWARE.stop - FIRMWARE.start, "firmware")
    sector[MODEL] = encode_ata_string(model, MODEL.stop - MODEL.start, "model")

    struct.pack_into("<I", sector, LBA28_OFFSET, min(sectors, LBA28_MAX))
    struct.pack_into("<Q", sector, LBA48_OFFSET, sectors)
    for offset in (COMMAND_SETS_83_OFFSET, COMMAND_SETS_86_OFFSET):
        struct.pack_into("<H", sector, offset, WORD83_VALID | WORD83_48BIT_SUPPORTED)

    info = WORD106_VALID
    if logical_sector_size != DEFAULT_LOGICAL_SECTOR_SIZE:
        info |= WORD106_LONG_LOGICAL_SECTOR
        struct.pack_into("<I", sector, LOGICAL_SECTOR_WORDS_OFFSET, logical_sector_size // 2)
    struct.pack_into("<H", sector, SECTOR_SIZE_INFO_OFFSET, info)

    if wwn is not None:
        value = int(wwn, 16)
        if len(wwn) != 16 or not 0 < value < 2**64:
            raise ValueError(f"wwn must be 16 hex digits, not all zero, got {wwn!r}")
        for index, offset in enumerate(WWN_WORD_OFFSETS):
            struct.pack_into("<H", sector, offset, (value >> (16 * (3 - index))) & 0xFFFF)

    if rotation_rpm is None:
        word217 = ROTATION_NOT_REPORTED
    elif rotation_rpm == 0:
        word217 = ROTATION_NON_ROTATING
    elif ROTATION_RPM_MIN <= rotation_rpm <= ROTATION_RPM_MAX:
        word217 = rotation_rpm
    else:
        raise ValueError(f"rotation_rpm must be None, 0 or 1025-65534, got {rotation_rpm}")
    struct.pack_into("<H", sector, ROTATION_OFFSET, word217)

    if integrity:
        sector[INTEGRITY_SIGNATURE_OFFSET] = INTEGRITY_SIGNATURE
        sector[INTEGRITY_CHECKSUM_OFFSET] = (-sum(sector[:INTEGRITY_CHECKSUM_OFFSET])) % 256
    return bytes(sector)


def decode_identify_batch(a: np.ndarray) -> pd.DataFrame:
    """Many IDENTIFY sectors at once: ``a`` is uint8 of shape (N, 512), one sector per row.

    Columns, one row per input row in order: ``serial``, ``firmware``, ``model`` (str, cleaned as
    :func:`parse_ata_identify` does), ``user_capacity_bytes`` (int64, saturated at 2**63-1),
    ``logical_sector_size`` (int64), ``wwn`` (str or None), ``rotation_rpm`` (Int64),
    ``integrity_ok`` (bool: no A5h signature, or the sum is right) and ``problem`` (None, or the
    ``LayoutError.field`` the scalar parser would raise for that row).
    """
    a = _batch.check_batch(a, IDENTIFY_LENGTH, "identify.length")
    n = a.shape[0]

    signed = a[:, INTEGRITY_SIGNATURE_OFFSET] == INTEGRITY_SIGNATURE
    integrity_ok = ~signed | _batch.byte_sum_is_zero(a)

    lba48 = _batch.le_uint(a, LBA48_OFFSET, LBA48_SIZE)
    lba28 = _batch.le_uint(a, LBA28_OFFSET, LBA28_SIZE)
    sectors = np.where(lba48 != 0, lba48, lba28)

    info = _batch.le_uint(a, SECTOR_SIZE_INFO_OFFSET, 2)
    long_sector = ((info & np.uint64(WORD106_VALID_MASK)) == np.uint64(WORD106_VALID)) & (
        (info & np.uint64(WORD106_LONG_LOGICAL_SECTOR)) != 0
    )
    size_words = _batch.le_uint(a, LOGICAL_SECTOR_WORDS_OFFSET, LOGICAL_SECTOR_WORDS_SIZE)
    sector_size = np.where(long_sector, 2 * size_words, np.uint64(DEFAULT_LOGICAL_SECTOR_SIZE))
    sector_size_ok = sector_size >= DEFAULT_LOGICAL_SECTOR_SIZE

    # sectors * size in uint64 can wrap: saturate wherever the product exceeds 2**63-1.
    safe_size = np.maximum(sector_size, np.uint64(1))
    overflow = sectors > np.uint64(_batch.INT64_MAX) // safe_size
    capacity = np.where(overflow, np.uint64(_batch.INT64_MAX), sectors * sector_size)

    problem = np.full(n, None, dtype=object)
    problem[~sector_size_ok] = "identify.logical_sector_size"
    problem[~integrity_ok] = "identify.integrity"  # the scalar parser checks integrity first

    # Words 108..111 most significant first; within each word the high byte is the second one.
    wwn_bytes = np.stack(
        [a[:, offset + byte] for offset in WWN_WORD_OFFSETS for byte in (1, 0)], axis=1
    )
    wwn = _batch.hex_columns(wwn_bytes)
    wwn[~wwn_bytes.any(axis=1)] = None

    word217 = _batch.le_uint(a, ROTATION_OFFSET, 2).astype(np.int64)
    rotating = (word217 >= ROTATION_RPM_MIN) & (word217 <= ROTATION_RPM_MAX)
    solid = word217 == ROTATION_NON_ROTATING
    rotation = _batch.nullable_int(np.where(solid, 0, word217), ~(rotating | solid))

    def text(field: slice) -> np.ndarray:
        return _batch.clean_ascii_columns(_batch.swap_byte_pairs_columns(a[:, field]))

    return pd.DataFrame(
        {
            "serial": text(SERIAL),
            "firmware": text(FIRMWARE),
            "model": text(MODEL),
            "user_capacity_bytes": capacity.astype(np.int64),
            "logical_sector_size": _batch.saturate_int64(sector_size),
            "wwn": wwn,
            "rotation_rpm": rotation,
            "integrity_ok": integrity_ok,
            "problem": problem,
        }
    )
