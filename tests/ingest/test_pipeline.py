"""The ingest run around the decoding: digests of large new files worked out beside it, commits
written beside it (in order, one at a time), progress counted in bytes read."""

from __future__ import annotations

import hashlib
from datetime import datetime, timezone

import pytest

from tests.ingest.lines import ata_line
from triage.engine import LocalEngine
from triage.ingest import captures, ingest_paths, run
from triage.store.dataset import Store

NOW = datetime(2026, 11, 2, 12, 0, tzinfo=timezone.utc)


def night(i: int, n: int = 30) -> list[str]:
    return [ata_line(f"QHP{i}{k:03d}", taken_at=f"2026-11-01T02:{k % 60:02d}:00Z") for k in range(n)]


def test_a_large_new_file_is_listed_with_its_sha256_and_skipped_next_time(tmp_path, write_capture, monkeypatch):
    monkeypatch.setattr(run, "LATE_DIGEST_BYTES", 1)  # every file counts as large
    path = write_capture("big.jsonl", night(1), compress=False)
    store = Store(tmp_path / "store")
    first = ingest_paths(store, [path], now=NOW)
    listed = [f for m in store.manifest() for f in m["files"]]
    # the manifest's digest is SHA-256 of the file's bytes (FIPS 180-4, as hashlib computes it)
    assert [f["sha256"] for f in listed] == [hashlib.sha256(path.read_bytes()).hexdigest()]
    again = ingest_paths(store, [path], now=NOW)  # same size as a stored file: digest first, skipped
    assert (first.files_read, again.files_read, again.files_skipped) == (1, 0, 1)


def test_two_new_files_with_the_same_content_are_stored_once(tmp_path, write_capture, monkeypatch):
    monkeypatch.setattr(run, "LATE_DIGEST_BYTES", 1)
    a = write_capture("a.jsonl", night(2), compress=False)
    b = write_capture("b.jsonl", night(2), compress=False)
    report = ingest_paths(Store(tmp_path / "store"), [a, b], now=NOW)
    assert (report.files_read, report.files_skipped) == (1, 1)


def test_a_file_whose_late_digest_fails_is_quarantined_and_left_for_next_run(tmp_path, write_capture, monkeypatch):
    monkeypatch.setattr(run, "LATE_DIGEST_BYTES", 1)
    path = write_capture("a.jsonl", night(3), compress=False)

    def unreadable(_):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(run, "file_digest", unreadable)
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [path], now=NOW)
    assert [str(r) for r in report.rejected] == [f"{path}:1: file unreadable: Permission denied"]
    assert not [f for m in store.manifest() for f in m["files"]]  # read again next run


def test_commits_keep_file_order_and_each_lists_the_files_it_finished(tmp_path, write_capture, monkeypatch):
    monkeypatch.setattr(run, "COMMIT_LINES", 25)
    paths = [write_capture(f"n{i}.jsonl.gz", night(i)) for i in range(4)]
    store = Store(tmp_path / "store")
    with LocalEngine(2) as engine:
        report = ingest_paths(store, paths, now=NOW, engine=engine)
    listed = [f["path"] for m in store.manifest() for f in m["files"]]
    assert listed == [str(p) for p in paths]
    assert report.stored["snapshots"] == len(store.read("snapshots")) == 120


def test_progress_counts_bytes_up_to_the_size_of_the_input(tmp_path, write_capture, monkeypatch):
    monkeypatch.setattr(captures, "MIN_RANGE_BYTES", 4096)
    monkeypatch.setattr(captures, "RANGE_BYTES", 4096)
    paths = [write_capture("a.jsonl.gz", night(5)), write_capture("b.jsonl", night(6), compress=False)]
    total = sum(p.stat().st_size for p in paths)
    seen = []
    ingest_paths(Store(tmp_path / "store"), paths, now=NOW, progress=lambda done, of: seen.append((done, of)))
    assert {of for _, of in seen} == {total}
    assert [done for done, _ in seen] == sorted(done for done, _ in seen) and seen[-1][0] == total
    assert len({done for done, _ in seen}) > 3  # moved along with the ranges, not only at the end


def test_a_task_whose_file_is_gone_raises_one_line_naming_it(tmp_path, write_capture):
    from triage.ingest.captures import InputNotVisible, plan_tasks, read_task

    path = write_capture("a.jsonl.gz", night(7))
    (task,) = plan_tasks([path], 1, NOW, 100)
    path.unlink()
    with pytest.raises(InputNotVisible, match="same paths") as caught:
        read_task(task)
    assert "\n" not in str(caught.value) and str(path) in str(caught.value)
