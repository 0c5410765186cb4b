"""Turning untrusted firmware string fields into safe ``str``.

Serial numbers, model names and firmware revisions come straight from drive firmware and are not
trusted: a buggy or hostile device can put terminal control bytes in them. Every string leaving
``triage.formats`` therefore has its padding (spaces and NULs, both ends) removed and every byte
outside printable ASCII 20h-7Eh replaced by the visible escape ``\\xNN`` (two lowercase hex digits);
a literal backslash becomes ``\\\\`` so an escape in the output is never ambiguous.

ATA strings (ACS-3, 3.3.10 "ATA string convention", from memory) hold two characters per 16-bit
word with the FIRST character in the HIGH byte, so in memory order (little-endian words) every
pair of bytes is swapped. NVMe strings (NVMe Base 2.0, Identify Controller SN/MN/FR) are plain
memory-order ASCII.
"""

from __future__ import annotations

#: Bytes stripped from both ends before escaping: the padding the standards use (space) and the
#: padding some firmware uses anyway (NUL).
PADDING = b" \x00"

# One entry per byte value: the text that byte becomes.
_ESCAPED = tuple(
    "\\\\" if b == 0x5C else chr(b) if 0x20 <= b <= 0x7E else f"\\x{b:02x}" for b in range(256)
)


def clean_ascii(raw: bytes) -> str:
    """Memory-order ASCII field -> padding stripped, non-printable bytes escaped as ``\\xNN``."""
    stripped = bytes(raw).strip(PADDING)
    text = stripped.decode("latin-1")
    if text.isascii() and text.isprintable() and "\\" not in text:
        return text  # the common case, without the per-byte join
    return "".join(_ESCAPED[b] for b in stripped)


def swap_byte_pairs(raw: bytes) -> bytes:
    """Swap every pair of bytes (ATA string word order <-> character order); even length only."""
    raw = bytes(raw)
    if len(raw) % 2:
        raise ValueError(f"an ATA string field has an even number of bytes, got {len(raw)}")
    swapped = bytearray(len(raw))
    swapped[0::2] = raw[1::2]
    swapped[1::2] = raw[0::2]
    return bytes(swapped)


def clean_ata_string(raw: bytes) -> str:
    """ATA string field AS STORED IN MEMORY (bytes swapped pairwise) -> clean ``str``.

    ``b"BADC"`` (the words "AB", "CD") gives ``"ABCD"``; then the same cleaning as
    :func:`clean_ascii`.
    """
    return clean_ascii(swap_byte_pairs(raw))


def encode_ascii_field(text: str | bytes, length: int, name: str) -> bytes:
    """Builder helper: ``text`` as ASCII, space-padded to ``length`` bytes (memory order).

    ``bytes`` are taken as they are (so tests and demos can plant odd bytes); a ``str`` must be
    ASCII. Too long -> ``ValueError`` naming the field.
    """
    raw = text if isinstance(text, bytes) else text.encode("ascii")
    if len(raw) > length:
        raise ValueError(f"{name} is {len(raw)} bytes, the field holds {length}")
    return raw.ljust(length, b" ")


def encode_ata_string(text: str | bytes, length: int, name: str) -> bytes:
    """Builder helper: ``text`` as an ATA string field of ``length`` bytes, in memory order."""
    return swap_byte_pairs(encode_ascii_field(text, length, name))
