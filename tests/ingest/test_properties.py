"""Property-based checks over the capture-line reader and the line checks (bounded examples; the
long run with a stated count is benchmarks/fuzz.py)."""

from __future__ import annotations

import gzip
import json
import tempfile
from datetime import datetime, timedelta, timezone
from pathlib import Path
from unittest import mock

import pandas as pd
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from tests.ingest.lines import ata_line, nvme_line
from triage.ingest import reading
from triage.ingest.captures import LineError, _parse_times, check_line, normalise_timestamp, parse_capture_files
from triage.ingest.removals import parse_removed_at

SETTINGS = settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
NOW = datetime(2026, 11, 2, 12, 0, tzinfo=timezone.utc)

#: bytes that make line structure interesting: newlines, CR, spaces, and a few letters
CONTENT = st.lists(st.sampled_from([b"\n", b"\r", b" ", b"a", b"bc", b"{}", b"\n\n", b"x" * 7]), max_size=60).map(b"".join)


def write(data: bytes, compress: bool) -> Path:
    folder = Path(tempfile.mkdtemp(prefix="triage-prop-"))
    path = folder / ("f.jsonl.gz" if compress else "f.jsonl")
    path.write_bytes(gzip.compress(data) if compress else data)
    return path


def expected_lines(data: bytes, limit: int) -> list[tuple[int, bytes | tuple]]:
    """The reference: bytes.split, numbered from 1, blank ones left out, long ones as (length, head)."""
    pieces = data.split(b"\n")
    if pieces and not pieces[-1].strip():
        pieces.pop()
    return [(i, p if len(p) <= limit else (len(p), p[:reading.EXCERPT_BYTES]))
            for i, p in enumerate(pieces, start=1) if p.strip()]


def as_plain(items):
    return [(n, (l.length, l.head) if isinstance(l, reading.OversizeLine) else l) for n, l in items]


@SETTINGS
@given(CONTENT, st.booleans(), st.integers(1, 9), st.integers(3, 12))
@example(b"\r\r\r\r", False, 1, 3)  # white space longer than the line limit is still a blank line
def test_the_reader_gives_the_lines_split_gives_whatever_the_block_size(data, compress, block, limit):
    path = write(data, compress)
    with mock.patch.object(reading, "BLOCK_BYTES", block), mock.patch.object(reading, "GZIP_STEP_BYTES", block), \
            mock.patch.object(reading, "MAX_LINE_BYTES", limit):
        got = as_plain(reading.CaptureLines(path))
        assert got == expected_lines(data, limit)


@SETTINGS
@given(CONTENT, st.booleans(), st.integers(0, 10), st.integers(1, 9))
def test_reading_resumes_where_it_stopped(data, compress, after, block):
    path = write(data, compress)
    with mock.patch.object(reading, "BLOCK_BYTES", block), mock.patch.object(reading, "GZIP_STEP_BYTES", block):
        whole = as_plain(reading.CaptureLines(path))
        first = reading.CaptureLines(path)
        lines = iter(first)
        head = [item for _, item in zip(range(after), lines)]
        rest = as_plain(reading.CaptureLines(path, first.position, first.next_line))
        assert as_plain(head) + rest == whole


@SETTINGS
@given(st.binary(max_size=300))
def test_any_bytes_are_a_capture_or_a_line_error(line):
    try:
        check_line(line)
    except LineError as exc:
        assert exc.reason


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(min_value=-(2**70), max_value=2**70) | st.floats(allow_nan=False)
    | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=5), inner, max_size=3),
    max_leaves=6,
)
FIELDS = ["capture", "host", "device", "slot", "group", "taken_at", "bus", "identify", "smart", "thresholds",
          "health", "extra"]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(FIELDS), JSON_VALUES, st.booleans())
def test_a_mutated_line_costs_only_itself(name, value, nvme):
    good = json.loads(nvme_line("CNVM") if nvme else ata_line("QHAM"))
    good[name] = value
    lines = [ata_line("QHA1"), json.dumps(good), nvme_line("CNV2")]
    path = write(("\n".join(lines) + "\n").encode(), compress=True)
    batch = parse_capture_files([path], workers=1, now=NOW)
    serials = batch.snapshots["serial"].to_pylist()
    assert {"QHA1", "CNV2"} <= set(serials)
    # every line is accounted for: stored, or rejected with its number and a reason
    assert len(serials) + len(batch.rejected) == 3
    assert all(r.line == 2 and r.reason for r in batch.rejected)


@SETTINGS
@given(st.datetimes(min_value=datetime(2000, 1, 2), max_value=datetime(2099, 12, 30)),
       st.integers(0, 12), st.integers(-23 * 60 - 59, 23 * 60 + 59), st.booleans(), st.booleans())
def test_rfc3339_text_gives_the_moment_python_computes(moment, digits, offset_minutes, lower, space):
    # The reference is Python's datetime arithmetic: local time minus the offset is UTC
    # (RFC 3339 section 4.2); digits past the microsecond are cut (the store keeps microseconds).
    fraction = f"{moment.microsecond:06d}{'987654'}"[:digits]
    sign = "+" if offset_minutes >= 0 else "-"
    hours, minutes = divmod(abs(offset_minutes), 60)
    offset = "Z" if offset_minutes == 0 and not lower else f"{sign}{hours:02d}:{minutes:02d}"
    text = moment.strftime("%Y-%m-%d") + (" " if space else "T") + moment.strftime("%H:%M:%S")
    text += ("." + fraction if digits else "") + offset
    if lower:
        text = text.replace("T", "t").replace("Z", "z")
    stamp = normalise_timestamp(text)
    parsed = _parse_times(pd.Series([stamp]))[0]
    micro = int((fraction + "000000")[:6]) if digits else 0
    expected = moment.replace(microsecond=micro, tzinfo=timezone.utc) - timedelta(minutes=offset_minutes)
    assert parsed == pd.Timestamp(expected)
    assert parse_removed_at(text) == expected


@SETTINGS
@given(st.text(max_size=40))
def test_any_removal_date_text_is_a_moment_or_a_value_error(text):
    try:
        moment = parse_removed_at(text)
    except ValueError:
        return
    assert moment.tzinfo is not None
