"""Property-based checks over every parser: any bytes give a record or a ``LayoutError``, never a
crash, and the vectorised batch decoder agrees with the scalar parser on every row.

The scalar parsers are the reference here: written field by field from the standards' tables
(ACS-3 IDENTIFY, SFF-8035i SMART data and thresholds, NVMe Base 2.0 Identify and log 02h) and
checked against hand-built sectors in the other test files. Bounded examples keep CI fast; the
long run is benchmarks/fuzz.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from triage.formats.ata_identify import decode_identify_batch, parse_ata_identify
from triage.formats.ata_smart import checksum_byte, decode_smart_batch, parse_smart_data
from triage.formats.ata_thresholds import decode_thresholds_batch, parse_smart_thresholds
from triage.formats.errors import LayoutError
from triage.formats.nvme_health import FIELDS, decode_nvme_health_batch, parse_nvme_health
from triage.formats.nvme_identify import decode_nvme_identify_batch, parse_nvme_identify
from triage.formats.text import clean_ascii

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
INT64_MAX = 2**63 - 1


@st.composite
def sectors(draw, length: int, checksum: bool = False) -> bytes:
    """Mostly-zero sectors with a few planted bytes (like real ones), or fully random ones;
    with ``checksum`` the last byte is usually made right so the fields behind it are reached."""
    if draw(st.booleans()):
        data = bytearray(draw(st.binary(min_size=length, max_size=length)))
    else:
        data = bytearray(length)
        for offset, value in draw(st.lists(st.tuples(st.integers(0, length - 1), st.integers(0, 255)), max_size=40)):
            data[offset] = value
    if checksum and draw(st.integers(0, 3)):
        data[-1] = checksum_byte(data[:-1])
    return bytes(data)


def batch(rows: list[bytes]) -> np.ndarray:
    return np.frombuffer(b"".join(rows), dtype=np.uint8).reshape(len(rows), -1)


def outcome(parse, data: bytes):
    try:
        return parse(data)
    except LayoutError as exc:  # the only error a parser may raise on bad bytes
        return exc


@SETTINGS
@given(st.binary(max_size=5000))
def test_any_length_is_a_layout_error_or_a_record(data):
    for parse, length in ((parse_ata_identify, 512), (parse_smart_data, 512), (parse_smart_thresholds, 512),
                          (parse_nvme_health, 512), (parse_nvme_identify, 4096)):
        result = outcome(parse, data)  # any other exception fails the test
        if len(data) != length:
            assert isinstance(result, LayoutError) and result.field.endswith(".length")


@SETTINGS
@given(st.lists(sectors(512, checksum=True), min_size=1, max_size=6))
def test_identify_batch_agrees_with_the_parser(rows):
    decoded = decode_identify_batch(batch(rows))
    for i, data in enumerate(rows):
        result = outcome(parse_ata_identify, data)
        row = decoded.iloc[i]
        if isinstance(result, LayoutError):
            assert row["problem"] == result.field
            continue
        assert row["problem"] is None
        assert (row["serial"], row["model"], row["firmware"]) == (result.serial, result.model, result.firmware)
        assert row["user_capacity_bytes"] == min(result.user_capacity_bytes, INT64_MAX)
        assert row["wwn"] == result.wwn
        assert (None if row["rotation_rpm"] is pd.NA else row["rotation_rpm"]) == result.rotation_rpm


def checked_rows(decode, parse, rows):
    """(row index, parser result, that row's long-format entries) for the rows the parser accepts,
    after checking that the batch's checksum verdict is the parser's on every row."""
    sectors_, entries = decode(batch(rows))
    for i, data in enumerate(rows):
        result = outcome(parse, data)
        assert bool(sectors_["checksum_ok"].iloc[i]) == (not isinstance(result, LayoutError))
        if not isinstance(result, LayoutError):
            yield i, result, entries[entries["row"] == i]


@SETTINGS
@given(st.lists(sectors(512, checksum=True), min_size=1, max_size=6))
def test_smart_batch_agrees_with_the_parser(rows):
    for _, result, mine in checked_rows(decode_smart_batch, parse_smart_data, rows):
        expected = [(a.id, a.flags, a.value, a.worst, a.raw) for a in result.attributes]
        assert list(mine[["attribute_id", "status_flags", "normalized", "worst_normalized", "raw_value"]].itertuples(index=False, name=None)) == expected


@SETTINGS
@given(st.lists(sectors(512, checksum=True), min_size=1, max_size=6))
def test_thresholds_batch_agrees_with_the_parser(rows):
    for _, result, mine in checked_rows(decode_thresholds_batch, parse_smart_thresholds, rows):
        assert dict(zip(mine["attribute_id"], mine["threshold"])) == result


@SETTINGS
@given(st.lists(sectors(512), min_size=1, max_size=6))
def test_nvme_health_batch_saturates_where_the_parser_is_exact(rows):
    decoded = decode_nvme_health_batch(batch(rows))
    for i, data in enumerate(rows):
        exact = parse_nvme_health(data)
        for name, _, _ in FIELDS:
            # the store keeps int64: exact below 2**63, the maximum at or above it
            assert decoded[name].iloc[i] == min(getattr(exact, name), INT64_MAX)


@SETTINGS
@given(st.lists(sectors(4096), min_size=1, max_size=4))
def test_nvme_identify_batch_agrees_with_the_parser(rows):
    decoded = decode_nvme_identify_batch(batch(rows))
    for i, data in enumerate(rows):
        exact = parse_nvme_identify(data)
        assert (decoded["serial"].iloc[i], decoded["model"].iloc[i]) == (exact.serial, exact.model)
        assert decoded["total_capacity_bytes"].iloc[i] == min(exact.total_capacity_bytes, INT64_MAX)


@SETTINGS
@given(st.binary(max_size=64))
def test_cleaned_strings_are_printable_ascii_and_reversible(raw):
    text = clean_ascii(raw)
    assert text.isascii() and (text == "" or text.isprintable())
    # every escape stands for exactly one byte: undoing them gives the stripped bytes back
    assert text.encode("ascii").decode("unicode_escape").encode("latin-1") == raw.strip(b" \x00")
