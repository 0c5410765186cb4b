"""Render a ranked drive list as a table (rich), CSV (RFC 4180) or JSON. No computation here."""

from __future__ import annotations

import csv
import json
import math
import sys
from typing import TextIO

import pandas as pd
from rich.markup import escape
from rich.table import Table

from triage.report.console import stdout_console

JSON_FIELDS = ["rank", "serial", "model", "host", "slot", "group", "score", "p_fail", "severity",
               "category", "action", "rules", "evidence", "power_on_hours", "p_group_loss", "degraded"]
_STYLE = {"replace-now": "bold red", "replace-soon": "yellow", "watch": "cyan", "check-path": "magenta"}


def _plain(value):
    if isinstance(value, float) and math.isnan(value):
        return None
    if hasattr(value, "item"):
        return value.item()
    return value


def records(drives: pd.DataFrame) -> list[dict]:
    return [{f: _plain(row[f]) for f in JSON_FIELDS} for row in drives.to_dict("records")]


def render_json(drives: pd.DataFrame, out: TextIO | None = None) -> None:
    out = out or sys.stdout  # looked up per call: tests and callers swap sys.stdout
    json.dump(records(drives), out, indent=2)
    out.write("\n")


def render_csv(drives: pd.DataFrame, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    from triage.risk.tickets import neutralise  # same formula-injection guard as the ticket file

    writer = csv.writer(out, quoting=csv.QUOTE_MINIMAL, lineterminator="\r\n")
    writer.writerow(JSON_FIELDS)
    for rec in records(drives):
        cells = [" ".join(v) if f == "rules" else "; ".join(v) if f == "evidence" else v
                 for f, v in rec.items()]
        writer.writerow([neutralise("" if c is None else c) for c in cells])


#: Below this many terminal columns the table folds into four columns (80-column terminals, mail).
WIDE_COLUMNS = 140


def _cells(d) -> dict[str, str]:
    """The text of one drive's cells (rich markup, firmware-derived strings escaped)."""
    sev = d.severity or "-"
    where = f"{escape(str(d.host or '?'))}/{escape(str(d.slot or '?'))}"
    return {
        "rank": str(d.rank),
        "where": where,
        "group": f"[dim]{escape(d.group)}[/dim]" if isinstance(d.group, str) else "",
        "drive": f"{escape(str(d.model or '?'))}\n{escape(str(d.serial))}",
        "age": "" if pd.isna(d.age_days) else f"{d.age_days / 365.25:.1f} y",
        "p": "n/a" if pd.isna(d.p_fail) else f"{d.p_fail:.1%}",
        "severity": f"[{_STYLE[sev]}]{sev}[/]" if sev in _STYLE else sev,
        "evidence": "\n".join(escape(e) for e in d.evidence) or "-",
        "action": f"[bold red]{escape(d.action)}[/]" if d.degraded else escape(d.action),
    }


def render_table(drives: pd.DataFrame, horizon_days: float | None) -> None:
    p_head = f"P(fail {horizon_days:g} d)" if horizon_days else "P(fail)"
    console = stdout_console()
    table = Table(title="Drives to look at, most urgent first", title_justify="left", expand=False)
    if console.width >= WIDE_COLUMNS:
        for head in ("#", "where", "drive", "age", p_head, "severity"):
            table.add_column(head, no_wrap=True)
        table.add_column("evidence", ratio=3)
        table.add_column("what to do", ratio=2)
        for d in drives.itertuples(index=False):
            c = _cells(d)
            where = c["where"] + (f"\n{c['group']}" if c["group"] else "")
            table.add_row(c["rank"], where, c["drive"], c["age"], c["p"], c["severity"], c["evidence"], c["action"])
    else:
        table.add_column("#", no_wrap=True)
        table.add_column("where / drive", no_wrap=True, overflow="ellipsis", max_width=22)
        table.add_column("risk", no_wrap=True)
        table.add_column("evidence -> what to do", ratio=1)
        for d in drives.itertuples(index=False):
            c = _cells(d)
            where = "\n".join(x for x in (c["where"], c["group"], c["drive"]) if x)
            risk = f"{c['severity']}\n{p_head}: {c['p']}\nage {c['age'] or '?'}"
            table.add_row(c["rank"], where, risk, f"{c['evidence']}\n[bold]-> {c['action']}[/bold]")
    console.print(table)


def render_ranked(drives: pd.DataFrame, fmt: str, horizon_days: float | None = None) -> None:
    if fmt == "json":
        render_json(drives)
    elif fmt == "csv":
        render_csv(drives)
    else:
        render_table(drives, horizon_days)
