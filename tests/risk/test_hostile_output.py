"""Hostile strings in every stored field never reach a terminal, a CSV cell or a ticket raw.

A capture line is written by a host we do not control: host, slot and group are as untrusted as
the serial. These tests plant an OSC window-title sequence, raw ESC / CSI bytes, a bidirectional
override and a 300-character slot, then run the real commands and read every byte they print.
"""

from __future__ import annotations

import csv
import io

import pandas as pd
import pytest
from typer.testing import CliRunner

from tests.risk.standins import use_stand_ins
from triage.cli import app
from triage.safety import NAME_LIMIT, TEXT_LIMIT, cell, html_text, name, uncell, visible
from triage.store.dataset import Store

# ECMA-48 (5th ed.) 8.3.89 / xterm: ESC ] 0 ; text BEL sets the window title (OSC); ESC [ ... is CSI.
OSC_TITLE = "\x1b]0;pwned\x07"
CSI_CLEAR = "\x1b[2J"
LONG_SLOT = "s" * 300
BIDI = "ash\u202e1n"  # U+202E RIGHT-TO-LEFT OVERRIDE reverses what follows on screen


def _stand_in_evaluate(ruleset, history, now=None):
    rows = [(s, "pending-growth", "replace-now", "media", "pending grew", f"evidence {CSI_CLEAR}x")
            for s in sorted(set(history["serial"]))]
    return pd.DataFrame(rows, columns=["serial", "rule_id", "severity", "category", "title", "evidence"])


@pytest.fixture
def hostile_store(tmp_path, monkeypatch):
    use_stand_ins(monkeypatch, _stand_in_evaluate)
    rows = []
    last = pd.Timestamp.now(tz="UTC").floor("h") - pd.Timedelta(hours=1)  # fresh: not stale
    for day in (1, 2, 3):
        members = ["QZ-1", "QZ-2", "QZ-3"] + (["QZ-GONE"] if day < 3 else [])  # QZ-GONE: group degraded
        for i, serial in enumerate(members):
            rows.append({"serial": serial, "model": "QH-HD8T-A", "host": f"{BIDI}{OSC_TITLE}",
                         "slot": LONG_SLOT if i == 0 else f"{CSI_CLEAR}{i}",
                         "group": f"pool{OSC_TITLE}", "taken_at": last - pd.Timedelta(days=3 - day),
                         "power_on_hours": 9000 + 24 * day, "pending_sectors": day})
    store = Store(tmp_path / "store")
    store.append("snapshots", pd.DataFrame(rows))
    return store


def _run(*args):
    return CliRunner().invoke(app, list(args))


def _assert_clean(text: str) -> None:
    assert "\x1b" not in text and "\x07" not in text and "\u202e" not in text
    assert LONG_SLOT not in text


def test_visible_escapes_control_and_invisible_characters():
    assert visible(OSC_TITLE) == "\\x1b]0;pwned\\x07"
    assert visible("a\x9bb") == "a\\x9bb"  # C1 CSI (ECMA-48 8.3.16) is a control too
    assert visible(BIDI) == "ash\\u202e1n"
    assert visible("Quillmère 日本") == "Quillmère 日本"  # printable text is left alone


def test_long_values_are_cut_with_a_marker_and_never_exceed_the_limit():
    shown = name(LONG_SLOT)
    assert len(shown) <= NAME_LIMIT and shown.startswith("sss") and "+" in shown and "chars]" in shown
    assert len(visible("x" * 5000)) <= TEXT_LIMIT
    assert name("ash-r1-n01") == "ash-r1-n01"


@pytest.mark.parametrize("text", ["=1+1", "+1", "-1", "@SUM(A1)", "\uff1d1+1", "\ufe621", " =1", "\t=1",
                                  "\n=1", "\r=1"])
def test_every_formula_start_is_neutralised(text):
    # OWASP "CSV Injection" (https://owasp.org/www-community/attacks/CSV_Injection): a cell that
    # starts with = + - @ (or TAB / CR) is prefixed with '. Full-width U+FF1D and small U+FE62 fold to
    # = and + under NFKC (Unicode UAX #15); spreadsheets trim leading white space. Controls are first
    # escaped to visible text, so what is left must not start a formula.
    safe = cell(text)
    assert safe.startswith("'") or safe.startswith("\\x")
    assert not safe.startswith(("=", "+", "-", "@", " ", "\t", "\r", "\n"))


def test_uncell_restores_our_own_cells():
    for text in ["=1", "\uff1d1", "plain", "'quoted"]:
        assert uncell(cell(text)) == text


def test_html_text_escapes_markup_and_controls():
    assert html_text(f"<b>{OSC_TITLE}</b>") == "&lt;b&gt;\\x1b]0;pwned\\x07&lt;/b&gt;"


@pytest.mark.parametrize("width", ["150", "80"])
def test_rank_table_shows_no_raw_escape_and_keeps_its_layout(hostile_store, monkeypatch, width):
    monkeypatch.setenv("COLUMNS", width)
    result = _run("rank", "--store", str(hostile_store.root))
    assert result.exit_code == 0, result.output
    _assert_clean(result.stdout)
    _assert_clean(result.stderr)
    assert "\\x1b]0;pwned\\x07" in result.stdout  # shown, escaped, not hidden
    assert "QZ-2" in result.stdout and "QZ-3" in result.stdout  # the long slot does not collapse the rows
    if width == "150":  # ...nor squeeze the evidence column to "e..." (it did at 300 characters)
        assert "evidence \\x1b[2Jx" in result.stdout
    assert "caution:" in result.stderr and "pool\\x1b" in result.stderr


def test_rank_csv_cells_are_escaped_and_cut(hostile_store):
    result = _run("rank", "--format", "csv", "--store", str(hostile_store.root))
    assert result.exit_code == 0, result.output
    _assert_clean(result.stdout)
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert len(rows) == 3
    assert all(len(r["slot"]) <= NAME_LIMIT for r in rows)


def test_ticket_file_cells_are_escaped_and_cut(hostile_store, tmp_path):
    out = tmp_path / "tickets.csv"
    result = _run("tickets", "--out", str(out), "--store", str(hostile_store.root))
    assert result.exit_code == 4, result.output  # new flags
    text = out.read_text(encoding="utf-8")
    _assert_clean(text)
    _assert_clean(result.stderr)
    rows = list(csv.DictReader(io.StringIO(text)))
    assert {r["group"] for r in rows} == {"pool\\x1b]0;pwned\\x07"}
    assert all(len(r["slot"]) <= NAME_LIMIT for r in rows)
    # the second night reads the escaped file back and keeps every ticket ongoing
    again = _run("tickets", "--out", str(out), "--store", str(hostile_store.root))
    assert again.exit_code == 0, again.output
    assert "0 new, 3 ongoing" in again.stderr


def test_rejected_lines_and_file_names_on_stderr_are_escaped(tmp_path):
    bad = tmp_path / f"host{OSC_TITLE}.jsonl"
    bad.write_text('{"capture": 1, "host": "\\u001b]0;x\\u0007"}\n', encoding="utf-8")
    result = _run("ingest", str(bad), "--store", str(tmp_path / "store"))
    assert result.exit_code == 3, result.output
    assert "quarantined:" in result.stderr
    _assert_clean(result.stderr)
