"""Invalid lines appear only on request, one of each kind the input contract rejects."""

from __future__ import annotations

import gzip
import json
import re
from dataclasses import replace

import pytest

from triage.demo import generate_fleet, write_captures
from triage.demo.writer import BAD_LINE_KINDS
from tests.demo.conftest import SMALL

# docs/capture-format.md: payload lengths per bus; RFC 3339 section 5.6 date-time with offset.
LENGTHS = {"ata": {"identify": 512, "smart": 512, "thresholds": 512},
           "nvme": {"identify": 4096, "health": 512}}
RFC3339 = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})\Z")


def contract_problem(text: str) -> str | None:
    """Why a line breaks the capture contract (our own reading of it), or None."""
    try:
        obj = json.loads(text)
    except json.JSONDecodeError:
        return "bad-json"
    for name in ("capture", "host", "device", "taken_at", "bus", "identify"):
        if name not in obj:
            return "missing-field"
    if not RFC3339.match(obj["taken_at"]):
        return "bad-timestamp"
    for name, size in LENGTHS[obj["bus"]].items():
        if name not in obj:
            if name == "thresholds":
                continue
            return "missing-field"
        try:
            data = bytes.fromhex(obj[name])
        except ValueError:
            return "bad-hex"
        if len(data) != size:
            return "wrong-length"
        # ACS-3 SMART READ DATA / SFF-8035i thresholds: the 512 bytes sum to 0 mod 256
        if name in ("smart", "thresholds") and sum(data) % 256:
            return "checksum"
    return None


def _problems(paths):
    out = []
    for path in paths:
        if path.name.endswith(".jsonl.gz"):
            with gzip.open(path, "rt", encoding="utf-8") as fh:
                out += [p for p in map(contract_problem, fh) if p]
    return out


def test_by_default_every_line_keeps_the_contract(small_files):
    assert _problems(small_files) == []


@pytest.fixture(scope="module")
def with_bad_lines(tmp_path_factory):
    spec = replace(SMALL, days=8, bad_lines=len(BAD_LINE_KINDS))
    return write_captures(generate_fleet(spec), tmp_path_factory.mktemp("bad"))


def test_requested_bad_lines_break_the_contract_once_per_kind(with_bad_lines):
    assert sorted(_problems(with_bad_lines)) == sorted(BAD_LINE_KINDS)
