"""Vectorised building blocks shared by the batch decoders (private to ``triage.formats``).

Every batch decoder takes an ``(N, length)`` uint8 array, one capture per row, and must give the
same answers as its scalar parser; these helpers work whole columns at once so ingest never loops
over bytes in Python. Wide integers are saturated at 2**63-1 because the store keeps int64
(see ``triage.store.schema``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from triage.formats.errors import LayoutError
from triage.formats.text import clean_ascii

INT64_MAX = np.iinfo(np.int64).max

# "00".."ff" as two-byte strings, indexed by byte value: hex formatting by table lookup.
_HEX_PAIRS = np.array([f"{b:02x}".encode("ascii") for b in range(256)], dtype="S2")


def check_batch(a: np.ndarray, length: int, field: str) -> np.ndarray:
    """``a`` as a C-contiguous uint8 array of shape (N, length), else ``LayoutError(field)``."""
    a = np.asarray(a)
    if a.dtype != np.uint8 or a.ndim != 2 or a.shape[1] != length:
        raise LayoutError(
            field, f"expected a uint8 array of shape (N, {length}), got {a.dtype} {a.shape}"
        )
    return np.ascontiguousarray(a)


def le_uint(a: np.ndarray, offset: int, size: int) -> np.ndarray:
    """Little-endian unsigned field of ``size`` (1-8) bytes at ``offset`` in every row -> uint64."""
    if not 1 <= size <= 8:
        raise ValueError(f"le_uint reads 1 to 8 bytes, not {size}")
    n = a.shape[0]
    if size in (1, 2, 4, 8):
        block = np.ascontiguousarray(a[:, offset : offset + size])
        return block.view(f"<u{size}").reshape(n).astype(np.uint64)
    padded = np.zeros((n, 8), dtype=np.uint8)
    padded[:, :size] = a[:, offset : offset + size]
    return padded.view("<u8").reshape(n)


def le_uint128_saturated(a: np.ndarray, offset: int) -> np.ndarray:
    """Little-endian 128-bit field at ``offset`` -> int64, values above 2**63-1 saturated."""
    low = le_uint(a, offset, 8)
    high = le_uint(a, offset + 8, 8)
    too_big = (high != 0) | (low > np.uint64(INT64_MAX))
    return np.where(too_big, np.uint64(INT64_MAX), low).astype(np.int64)


def saturate_int64(values: np.ndarray) -> np.ndarray:
    """uint64 -> int64 with values above 2**63-1 saturated."""
    return np.minimum(values, np.uint64(INT64_MAX)).astype(np.int64)


def byte_sum_is_zero(a: np.ndarray) -> np.ndarray:
    """Per row: do all bytes add up to 0 mod 256 (the ATA/SFF-8035i checksum rule)?"""
    return (a.sum(axis=1, dtype=np.uint64) % np.uint64(256)) == 0


def clean_ascii_columns(block: np.ndarray) -> np.ndarray:
    """Each row of ``block`` (memory-order ASCII) -> ``clean_ascii(row)``, as an object array.

    Rows made only of printable ASCII (no backslash) plus trailing NULs are decoded for all rows
    at once through numpy's fixed-width string types; any other row (control bytes, bytes >= 80h,
    NULs inside, a backslash) goes through :func:`triage.formats.text.clean_ascii` itself, so the
    output is identical to the scalar parsers by construction.
    """
    block = np.ascontiguousarray(block)
    n, width = block.shape
    plain = (block >= 0x20) & (block <= 0x7E) & (block != 0x5C)
    trailing_nul = np.logical_and.accumulate((block == 0)[:, ::-1], axis=1)[:, ::-1]
    fast = (plain | trailing_nul).all(axis=1)
    out = np.empty(n, dtype=object)
    plain_rows = np.ascontiguousarray(block[fast])
    # An 'S' view drops trailing NULs; then only space padding is left to strip.
    text = plain_rows.view(f"S{width}").reshape(len(plain_rows)).astype(f"U{width}")
    out[fast] = np.char.strip(text, " ").astype(object)
    for i in np.flatnonzero(~fast):
        out[i] = clean_ascii(block[i].tobytes())
    return out


def swap_byte_pairs_columns(block: np.ndarray) -> np.ndarray:
    """Swap every pair of bytes in every row (ATA string word order -> character order)."""
    n, width = block.shape
    return np.ascontiguousarray(block.reshape(n, width // 2, 2)[:, :, ::-1].reshape(n, width))


def hex_columns(big_endian_bytes: np.ndarray) -> np.ndarray:
    """Each row of bytes (most significant first) -> lowercase hex ``str``, as an object array."""
    n, width = big_endian_bytes.shape
    pairs = np.ascontiguousarray(_HEX_PAIRS[big_endian_bytes])
    return pairs.view(f"S{2 * width}").reshape(n).astype(f"U{2 * width}").astype(object)


def nullable_int(values: np.ndarray, missing: np.ndarray) -> pd.arrays.IntegerArray:
    """int values + boolean "missing" mask -> pandas ``Int64`` array."""
    return pd.arrays.IntegerArray(np.asarray(values, dtype=np.int64), np.asarray(missing, bool))
