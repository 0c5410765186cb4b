"""The fleet tonight as an OpenMetrics text exposition (OpenMetrics 1.0, the text format).

For a dashboard and alerting stack to scrape from a file. Every number comes from
``triage.risk.fleet.FleetState``; this module only writes them out:

* one metric family per number: ``# HELP``, ``# TYPE`` then its samples, families never
  interleaved; the exposition ends with ``# EOF`` (spec: "Overall Structure");
* label values are UTF-8 with backslash, double quote and line feed escaped as ``\\\\``,
  ``\\"`` and ``\\n`` (spec: "Escaping"), so a hostile firmware string cannot end a label
  early or start a new sample; other control characters are shown as ``\\xNN`` text;
* only finite values are written: a drive without a model probability has no sample (the
  ``triage_model_available`` gauge says why), never a made-up zero.
"""

from __future__ import annotations

import math
from typing import Iterable

import pandas as pd

from triage.report.safe import printable
from triage.risk.score import SEVERITIES


def escape_label_value(value) -> str:
    """OpenMetrics label-value escaping: ``\\`` -> ``\\\\``, ``"`` -> ``\\"``, line feed -> ``\\n``.

    Other control and format characters (ESC, bidi overrides) are legal in a label value but
    would act on the terminal of whoever reads the file: ``safe.printable`` shows them as ``\\xNN``
    first, keeping the line feed for the spec's own escape.
    """
    text = printable(value, keep="\n")
    return text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _number(value: float) -> str:
    return repr(float(value))


def _labels(pairs: Iterable[tuple[str, object]]) -> str:
    inner = ",".join(f'{name}="{escape_label_value(value)}"' for name, value in pairs)
    return "{" + inner + "}" if inner else ""


class _Exposition:
    def __init__(self) -> None:
        self.lines: list[str] = []

    def family(self, name: str, help_text: str, samples: Iterable[tuple[list, float]], unit: str | None = None) -> None:
        self.lines.append(f"# TYPE {name} gauge")
        if unit:
            self.lines.append(f"# UNIT {name} {unit}")
        self.lines.append(f"# HELP {name} {escape_label_value(help_text)}")
        seen = set()
        for labels, value in samples:
            if value is None or not math.isfinite(float(value)):
                continue
            text = _labels(labels)
            if text in seen:  # the spec forbids two samples with one label set
                continue
            seen.add(text)
            self.lines.append(f"{name}{text} {_number(value)}")

    def text(self) -> str:
        return "\n".join(self.lines + ["# EOF"]) + "\n"


def openmetrics_text(state) -> str:
    """The exposition of ``state`` (a ``FleetState``)."""
    ranking = state.ranking
    drives = ranking.drives
    out = _Exposition()

    horizon = f"{ranking.horizon_days:g} days" if ranking.horizon_days else "the model horizon"
    out.family("triage_drive_failure_probability",
               f"P(the drive fails within {horizon}) from the saved fleet risk model.",
               (([("serial", d.serial), ("model", d.model), ("host", d.host), ("slot", d.slot),
                  ("group", d.group)], d.p_fail) for d in drives.itertuples(index=False)
                if not pd.isna(d.p_fail)))

    flags = ranking.flags if ranking.flags is not None else pd.DataFrame()
    flagged = []
    if len(flags):
        order = {name: i for i, name in enumerate(SEVERITIES)}
        ordered = flags.assign(_o=flags["severity"].map(lambda s: order.get(s, len(order))))
        current = set(drives["serial"])
        for f in ordered.sort_values(["serial", "_o", "category"], kind="stable").itertuples(index=False):
            if f.serial in current:
                flagged.append(([("serial", f.serial), ("severity", f.severity), ("category", f.category)], 1.0))
    out.family("triage_drive_flagged", "1 for each (drive, severity, category) a rule raised tonight.", flagged)

    cohorts = state.cohorts
    rows = list(cohorts.itertuples(index=False)) if len(cohorts) else []
    # cohort_table's afr / arr are in percent per year; per drive-year is that / 100
    for rate, words in (("afr", "Failures per drive-year in the cohort (annualized failure rate)"),
                        ("arr", "Replacements (failures and proactive pulls) per drive-year in the cohort")):
        if rows and not hasattr(rows[0], rate):
            continue
        for suffix, column, what in (("", rate, f"{words}."),
                                     ("_low", f"{rate}_low", f"Lower 95 % limit of triage_cohort_{rate}_ratio (exact Poisson)."),
                                     ("_high", f"{rate}_high", f"Upper 95 % limit of triage_cohort_{rate}_ratio (exact Poisson).")):
            out.family(f"triage_cohort_{rate}_ratio{suffix}", what,
                       (([("cohort", r.cohort)], getattr(r, column) / 100.0) for r in rows))

    groups = ranking.groups
    group_rows = list(groups.itertuples(index=False)) if len(groups) else []
    out.family("triage_group_loss_probability",
               "P(the redundancy group loses more members than it tolerates during one rebuild window).",
               (([("group", g.group)], g.p_group_loss) for g in group_rows))
    out.family("triage_group_degraded", "1 when the group has lost a member and not replaced it, else 0.",
               (([("group", g.group)], 1.0 if g.degraded else 0.0) for g in group_rows))

    quiet = state.not_reporting
    as_of = None if state.as_of is None else pd.Timestamp(state.as_of)
    out.family("triage_not_reporting_seconds",
               "Seconds between the newest capture and the last one of a site, host or drive that stopped "
               "reporting (only those).",
               (([("scope", q.scope), ("name", q.name)], (as_of - pd.Timestamp(q.last_seen)).total_seconds())
                for q in (quiet.itertuples(index=False) if quiet is not None and len(quiet) and as_of is not None
                          else [])), unit="seconds")
    out.family("triage_model_available", "1 when a saved fleet risk model gave the probabilities, else 0.",
               [([], 1.0 if ranking.model_used else 0.0)])
    newest = [] if state.as_of is None else [([], pd.Timestamp(state.as_of).timestamp())]
    out.family("triage_newest_capture_timestamp_seconds",
               "Unix time of the newest capture the numbers were computed from.", newest, unit="seconds")
    return out.text()
