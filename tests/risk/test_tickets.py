"""Ticket export: stable keys, states across nights, formula-injection cells, RFC 4180 output."""

from __future__ import annotations

import csv
from datetime import datetime, timezone

import pandas as pd

from triage.risk.rank import rank_drives
from triage.risk.tickets import export_tickets, read_tickets, ticket_key, to_csv_text
from triage.safety import cell

LATEST = pd.DataFrame({
    "serial": ["QA1", "QA2", "QA3"], "model": ["QH-HD8T-A"] * 3, "host": ["ash-r1-n01"] * 3,
    "slot": ["1", "2", "3"], "group": [None] * 3, "power_on_hours": [100, 100, 100],
})


def _ranked(flagged):
    flags = pd.DataFrame(
        [(s, "pending-growth", "replace-soon", "media", "pending growing", "pending 0 -> 24 in 3 days") for s in flagged],
        columns=["serial", "rule_id", "severity", "category", "title", "evidence"])
    return rank_drives(LATEST, flags, None)[0]


def _night(day):
    return datetime(2026, 11, day, 3, tzinfo=timezone.utc)


def test_same_drive_and_reason_give_the_same_key():
    assert ticket_key("QA1", "media") == ticket_key("QA1", "media")
    assert ticket_key("QA1", "media") != ticket_key("QA1", "check-path")
    assert ticket_key("QA1", "media") != ticket_key("QA2", "media")


def test_states_across_three_nights(tmp_path):
    out = tmp_path / "tickets.csv"
    # night 1: QA1 and QA2 flagged -> both new
    t1, c1 = export_tickets(_ranked(["QA1", "QA2"]), out, as_of=_night(1))
    assert dict(zip(t1["serial"], t1["state"])) == {"QA1": "new", "QA2": "new"}
    # night 2: QA1 still, QA2 gone, QA3 appears
    t2, c2 = export_tickets(_ranked(["QA1", "QA3"]), out, as_of=_night(2))
    assert dict(zip(t2["serial"], t2["state"])) == {"QA1": "ongoing", "QA3": "new", "QA2": "cleared"}
    assert (c2.new, c2.ongoing, c2.cleared) == (1, 1, 1)
    # night 3: QA1 and QA3 still; QA2's cleared ticket is not repeated; QA1 keeps its first night
    t3, c3 = export_tickets(_ranked(["QA1", "QA3"]), out, as_of=_night(3))
    assert dict(zip(t3["serial"], t3["state"])) == {"QA1": "ongoing", "QA3": "ongoing"}
    assert t3.set_index("serial").loc["QA1", "first_flagged"] == "2026-11-01"
    assert set(read_tickets(out)["key"]) == set(t3["key"])


def test_flag_returning_after_clearing_is_new_again(tmp_path):
    out = tmp_path / "tickets.csv"
    export_tickets(_ranked(["QA1"]), out, as_of=_night(1))
    export_tickets(_ranked([]), out, as_of=_night(2))
    t3, _ = export_tickets(_ranked(["QA1"]), out, as_of=_night(3))
    assert list(t3["state"]) == ["new"]


def test_formula_cells_are_neutralised():
    # OWASP "CSV Injection": prefix cells starting with = + - @ TAB CR with a single quote.
    # TAB and CR are escaped to visible text first (triage.safety), which cannot start a formula.
    for text in ["=HYPERLINK(\"x\")", "+1", "-2+3", "@SUM(A1)"]:
        assert cell(text) == "'" + text
    assert cell("QH-HD8T-A") == "QH-HD8T-A"


def test_firmware_formula_serial_survives_export_neutralised_and_reads_back(tmp_path):
    latest = LATEST.assign(serial=["=cmd|'/c calc'!A0", "QA2", "QA3"])
    flags = pd.DataFrame([("=cmd|'/c calc'!A0", "r", "watch", "media", "t", "e")],
                         columns=["serial", "rule_id", "severity", "category", "title", "evidence"])
    out = tmp_path / "t.csv"
    export_tickets(rank_drives(latest, flags, None)[0], out, as_of=_night(1))
    with out.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows[0]["serial"] == "'=cmd|'/c calc'!A0"
    assert read_tickets(out).loc[0, "serial"] == "=cmd|'/c calc'!A0"


def test_export_is_rfc4180_with_crlf_and_quoted_commas(tmp_path):
    # RFC 4180 sec. 2: records end in CRLF; fields holding commas or quotes are double-quoted,
    # with an inner quote doubled.
    ranked = _ranked(["QA1"])
    ranked.at[0, "evidence"] = ['pending 0 -> 24, "fast"']
    from triage.risk.tickets import current_tickets
    text = to_csv_text(current_tickets(ranked, _night(1)))
    assert text.count("\r\n") == 2 and "\n" not in text.replace("\r\n", "")
    assert '"pending 0 -> 24, ""fast"""' in text


def _silent(serials, when="2026-11-01T02:00Z"):
    return pd.DataFrame({"serial": serials, "last_seen": [pd.Timestamp(when)] * len(serials)})


def _ranked_without(gone, flagged):
    """Tonight's ranking when the drives in ``gone`` sent nothing (they are not in the frame)."""
    ranked = _ranked(flagged)
    return ranked[~ranked["serial"].isin(gone)].reset_index(drop=True)


def test_a_silent_drive_keeps_its_ticket_open_as_not_reporting(tmp_path):
    out = tmp_path / "tickets.csv"
    export_tickets(_ranked(["QA1", "QA2"]), out, as_of=_night(1))
    # night 2: QA2 sent nothing; silence is not evidence, so its ticket stays open
    t2, c2 = export_tickets(_ranked_without(["QA2"], ["QA1"]), out, as_of=_night(2), silent=_silent(["QA2"]))
    row = t2.set_index("serial").loc["QA2"]
    assert row["state"] == "not-reporting" and row["last_seen"].startswith("2026-11-01T02:00")
    assert (c2.new, c2.ongoing, c2.not_reporting, c2.cleared) == (0, 1, 1, 0)
    # night 3: still silent, still open (not dropped like a cleared ticket)
    t3, _ = export_tickets(_ranked_without(["QA2"], ["QA1"]), out, as_of=_night(3), silent=_silent(["QA2"]))
    assert t3.set_index("serial").loc["QA2", "state"] == "not-reporting"


def test_a_ticket_clears_when_the_drive_reports_without_the_flag_or_is_removed(tmp_path):
    out = tmp_path / "tickets.csv"
    export_tickets(_ranked(["QA1", "QA2"]), out, as_of=_night(1))
    t2, _ = export_tickets(_ranked_without(["QA2"], []), out, as_of=_night(2), removed={"QA2"})
    # QA1 reported tonight without the flag; QA2 is in the removal log
    assert dict(zip(t2["serial"], t2["state"])) == {"QA1": "cleared", "QA2": "cleared"}


def test_min_severity_keeps_watch_only_drives_out_but_open_tickets_stay(tmp_path):
    out = tmp_path / "tickets.csv"
    flags = pd.DataFrame([("QA1", "r", "watch", "media", "t", "e"), ("QA2", "r", "replace-soon", "media", "t", "e")],
                         columns=["serial", "rule_id", "severity", "category", "title", "evidence"])
    t1, _ = export_tickets(rank_drives(LATEST, flags, None)[0], out, as_of=_night(1), min_severity="check-path")
    assert list(t1["serial"]) == ["QA2"]
    # QA2 drops to watch: its open ticket goes on rather than clearing by a filter
    flags.loc[1, "severity"] = "watch"
    t2, _ = export_tickets(rank_drives(LATEST, flags, None)[0], out, as_of=_night(2), min_severity="check-path")
    assert dict(zip(t2["serial"], t2["state"])) == {"QA2": "ongoing"}


def test_rank_shows_each_flag_new_or_ongoing_with_the_day_first_raised(tmp_path):
    from triage.risk.tickets import flag_states

    out = tmp_path / "tickets.csv"
    export_tickets(_ranked(["QA1"]), out, as_of=_night(1))
    states = flag_states(_ranked(["QA1", "QA2"]), read_tickets(out), _night(2)).set_index("serial")
    assert (states.loc["QA1", "state"], states.loc["QA1", "first_raised"]) == ("ongoing", "2026-11-01")
    assert (states.loc["QA2", "state"], states.loc["QA2", "first_raised"]) == ("new", "2026-11-02")
    assert states.loc["QA3", "state"] is None  # not flagged


def test_an_export_from_before_this_version_still_reads(tmp_path):
    old = tmp_path / "old.csv"
    old.write_text("key,state,first_flagged,serial\r\nabc,new,2026-11-01,QA9\r\n")
    t, counts = export_tickets(_ranked([]), tmp_path / "new.csv", previous=old, as_of=_night(2), silent=_silent(["QA9"]))
    assert list(t["state"]) == ["not-reporting"] and counts.not_reporting == 1
