"""Hostile and odd input: each problem found by fuzzing costs its own line (or file), never the night."""

from __future__ import annotations

import gzip
import json
import os
from datetime import datetime, timedelta, timezone

import pandas as pd
import pyarrow.dataset as ds
import pytest
from typer.testing import CliRunner

from tests.ingest.lines import ATTRS, HEALTH, THRESHOLDS, ata_line, nvme_line
from triage.cli import app
from triage.exitcodes import Exit
from triage.formats.ata_smart import build_smart_data
from triage.formats.nvme_health import build_nvme_health
from triage.ingest import ingest_paths
from triage.ingest import reading
from triage.ingest.captures import FUTURE_TOLERANCE, capture_parts
from triage.store.dataset import Store

NOW = datetime(2026, 11, 2, 12, 0, tzinfo=timezone.utc)  # the ingesting machine's clock in these tests


def ingest(tmp_path, paths, **kwargs):
    store = Store(tmp_path / "store")
    return store, ingest_paths(store, paths, now=NOW, **kwargs)


def quarantine(store):
    return [json.loads(line) for f in store.quarantine_dir.glob("*.jsonl") for line in f.read_text().splitlines()]


def nvme_line_with(serial="CNV1", **health):
    obj = json.loads(nvme_line(serial))
    obj["health"] = build_nvme_health(HEALTH.__class__(**{**HEALTH.__dict__, **health})).hex()
    return json.dumps(obj)


# -- one line must not abort the run ------------------------------------------------------------

def spaced_hex() -> str:
    smart = json.loads(ata_line())["smart"]
    return "  " + smart[2:]  # right length, but bytes.fromhex skips the spaces: 511 bytes


ONE_BAD_LINE = {
    "hex holding whitespace": (ata_line("QHAX", smart=spaced_hex()), "smart"),
    "bus is a list": (ata_line("QHAX", bus=[]), "bus"),
    "bus is an object": (ata_line("QHAX", bus={}), "bus"),
    "capture is true": (ata_line("QHAX", capture=True), "capture"),
    "capture is 1.0": (ata_line("QHAX", capture=1.0), "capture"),
    "offset hour 24": (ata_line("QHAX", taken_at="2026-11-01T02:10:00+24:00"), "taken_at"),
    "year 0000": (ata_line("QHAX", taken_at="0000-01-01T00:00:00Z"), "taken_at"),
    "year 10000 in UTC": (ata_line("QHAX", taken_at="9999-12-31T23:59:59-01:00"), "taken_at"),
    "a month ahead": (ata_line("QHAX", taken_at="2026-12-02T12:00:00Z"), "taken_at"),
    "year 2300": (ata_line("QHAX", taken_at="2300-01-01T00:00:00Z"), "taken_at"),
    "NaN in an unknown key": (ata_line("QHAX").replace('"capture": 1', '"x": NaN, "capture": 1'), None),
}


@pytest.mark.parametrize("kind", ONE_BAD_LINE)
def test_each_hostile_line_is_its_own_quarantine_reason(tmp_path, write_capture, kind):
    bad, field = ONE_BAD_LINE[kind]
    path = write_capture("mixed.jsonl.gz", [ata_line("QHA1"), nvme_line("CNV1"), bad, ata_line("QHA2")])
    store, report = ingest(tmp_path, [path])
    assert sorted(store.read("snapshots")["serial"]) == ["CNV1", "QHA1", "QHA2"]
    assert [(r.line, r.field) for r in report.rejected] == [(3, field)]
    assert quarantine(store)[0]["text"] == bad


def test_no_partition_is_made_for_impossible_years(tmp_path, write_capture):
    lines = [ata_line("QHA1"), ata_line("QHA2", taken_at="0000-01-01T00:00:00Z"),
             ata_line("QHA3", taken_at="9999-12-31T23:59:59-01:00")]
    store, _ = ingest(tmp_path, [write_capture("a.jsonl.gz", lines)])
    assert store.days("snapshots") == ["2026-11-01"]


def test_a_capture_within_the_clock_tolerance_is_stored(tmp_path, write_capture):
    soon = (NOW + FUTURE_TOLERANCE - timedelta(minutes=1)).strftime("%Y-%m-%dT%H:%M:%SZ")
    store, report = ingest(tmp_path, [write_capture("a.jsonl.gz", [ata_line(taken_at=soon)])])
    assert not report.rejected and len(store.read("snapshots")) == 1


def test_nanosecond_and_lower_case_timestamps_are_stored_to_the_microsecond(tmp_path, write_capture):
    # RFC 3339 section 5.6: time-secfrac is any number of digits; section 5.6's note: "T" and "Z"
    # may be lower case. The store keeps microseconds: finer digits are cut, not rounded.
    lines = [ata_line("QHA1", taken_at="2026-11-01T02:10:00.123456789Z"),
             ata_line("QHA2", taken_at="2026-11-01t02:10:00z"),
             ata_line("QHA3", taken_at="2026-11-01t03:10:00.5+01:00")]
    store, report = ingest(tmp_path, [write_capture("a.jsonl.gz", lines)])
    assert not report.rejected
    taken = store.read("snapshots").set_index("serial")["taken_at"]
    assert taken["QHA1"] == pd.Timestamp("2026-11-01T02:10:00.123456Z")
    assert taken["QHA2"] == pd.Timestamp("2026-11-01T02:10:00Z")
    assert taken["QHA3"] == pd.Timestamp("2026-11-01T02:10:00.5Z")


def test_a_huge_integer_in_an_unknown_key_is_ignored(tmp_path, write_capture):
    line = ata_line("QHA1").replace('"capture": 1', '"rack_id": ' + "9" * 309 + ', "capture": 1')
    store, report = ingest(tmp_path, [write_capture("a.jsonl.gz", [line])])
    assert not report.rejected and len(store.read("snapshots")) == 1


# -- integers never pass through floating point ------------------------------------------------

def test_a_128_bit_counter_mixed_with_ata_is_clamped_and_flagged(tmp_path, write_capture):
    lines = [ata_line("QHA1"), nvme_line_with("CNV1", media_errors=2**128 - 1), nvme_line_with("CNV2")]
    store, report = ingest(tmp_path, [write_capture("a.jsonl.gz", lines)])
    rows = stored_exactly(store)
    assert not report.rejected and report.clamped == 1
    # NVMe Base 2.0 log 02h bytes 160-175 are 128-bit; the int64 column saturates at 2**63-1
    assert rows["CNV1"]["nvme_media_errors"] == 2**63 - 1
    assert {s: r["counters_clamped"] for s, r in rows.items()} == {"QHA1": False, "CNV1": True, "CNV2": False}


def test_2_to_the_53_plus_1_is_stored_exactly_beside_ata_lines(tmp_path, write_capture):
    # 2**53 + 1 is the first integer a float64 cannot hold (IEEE 754 binary64: 53-bit significand)
    lines = [ata_line("QHA1"), nvme_line_with("CNV1", media_errors=2**53 + 1)]
    store, _ = ingest(tmp_path, [write_capture("a.jsonl.gz", lines)])
    assert stored_exactly(store)["CNV1"]["nvme_media_errors"] == 2**53 + 1


def stored_exactly(store) -> dict[str, dict]:
    """The stored snapshot rows as Python values straight from the Parquet files (no pandas
    float64 on the way, which could not show 2**53 + 1)."""
    table = ds.dataset(store.table_dir("snapshots"), format="parquet", partitioning="hive").to_table()
    return {row["serial"]: row for row in table.to_pylist()}


# -- removal logs ------------------------------------------------------------------------------

def test_a_removal_line_that_is_not_utf8_is_rejected_alone(tmp_path):
    log = tmp_path / "removals.csv"
    log.write_bytes(b"serial,removed_at,reason\r\nQHA1,2026-11-01,failed\r\nQH\xffA2,2026-11-01,failed\r\n"
                    b"QHA3,9999-12-31T23:59:59-01:00,failed\r\nQHA4,2026-11-01T01:00:00z,retired\r\n")
    store, report = ingest(tmp_path, [log])
    assert sorted(store.read("removals")["serial"]) == ["QHA1", "QHA4"]
    assert [(r.line, r.field) for r in report.rejected] == [(3, None), (4, "removed_at")]
    assert "\ufffd" in quarantine(store)[0]["text"]


# -- file names, suffixes, folders -------------------------------------------------------------

def test_a_file_name_that_is_not_utf8_is_stored_with_an_escape(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    name = os.fsdecode(b"ash-\xff.jsonl")
    (folder / name).write_text(ata_line("QHA1") + "\n" + ata_line("QHA2", smart="zz" * 512) + "\n")
    store, report = ingest(tmp_path, [folder])
    assert store.read("snapshots")["source_file"].iloc[0].endswith("ash-\\xff.jsonl")
    assert str(report.rejected[0]).startswith(str(folder) + "/ash-\\xff.jsonl:2:")
    assert store.manifest()[-1]["files"][0]["path"].endswith("ash-\\xff.jsonl")


def test_suffixes_are_read_in_any_case(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "A.JSONL").write_text(ata_line("QHA1") + "\n")
    (folder / "b.jsonl.GZ").write_bytes(gzip.compress((ata_line("QHA2") + "\n").encode()))
    (folder / "removals.CSV").write_text("serial,removed_at,reason\nQHA1,2026-11-01,failed\n")
    store, report = ingest(tmp_path, [folder])
    assert report.files_read == 3 and sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA2"]


def test_a_folder_with_nothing_readable_is_said_and_exits_non_zero(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "notes.txt").write_text("not a capture\n")
    result = CliRunner().invoke(app, ["ingest", str(folder), "--store", str(tmp_path / "store")])
    assert result.exit_code == Exit.USAGE
    assert "no capture file" in result.output and str(folder) in result.output


@pytest.mark.parametrize("named", ["missing.jsonl", "notes.txt"])
def test_a_mistyped_input_is_one_line_and_creates_no_store(tmp_path, named):
    (tmp_path / "notes.txt").write_text("not a capture\n")
    root = tmp_path / "new-store"
    result = CliRunner().invoke(app, ["ingest", str(tmp_path / named), "--store", str(root)])
    assert result.exit_code == Exit.USAGE
    assert len(result.stderr.strip().splitlines()) == 1 and named in result.stderr
    assert not root.exists()  # not even an empty folder holding a lock file


# -- damaged files -----------------------------------------------------------------------------

def test_a_corrupted_gzip_member_keeps_the_lines_before_the_damage(tmp_path):
    lines = [ata_line(f"QHA{i:03d}", taken_at=f"2026-11-01T02:{i % 60:02d}:{i // 60:02d}Z") for i in range(100)]
    data = bytearray(gzip.compress(("\n".join(lines) + "\n").encode(), compresslevel=1))
    data[len(data) * 9 // 10] ^= 0xFF
    path = tmp_path / "bad.jsonl.gz"
    path.write_bytes(bytes(data))
    store, report = ingest(tmp_path, [path])
    stored = set(store.read("snapshots")["serial"])
    assert len(stored) >= 50  # inflated before the damage: kept (the reference reader is zlib)
    assert stored <= {f"QHA{i:03d}" for i in range(100)}
    assert any("gzip" in r.reason or "bad JSON" in r.reason or "checksum" in r.reason for r in report.rejected)


@pytest.mark.parametrize("byte", [b"\n", b"a"])  # a bomb of blank lines, or of one endless line
def test_a_gzip_bomb_stops_that_file_with_a_reason(tmp_path, write_capture, byte):
    bomb = tmp_path / "bomb.jsonl.gz"
    bomb.write_bytes(gzip.compress(byte * (reading.INFLATE_RATIO_FLOOR + 2**22), compresslevel=9))
    good = write_capture("good.jsonl.gz", [ata_line("QHA1")])
    store, report = ingest(tmp_path, [bomb, good])
    assert list(store.read("snapshots")["serial"]) == ["QHA1"]
    assert [r.source.endswith("bomb.jsonl.gz") and "inflates more than" in r.reason for r in report.rejected] == [True]


def test_a_bomb_of_newlines_is_reported_and_the_lines_around_it_kept(tmp_path):
    path = tmp_path / "blank.jsonl"
    path.write_bytes((ata_line("QHA1") + "\n").encode() + b"\n" * 3_000_000 + (ata_line("QHA2") + "\n").encode())
    store, report = ingest(tmp_path, [path])
    assert sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA2"]
    assert len(report.rejected) == 1 and "3000000 blank lines" in report.rejected[0].reason


def test_a_line_over_the_limit_is_rejected_with_a_bounded_excerpt(tmp_path):
    path = tmp_path / "long.jsonl"
    long = b'{"capture": 1, "note": "' + b"x" * (3 * reading.MAX_LINE_BYTES) + b'"}'
    path.write_bytes((ata_line("QHA1") + "\n").encode() + long + b"\n" + (ata_line("QHA2") + "\n").encode())
    store, report = ingest(tmp_path, [path])
    assert sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA2"]
    assert [(r.line, r.field) for r in report.rejected] == [(2, None)]
    text = quarantine(store)[0]["text"]
    assert len(text) < reading.EXCERPT_BYTES + 100 and text.endswith(f"[cut: {len(long)} bytes in all]")


# -- the same capture twice ----------------------------------------------------------------------

def two_captures_same_key():
    fewer = build_smart_data([a for a in ATTRS if a.id != 197])
    return ata_line("QHA1", smart=fewer.hex()), ata_line("QHA1")


def test_one_capture_wins_in_both_tables_within_a_run(tmp_path, write_capture):
    first, second = two_captures_same_key()
    store, report = ingest(tmp_path, [write_capture("a.jsonl.gz", [first, second])])
    assert report.repeated == 1
    snap = store.read("snapshots")
    assert len(snap) == 1 and pd.isna(snap["pending_sectors"].iloc[0])  # the first: no attribute 197
    assert sorted(store.read("attributes")["attribute_id"]) == sorted(a.id for a in ATTRS if a.id != 197)


def test_one_capture_wins_in_both_tables_across_runs(tmp_path, write_capture):
    first, second = two_captures_same_key()
    store, _ = ingest(tmp_path, [write_capture("a.jsonl.gz", [first])])
    ingest_paths(store, [write_capture("b.jsonl.gz", [second])], now=NOW)
    assert len(store.read("snapshots")) == 1
    assert 197 not in set(store.read("attributes")["attribute_id"])


# -- memory bounded by a batch ---------------------------------------------------------------------

@pytest.mark.parametrize("workers", [1, 2])
def test_a_file_longer_than_a_batch_gives_the_same_rows(tmp_path, write_capture, workers):
    lines = [ata_line(f"QHA{i}", taken_at=f"2026-11-01T02:{i:02d}:00Z") for i in range(11)]
    lines[5] = ata_line("QHAX", smart="zz" * 512)
    paths = [write_capture("a.jsonl.gz", lines), write_capture("b.jsonl", [nvme_line("CNV1")], compress=False)]
    parts = list(capture_parts(paths, workers=workers, now=NOW, max_lines=3))
    assert all(batch.lines <= 3 for batch, _ in parts) and len(parts) >= 4
    assert [p.name for _, done in parts for p in done] == ["a.jsonl.gz", "b.jsonl"]
    assert "a.jsonl.gz" not in [p.name for _, done in parts[:3] for p in done]  # its 11th line is in the 4th
    serials = [s for batch, _ in parts for s in batch.snapshots["serial"].to_pylist()]
    assert serials == [f"QHA{i}" for i in range(11) if i != 5] + ["CNV1"]
    assert [(r.line, r.field) for batch, _ in parts for r in batch.rejected] == [(6, "smart")]
    assert parts[1][0].rejected[0].text == lines[5]


def test_a_file_spread_over_several_commits_is_stored_once_and_listed_last(tmp_path, write_capture, monkeypatch):
    from triage.ingest import captures, run

    monkeypatch.setattr(captures, "BATCH_LINES", 2)
    monkeypatch.setattr(run, "COMMIT_LINES", 2)
    lines = [ata_line(f"QHA{i}", taken_at=f"2026-11-01T02:{i:02d}:00Z") for i in range(7)]
    path = write_capture("a.jsonl.gz", lines)
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [path], now=NOW, workers=1)
    assert report.stored["snapshots"] == 7 and len(store.read("snapshots")) == 7
    manifest = store.manifest()
    assert len(manifest) == 4 and [len(m["files"]) for m in manifest] == [0, 0, 0, 1]


def test_a_file_that_cannot_be_read_is_quarantined_and_the_rest_stored(tmp_path, write_capture, monkeypatch):
    from triage.ingest import run

    bad = write_capture("bad.jsonl.gz", [ata_line("QHA1")])
    good = write_capture("good.jsonl.gz", [ata_line("QHA2")])
    real = run.file_digest

    def digest(path):
        if path == bad:
            raise PermissionError(13, "Permission denied")  # as root, chmod cannot make one
        return real(path)

    monkeypatch.setattr(run, "file_digest", digest)
    store, report = ingest(tmp_path, [bad, good])
    assert list(store.read("snapshots")["serial"]) == ["QHA2"]
    assert [str(r) for r in report.rejected] == [f"{bad}:1: file unreadable: Permission denied"]
    assert str(bad) not in {f["path"] for m in store.manifest() for f in m["files"]}  # tried again next run
