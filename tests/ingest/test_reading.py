"""How capture files are read: damaged and concatenated gzip, bad bytes, parallel decoding."""

from __future__ import annotations

import gzip

import pyarrow as pa

from tests.ingest.lines import ata_line, nvme_line
from triage.ingest import ingest_paths
from triage.ingest.captures import parse_capture_files
from triage.store.dataset import Store


def test_truncated_gzip_keeps_the_lines_before_the_damage(tmp_path):
    lines = [ata_line(f"QHA{i}", taken_at=f"2026-11-01T02:{i:02d}:00Z") for i in range(40)]
    data = gzip.compress(("\n".join(lines) + "\n").encode())
    path = tmp_path / "cut.jsonl.gz"
    path.write_bytes(data[: len(data) * 3 // 4])  # the copy to the collector stopped early
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [path])
    kept = len(store.read("snapshots"))
    assert 0 < kept < 40
    assert len(report.rejected) == 1
    rejected = report.rejected[0]
    assert rejected.line == kept + 1 and "truncated" in rejected.reason


def test_concatenated_gzip_members_are_all_read(tmp_path):
    # `cat monday.jsonl.gz tuesday.jsonl.gz > week.jsonl.gz` is a valid gzip file (RFC 1952, 2.2)
    path = tmp_path / "week.jsonl.gz"
    path.write_bytes(gzip.compress((ata_line("QHA1") + "\n").encode())
                     + gzip.compress((ata_line("QHA2") + "\n").encode()))
    store = Store(tmp_path / "store")
    assert not ingest_paths(store, [path]).rejected
    assert sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA2"]


def test_a_line_with_bytes_that_are_not_utf8_is_rejected_alone(tmp_path):
    path = tmp_path / "mixed.jsonl"
    bad = ata_line("QHA2").encode().replace(b'"ash-st01"', b'"ash-\xffst01"')
    path.write_bytes(ata_line("QHA1").encode() + b"\n" + bad + b"\n" + ata_line("QHA3").encode() + b"\n")
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [path])
    assert sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA3"]
    assert [(r.line, r.field) for r in report.rejected] == [(2, None)]
    assert "UTF-8" in report.rejected[0].reason
    assert "\ufffd" in report.rejected[0].text  # the bad byte is shown replaced, not dropped


def test_a_last_line_without_a_newline_is_still_read(tmp_path):
    path = tmp_path / "a.jsonl"
    path.write_text(ata_line("QHA1") + "\n" + nvme_line("CNV1"))
    store = Store(tmp_path / "store")
    assert not ingest_paths(store, [path]).rejected
    assert sorted(store.read("snapshots")["serial"]) == ["CNV1", "QHA1"]


def test_parallel_decoding_gives_the_same_rows_as_one_process(tmp_path):
    paths = []
    for f in range(5):
        path = tmp_path / f"site{f}.jsonl.gz"
        lines = [ata_line(f"QHA{f}{i}", taken_at=f"2026-11-0{f + 1}T02:{i:02d}:00Z") for i in range(6)]
        lines += [nvme_line(f"CNV{f}{i}", taken_at=f"2026-11-0{f + 1}T03:{i:02d}:00+01:00") for i in range(3)]
        lines.insert(4, ata_line(f"QHA{f}x", smart="zz" * 512))  # one bad line per file
        path.write_bytes(gzip.compress(("\n".join(lines) + "\n").encode()))
        paths.append(path)
    one = parse_capture_files(paths, workers=1)
    two = parse_capture_files(paths, workers=2)
    key = [("serial", "ascending"), ("taken_at", "ascending")]
    assert one.snapshots.sort_by(key).equals(two.snapshots.sort_by(key))
    order = key + [("attribute_id", "ascending")]
    assert isinstance(two.attributes, pa.Table)
    assert one.attributes.sort_by(order).equals(two.attributes.sort_by(order))
    assert sorted(map(str, one.rejected)) == sorted(map(str, two.rejected)) and len(two.rejected) == 5
