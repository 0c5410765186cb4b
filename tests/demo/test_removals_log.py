"""removals.csv is RFC 4180 and says what the ground truth says."""

from __future__ import annotations

import csv
import io
import re
from datetime import datetime, timezone

import pytest

from triage.demo import ground_truth, write_removals
from triage.store.schema import REMOVAL_REASONS

# RFC 3339 section 5.6 date-time with a mandatory offset
RFC3339 = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})\Z")


@pytest.fixture(scope="module")
def log_bytes(default_fleet, tmp_path_factory):
    path = write_removals(default_fleet, tmp_path_factory.mktemp("removals") / "removals.csv")
    return path.read_bytes()


def test_records_end_with_crlf_as_rfc4180_section_2_rule_1_says(log_bytes):
    text = log_bytes.decode("utf-8")
    assert text.endswith("\r\n")
    assert "\n" not in text.replace("\r\n", "")


def test_header_is_serial_removed_at_reason_note(log_bytes):
    rows = list(csv.reader(io.StringIO(log_bytes.decode("utf-8"), newline=""), strict=True))
    assert rows[0] == ["serial", "removed_at", "reason", "note"]
    assert all(len(row) == 4 for row in rows)


def test_reasons_are_our_words_and_times_are_rfc3339(log_bytes):
    reader = csv.DictReader(io.StringIO(log_bytes.decode("utf-8"), newline=""), strict=True)
    for row in reader:
        assert row["reason"] in REMOVAL_REASONS
        assert RFC3339.match(row["removed_at"]), row["removed_at"]


def test_log_parsed_with_the_csv_module_equals_the_ground_truth(default_fleet, log_bytes):
    truth = ground_truth(default_fleet).removals
    reader = csv.DictReader(io.StringIO(log_bytes.decode("utf-8"), newline=""), strict=True)
    parsed = [
        (r["serial"], datetime.fromisoformat(r["removed_at"]).astimezone(timezone.utc), r["reason"],
         r["note"] or None)
        for r in reader
    ]
    expected = [
        (r.serial, r.removed_at.to_pydatetime(), r.reason, r.note)
        for r in truth.itertuples(index=False)
    ]
    assert parsed == expected


def test_notes_with_quotes_and_commas_survive_the_round_trip(default_fleet, log_bytes):
    notes = set(default_fleet.removals["note"])
    tricky = {n for n in notes if '"' in n or "," in n}
    assert tricky, "the default fleet should exercise CSV quoting"
    parsed = {r["note"] for r in csv.DictReader(io.StringIO(log_bytes.decode("utf-8"), newline=""))}
    assert tricky <= parsed
