"""A large plain capture file read as byte ranges by several workers gives exactly what reading it
in one piece gives: the same rows, the same quarantine lines with the same line numbers, the same
capture kept when two share a (serial, taken_at)."""

from __future__ import annotations

import io
from datetime import datetime, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.ingest.lines import ata_line, nvme_line
from tests.ingest.stores import store_contents
from triage.engine import LocalEngine
from triage.ingest import captures, ingest_paths, reading
from triage.ingest.captures import Piece, capture_parts, plan_tasks
from triage.ingest.reading import CaptureLines, line_start_at
from triage.store.dataset import Store

NOW = datetime(2026, 11, 2, 12, 0, tzinfo=timezone.utc)


CUT_SHORT = '{"capture": 1, "host": "ash-st01"'  # a line cut short: bad JSON


def mixed_lines() -> list[str]:
    """Good ATA and NVMe captures with the awkward cases between them: bad JSON, a bad checksum,
    a repeated (serial, taken_at) whose first copy must win, blank lines, an oversize line."""
    lines = []
    for i in range(40):
        lines.append(ata_line(f"QHR{i:04d}", taken_at=f"2026-11-01T02:{i % 60:02d}:00Z"))
        if i % 7 == 3:
            lines.append(nvme_line(f"CNR{i:04d}", taken_at=f"2026-11-01T03:{i % 60:02d}:00+01:00"))
        if i % 11 == 5:
            lines.append(CUT_SHORT)
        if i % 13 == 6:
            lines.append(ata_line(f"QHX{i:04d}", smart="00" * 512))  # checksum caught in the batch decode
        if i % 9 == 4:
            lines.append("")  # blank line: numbered, not read
    lines.append(ata_line("QHR0005", taken_at="2026-11-01T02:05:00Z", host="later-copy"))  # repeat: first wins
    lines.append("x" * (reading.MAX_LINE_BYTES + 10))  # oversize
    lines.append(ata_line("QHRLAST", taken_at="2026-11-01T04:00:00Z"))
    return lines


def ingest_with_ranges(tmp_path, monkeypatch, name, data: bytes | None, span: int | None, workers=2):
    path = tmp_path / "night.jsonl"
    if data is not None:
        path.write_bytes(data)
    if span is None:  # never split: the file is read in one piece
        monkeypatch.setattr(captures, "MIN_RANGE_BYTES", 2**40)
    else:
        monkeypatch.setattr(captures, "MIN_RANGE_BYTES", span)
        monkeypatch.setattr(captures, "RANGE_BYTES", span)
    store = Store(tmp_path / f"store-{name}")
    with LocalEngine(workers) as engine:
        report = ingest_paths(store, [path], now=NOW, engine=engine)
    return store, report


@pytest.mark.parametrize("span", [1000, 4096, 30_000])
def test_a_file_read_as_byte_ranges_stores_what_one_piece_stores(tmp_path, monkeypatch, span):
    data = ("\n".join(mixed_lines()) + "\n").encode()
    whole, whole_report = ingest_with_ranges(tmp_path, monkeypatch, "whole", data, None)
    split, split_report = ingest_with_ranges(tmp_path, monkeypatch, "split", None, span)
    assert len(plan_tasks([tmp_path / "night.jsonl"], 2, NOW, 100)) > 2  # it was split
    assert store_contents(whole) == store_contents(split)
    assert [(r.line, r.field) for r in split_report.rejected] == [(r.line, r.field) for r in whole_report.rejected]
    assert split_report.repeated == whole_report.repeated == 1
    kept = split.read("snapshots").set_index("serial").loc["QHR0005", "host"]
    assert kept == "ash-st01"  # the first copy in the file, whichever range read the later one


def test_line_numbers_of_quarantined_lines_count_every_line_of_the_file(tmp_path, monkeypatch):
    lines = mixed_lines()
    data = ("\n".join(lines) + "\n").encode()
    _, report = ingest_with_ranges(tmp_path, monkeypatch, "night", data, 1000)
    expected = [i + 1 for i, text in enumerate(lines) if text == CUT_SHORT or text.startswith("xxx")]
    assert len(expected) == 5
    assert sorted(r.line for r in report.rejected if r.field is None) == expected
    texts = {r.line: r.text for r in report.rejected}
    assert [texts[n] for n in expected[:-1]] == [CUT_SHORT] * 4  # the excerpt is that line's text


def test_blank_lines_are_added_up_over_the_ranges_of_a_file(tmp_path, monkeypatch):
    monkeypatch.setattr(reading, "MAX_BLANK_LINES", 5)
    monkeypatch.setattr(captures, "MAX_BLANK_LINES", 5)
    lines = []
    for i in range(8):  # 8 blank lines spread so that no single range holds more than 5
        lines += [ata_line(f"QHB{i}", taken_at=f"2026-11-01T02:{i:02d}:00Z")] * 3 + [""]
    data = ("\n".join(lines) + "\n").encode()
    _, report = ingest_with_ranges(tmp_path, monkeypatch, "night", data, 3000)
    blank = [r for r in report.rejected if "blank lines" in r.reason]
    assert [(r.line, r.reason.split()[0]) for r in blank] == [(len(lines) + 1, "8")]


def test_a_last_line_without_its_newline_is_read_by_the_last_range(tmp_path, monkeypatch):
    lines = [ata_line(f"QHN{i}", taken_at=f"2026-11-01T02:{i:02d}:00Z") for i in range(6)]
    store, _ = ingest_with_ranges(tmp_path, monkeypatch, "night", "\n".join(lines).encode(), 2000)
    assert sorted(store.read("snapshots")["serial"]) == [f"QHN{i}" for i in range(6)]


def test_a_range_inside_one_long_line_reads_nothing():
    data = b"a\n" + b"x" * 100 + b"\nb\n"
    fh = io.BytesIO(data)
    assert line_start_at(fh, 10) == line_start_at(fh, 50) == 103  # both cuts move to line "b"


def test_the_start_of_a_line_is_its_own_line_start():
    fh = io.BytesIO(b"ab\ncd\n")
    assert [line_start_at(fh, k) for k in range(7)] == [0, 3, 3, 3, 6, 6, 6]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.binary(max_size=40).map(lambda b: b.replace(b"\n", b"")), max_size=30),
       st.lists(st.integers(min_value=1, max_value=2000), max_size=8), st.booleans())
def test_byte_ranges_cut_anywhere_give_every_line_once_in_order(tmp_path_factory, lines, cuts, newline_at_end):
    data = b"\n".join(lines) + (b"\n" if newline_at_end else b"")
    path = tmp_path_factory.mktemp("r") / "cut.jsonl"
    path.write_bytes(data)
    whole = CaptureLines(path)
    expected = [line for _, line in whole]
    bounds = sorted({c for c in cuts if c < len(data)})
    got, numbered, blanks = [], 0, 0
    for start, stop in zip([0] + bounds, bounds + [None]):
        reader = CaptureLines(path, start, 1, stop)
        got += [line for _, line in reader]
        numbered += reader.next_line - 1
        blanks += reader.blank_lines
    assert got == expected
    assert numbered == whole.next_line - 1 and blanks == whole.blank_lines


def test_large_plain_files_are_cut_and_gzip_files_are_not(tmp_path, monkeypatch):
    monkeypatch.setattr(captures, "MIN_RANGE_BYTES", 100)
    monkeypatch.setattr(captures, "RANGE_BYTES", 100)
    plain = tmp_path / "big.jsonl"
    plain.write_bytes(b"x" * 450)
    packed = tmp_path / "big.jsonl.gz"
    packed.write_bytes(b"y" * 450)
    tasks = plan_tasks([plain, packed], 2, NOW, 10)
    assert [t.pieces for t in tasks[:5]] == [(Piece(0, plain, s, s + 100 if s < 400 else None),)
                                             for s in range(0, 500, 100)]
    assert tasks[5].pieces == (Piece(1, packed),)


def test_a_range_longer_than_a_batch_is_finished_in_order(tmp_path, monkeypatch):
    monkeypatch.setattr(captures, "MIN_RANGE_BYTES", 20_000)
    monkeypatch.setattr(captures, "RANGE_BYTES", 20_000)
    lines = [ata_line(f"QHL{i:02d}", taken_at=f"2026-11-01T02:{i:02d}:00Z") for i in range(30)]
    path = tmp_path / "long.jsonl"
    path.write_text("\n".join(lines) + "\n")
    with LocalEngine(2) as engine:
        parts = list(capture_parts([path], engine=engine, now=NOW, max_lines=2))
    assert all(batch.lines <= 2 for batch, _ in parts)
    serials = [s for batch, _ in parts for s in batch.snapshots["serial"].to_pylist()]
    assert serials == [f"QHL{i:02d}" for i in range(30)]
    captures_ids = [c & 0xFFFFFFFF for batch, _ in parts for c in batch.snapshots["_capture"].to_pylist()]
    assert captures_ids == list(range(1, 31))  # line numbers of the whole file
    assert [p.name for _, done in parts for p in done] == ["long.jsonl"]
    assert sum(batch.read_bytes for batch, _ in parts) == path.stat().st_size
