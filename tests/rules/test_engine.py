"""Rule engine semantics: each operator and function on small hand-built histories.

Windows and counts are also checked against independent computations: pandas ``merge_asof`` for
the baseline capture, pandas ``groupby`` for window extremes, and plain Python loops for runs of
increases.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from triage.rules import DRIVE_COLUMNS, FLAG_COLUMNS, DriveHistory, evaluate, per_drive
from triage.rules.expr import ExprError
from triage.rules.template import compile_template, format_value

from tests.rules.histories import at, frame, hdd, make_rule, nvme, values


# -- operators ------------------------------------------------------------------------------------

@pytest.mark.parametrize(
    "expression, expected",
    [
        ("pending_sectors == 8", {"A": False, "B": True, "C": False}),
        ("pending_sectors != 8", {"A": True, "B": False, "C": True}),
        ("pending_sectors < 8", {"A": True, "B": False, "C": False}),
        ("pending_sectors <= 8", {"A": True, "B": True, "C": False}),
        ("pending_sectors > 8", {"A": False, "B": False, "C": True}),
        ("pending_sectors >= 8", {"A": False, "B": True, "C": True}),
    ],
)
def test_each_comparison_operator(expression, expected):
    history = frame(hdd("A", pending_sectors=7), hdd("B", pending_sectors=8), hdd("C", pending_sectors=9))
    assert values(expression, history) == expected


def test_arithmetic_follows_precedence():
    history = frame(hdd("A", reallocated_sectors=6, pending_sectors=2))
    assert values("reallocated_sectors + pending_sectors * 2", history) == {"A": 10.0}
    assert values("(reallocated_sectors - pending_sectors) / 2", history) == {"A": 2.0}
    assert values("-pending_sectors", history) == {"A": -2.0}


def test_division_by_zero_is_unknown_not_infinite():
    history = frame(hdd("A", reallocated_sectors=6, pending_sectors=0))
    assert values("reallocated_sectors / pending_sectors", history) == {"A": None}
    assert values("reallocated_sectors / pending_sectors > 1", history) == {"A": None}


def test_text_fields_compare_for_equality():
    history = frame(hdd("A"), nvme("N"))
    assert values("bus == 'nvme'", history) == {"A": False, "N": True}
    assert values("model != 'Corvid NV1920'", history) == {"A": True, "N": False}


def test_flag_fields_are_conditions_on_their_own():
    history = frame(hdd("A", prefail_tripped=True), hdd("B"), nvme("N"))
    assert values("prefail_tripped", history) == {"A": True, "B": False, "N": None}


def test_bit_reads_the_nvme_critical_warning_bits():
    # 0b010100: bits 2 and 4 set (NVMe Base Spec 2.0, log 02h byte 0: reliability degraded,
    # volatile memory backup failed); expected values from Python's own integer bit operations.
    history = frame(nvme("N", nvme_critical_warning=0b010100))
    for k in range(6):
        assert values(f"bit(nvme_critical_warning, {k})", history) == {"N": bool((0b010100 >> k) & 1)}


def test_is_null_is_true_for_a_field_the_drive_does_not_report():
    history = frame(hdd("A"), nvme("N"))
    assert values("is_null(nvme_used_pct)", history) == {"A": True, "N": False}


# -- missing values: three-valued logic ---------------------------------------------------------

def test_comparison_with_a_missing_value_is_unknown():
    history = frame(nvme("N"))
    assert values("pending_sectors > 0", history) == {"N": None}


def test_not_of_unknown_stays_unknown_so_negated_rules_do_not_fire():
    history = frame(hdd("A"), nvme("N"))
    flags = evaluate([make_rule("not (nvme_used_pct >= 90)")], history)
    # N (3% used) fires; A's nvme_used_pct is null, so the condition is unknown and A does not
    assert list(flags["serial"]) == ["N"]


def test_false_and_unknown_is_false_true_or_unknown_is_true():
    # Kleene's strong three-valued logic, as in SQL
    history = frame(nvme("N"))
    assert values("pending_sectors > 0 and false", history) == {"N": False}
    assert values("pending_sectors > 0 or true", history) == {"N": True}
    assert values("pending_sectors > 0 and true", history) == {"N": None}
    assert values("pending_sectors > 0 or false", history) == {"N": None}


def test_a_rule_over_nvme_fields_never_fires_on_an_ata_drive():
    history = frame(hdd("A"), nvme("N", nvme_used_pct=95))
    flags = evaluate([make_rule("nvme_used_pct >= 90 or nvme_used_pct < 90")], history)
    assert list(flags["serial"]) == ["N"]


# -- delta, rate, before, span_days -------------------------------------------------------------

def test_delta_uses_the_latest_capture_at_or_before_the_window_start():
    # captures on days 0, 2, 5, 9, 10; now = day 10; now - 7 = day 3 -> baseline is day 2
    history = frame(hdd("A", days=[0, 2, 5, 9, 10], pending_sectors=[1, 2, 5, 9, 30]))
    assert values("before(pending_sectors, 7)", history) == {"A": 2.0}
    assert values("growth(pending_sectors, 7)", history) == {"A": 28.0}
    assert values("span_days(pending_sectors, 7)", history) == {"A": 8.0}


def test_a_capture_exactly_at_the_window_start_is_the_baseline():
    history = frame(hdd("A", days=[0, 3, 10], pending_sectors=[1, 4, 10]))
    assert values("before(pending_sectors, 7)", history) == {"A": 4.0}


def test_delta_falls_back_to_the_earliest_capture_of_a_young_history():
    history = frame(hdd("A", days=[5, 6, 7], pending_sectors=[3, 4, 11]))
    assert values("growth(pending_sectors, 7)", history) == {"A": 8.0}
    assert values("span_days(pending_sectors, 7)", history) == {"A": 2.0}


def test_delta_of_a_single_capture_is_zero():
    history = frame(hdd("A", pending_sectors=[12]))
    assert values("growth(pending_sectors, 7)", history) == {"A": 0.0}


def test_rate_is_delta_per_day_between_baseline_and_latest():
    history = frame(hdd("A", days=[0, 4], crc_errors=[0, 10]))
    assert values("growth_per_day(crc_errors, 7)", history) == {"A": 2.5}


def test_rate_of_a_single_capture_is_unknown():
    history = frame(hdd("A", crc_errors=[4]))
    assert values("growth_per_day(crc_errors, 7)", history) == {"A": None}


def test_windows_are_measured_from_now_and_later_captures_are_ignored():
    history = frame(hdd("A", days=[0, 1, 2, 3, 4], pending_sectors=[0, 0, 5, 9, 50]))
    # as of day 3, the day-4 capture does not exist yet
    assert values("pending_sectors", history, now=at(3)) == {"A": 9.0}
    assert values("growth(pending_sectors, 2)", history, now=at(3)) == {"A": 9.0}


def test_window_functions_skip_captures_missing_the_field():
    history = frame(hdd("A", days=[0, 1, 2, 3], pending_sectors=[2, None, None, 10]))
    assert values("growth(pending_sectors, 2)", history) == {"A": 8.0}
    assert values("before(pending_sectors, 2)", history) == {"A": 2.0}


def test_window_functions_are_unknown_when_the_latest_capture_lacks_the_field():
    history = frame(hdd("A", days=[0, 1, 2], pending_sectors=[2, 9, None]))
    assert values("growth(pending_sectors, 7)", history) == {"A": None}
    assert values("highest(pending_sectors, 7)", history) == {"A": None}
    assert values("consecutive_increases(pending_sectors, 1)", history) == {"A": None}


# -- max_over / min_over ------------------------------------------------------------------------

def test_max_and_min_over_use_captures_at_or_after_the_window_start():
    # now = day 10, window of 3 days: days 7..10; the spike on day 6 is outside, day 7 inside
    temps = [40, 41, 42, 43, 44, 45, 70, 65, 30, 50, 52]
    history = frame(hdd("A", temperature_c=temps))
    assert values("highest(temperature_c, 3)", history) == {"A": 65.0}
    assert values("lowest(temperature_c, 3)", history) == {"A": 30.0}
    assert values("highest(temperature_c, 4)", history) == {"A": 70.0}


def test_max_over_of_a_drive_with_no_capture_in_the_window_is_unknown():
    history = frame(hdd("A", days=[0], temperature_c=[50]), hdd("B", days=[10], temperature_c=[40]))
    assert values("highest(temperature_c, 3)", history) == {"A": None, "B": 40.0}


# -- consecutive_increases and previous ---------------------------------------------------------

def test_consecutive_increases_needs_exactly_n_rises_in_a_row():
    history = frame(
        hdd("RISES3", crc_errors=[5, 6, 7, 8]),
        hdd("RISES2", crc_errors=[5, 5, 7, 8]),
        hdd("FLAT_LAST", crc_errors=[5, 6, 7, 7]),
        hdd("LONG", crc_errors=[9, 1, 2, 3, 4]),
    )
    assert values("consecutive_increases(crc_errors, 3)", history) == {
        "RISES3": True, "RISES2": False, "FLAT_LAST": False, "LONG": True,
    }
    assert values("consecutive_increases(crc_errors, 2)", history)["RISES2"] is True


def test_consecutive_increases_is_unknown_with_too_few_captures():
    history = frame(hdd("A", crc_errors=[1, 2, 3]))
    assert values("consecutive_increases(crc_errors, 3)", history) == {"A": None}
    assert values("consecutive_increases(crc_errors, 2)", history) == {"A": True}


def test_a_single_capture_drive_beside_others_is_unknown_not_an_error():
    history = frame(hdd("ONE", crc_errors=[7]), hdd("FOUR", crc_errors=[1, 2, 3, 4]))
    assert values("consecutive_increases(crc_errors, 3)", history) == {"ONE": None, "FOUR": True}
    assert values("captures_ago(crc_errors, 1)", history) == {"ONE": None, "FOUR": 3.0}


def test_previous_counts_captures_back_from_the_latest():
    history = frame(hdd("A", crc_errors=[112, 120, 131, 140]))
    assert values("captures_ago(crc_errors, 1)", history) == {"A": 131.0}
    assert values("captures_ago(crc_errors, 3)", history) == {"A": 112.0}
    assert values("captures_ago(crc_errors, 4)", history) == {"A": None}


# -- cross-checks against independent computations ----------------------------------------------

def _random_history(seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    drives = []
    for d in range(40):
        n = int(rng.integers(1, 12))
        days = np.sort(rng.choice(np.arange(0, 20, 0.5), size=n, replace=False)).tolist()
        counts = np.cumsum(rng.integers(0, 4, size=n)).astype(float).tolist()
        counts = [None if (rng.random() < 0.1 and i < n - 1) else c for i, c in enumerate(counts)]
        drives.append(hdd(f"QHR{d:03d}", days=days, crc_errors=counts))
    return frame(*drives)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_delta_matches_pandas_merge_asof(seed):
    history = _random_history(seed)
    now, days = at(19.5), 7
    got = values(f"growth(crc_errors, {days})", history, now=now)
    valued = history.dropna(subset=["crc_errors"]).sort_values("taken_at")
    latest_rows = history.sort_values("taken_at").groupby("serial").tail(1).set_index("serial")
    probe = pd.DataFrame({"serial": latest_rows.index, "t": now - pd.Timedelta(days=days)})
    probe["t"] = probe["t"].astype(history["taken_at"].dtype)
    base = pd.merge_asof(probe, valued.rename(columns={"taken_at": "t"})[["serial", "t", "crc_errors"]],
                         on="t", by="serial", direction="backward").set_index("serial")["crc_errors"]
    earliest = valued.groupby("serial")["crc_errors"].first()
    for serial in latest_rows.index:
        current = latest_rows.loc[serial, "crc_errors"]
        if pd.isna(current):
            assert got[serial] is None
            continue
        baseline = base.get(serial)
        if pd.isna(baseline):
            baseline = earliest[serial]
        assert got[serial] == pytest.approx(current - baseline)


@pytest.mark.parametrize("seed", [4, 5])
def test_max_over_matches_pandas_groupby(seed):
    history = _random_history(seed)
    now = at(19.5)
    got = values("highest(crc_errors, 5)", history, now=now)
    inside = history[history["taken_at"] >= now - pd.Timedelta(days=5)].dropna(subset=["crc_errors"])
    expected = inside.groupby("serial")["crc_errors"].max()
    last_known = history.sort_values("taken_at").groupby("serial").tail(1).set_index("serial")["crc_errors"].notna()
    for serial, value in got.items():
        if serial in expected.index and last_known[serial]:
            assert value == expected[serial]
        else:
            assert value is None


@pytest.mark.parametrize("seed", [6, 7])
def test_consecutive_increases_matches_a_plain_loop(seed):
    history = _random_history(seed)
    got = values("consecutive_increases(crc_errors, 3)", history)
    for serial, rows in history.sort_values("taken_at").groupby("serial"):
        seq = rows["crc_errors"].tolist()
        if pd.isna(seq[-1]):
            assert got[serial] is None
            continue
        seq = [v for v in seq if not pd.isna(v)]
        if len(seq) < 4:
            assert got[serial] is None
            continue
        tail = seq[-4:]
        assert got[serial] == all(tail[i] < tail[i + 1] for i in range(3))


# -- evaluate(): output frame -------------------------------------------------------------------

def test_evaluate_returns_one_row_per_drive_and_firing_rule_with_evidence():
    history = frame(hdd("QHA002", pending_sectors=[0, 0, 0, 24]), hdd("QHA001", pending_sectors=[0, 0, 0, 0]))
    rule = make_rule("growth(pending_sectors, 7) >= 8", severity="replace-soon",
                     explain="pending sectors {before(pending_sectors, 7)} -> {pending_sectors} in {span_days(pending_sectors, 7)} days",
                     rule_id="media.pending-growth")
    flags = evaluate([rule], history)
    assert list(flags.columns) == FLAG_COLUMNS
    assert flags.to_dict("records")[0] | {"taken_at": None} == {
        "serial": "QHA002", "rule_id": "media.pending-growth", "severity": "replace-soon", "category": "media",
        "title": "test media.pending-growth", "evidence": "pending sectors 0 -> 24 in 3 days", "taken_at": None,
    }
    assert flags.loc[0, "taken_at"] == at(3)
    assert len(flags) == 1


def test_evaluate_orders_by_severity_then_serial():
    history = frame(hdd("B", pending_sectors=1, prefail_tripped=True), hdd("A", pending_sectors=1))
    rules = [make_rule("pending_sectors > 0", rule_id="w"),
             make_rule("prefail_tripped", severity="replace-now", rule_id="n")]
    flags = evaluate(rules, history)
    assert list(zip(flags["serial"], flags["rule_id"])) == [("B", "n"), ("A", "w"), ("B", "w")]


def test_evaluate_of_an_empty_history_is_an_empty_frame_with_the_columns():
    flags = evaluate([make_rule("pending_sectors > 0")], frame())
    assert flags.empty and list(flags.columns) == FLAG_COLUMNS


def test_evaluate_names_a_column_the_rules_need_but_the_history_lacks():
    history = frame(hdd("A")).drop(columns=["pending_sectors"])
    with pytest.raises(ValueError, match="pending_sectors"):
        evaluate([make_rule("pending_sectors > 0")], history)


def test_per_drive_keeps_the_worst_severity_and_all_evidence():
    history = frame(hdd("A", pending_sectors=3, crc_errors=[1, 2, 3, 4]))
    rules = [make_rule("consecutive_increases(crc_errors, 3)", severity="check-path", category="path",
                       explain="crc", rule_id="p"),
             make_rule("pending_sectors > 0", severity="replace-soon", explain="pending {pending_sectors}", rule_id="m")]
    drives = per_drive(evaluate(rules, history))
    assert list(drives.columns) == DRIVE_COLUMNS
    row = drives.iloc[0]
    assert (row.severity, row.category, row.replace_drive, row.rule_ids, row.evidence) == (
        "replace-soon", "media", True, "m, p", "pending 3; crc")


def test_per_drive_marks_a_path_only_drive_as_not_for_replacement():
    history = frame(hdd("A", crc_errors=[1, 2, 3, 4]))
    rules = [make_rule("consecutive_increases(crc_errors, 3)", severity="check-path", category="path")]
    drives = per_drive(evaluate(rules, history))
    assert not drives.loc[0, "replace_drive"]
    assert "Do not pull the drive" in drives.loc[0, "action"]


# -- explanation templates ----------------------------------------------------------------------

def test_template_formats_numbers_flags_and_missing_values():
    history = frame(hdd("A", days=[0, 3], crc_errors=[0, 10], prefail_tripped=True))
    drives = DriveHistory(history)
    template = compile_template("{growth_per_day(crc_errors, 7):.2f}/day {growth_per_day(crc_errors, 7)} {prefail_tripped} "
                                "{nvme_used_pct} {crc_errors:d} {{literal}}")
    assert drives.render(template, np.array([0])) == ["3.33/day 3.33 yes unknown 10 {literal}"]


def test_template_placeholders_are_checked_like_conditions():
    with pytest.raises(ExprError) as caught:
        compile_template("pending {pending_sector}")
    assert "did you mean 'pending_sectors'" in caught.value.message
    assert caught.value.column == 10


@pytest.mark.parametrize("text, words", [("a {b", "not closed"), ("a } b", "without '{'"),
                                          ("{crc_errors:zz}", "bad number format")])
def test_template_brace_and_format_errors(text, words):
    with pytest.raises(ExprError, match=words):
        compile_template(text)


def test_whole_numbers_print_without_a_decimal_point():
    assert format_value(24.0, True) == "24"
    assert format_value(2.5, True) == "2.5"
    assert format_value(math.nan, False) == "unknown"
