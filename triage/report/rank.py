"""Render a ranked drive list as a table (rich), CSV (RFC 4180) or JSON. No computation here.

Every form states the time of the newest capture used ("as of") and carries the drives that
stopped reporting, so silence never reads as an empty, healthy list.
"""

from __future__ import annotations

import csv
import json
import sys
from datetime import datetime
from typing import TextIO

from rich.table import Table

from triage.report.console import markup_name, markup_text, stdout_console
from triage.risk.score import missing, moment_text
from triage.safety import NAME_LIMIT, TEXT_LIMIT, cell

JSON_FIELDS = ["rank", "state", "first_raised", "severity", "score", "p_fail", "serial", "model", "host",
               "slot", "group", "category", "categories", "action", "actions", "rules", "evidence",
               "power_on_hours", "p_group_loss", "degraded", "group_first"]
#: CSV rows: ranked drives, then one row per drive that stopped reporting (state "not-reporting").
CSV_FIELDS = ["rank", "state", "first_raised", "severity", "score", "p_fail", "serial", "model", "host",
              "slot", "group", "category", "action", "rules", "evidence", "power_on_hours", "p_group_loss",
              "degraded", "last_seen", "as_of"]
SILENT_FIELDS = ["state", "severity", "first_raised", "serial", "model", "host", "slot", "group", "last_seen"]
GROUP_FIELDS = ["group", "members", "lost", "tolerance", "tolerance_left", "p_group_loss", "lost_serials",
                "lost_last_seen", "caution"]
_STYLE = {"replace-now": "bold red", "replace-soon": "yellow", "watch": "cyan", "check-path": "magenta"}


def _exported(value):
    """A view's value as JSON and CSV carry it: times in ISO 8601, lists item by item."""
    if isinstance(value, list):
        return [_exported(v) for v in value]
    if isinstance(value, datetime):
        return value.isoformat()
    return value


def records(rows: list[dict], fields: list[str]) -> list[dict]:
    """Each row's ``fields`` (those it has), exported (``_exported``)."""
    return [{f: _exported(row[f]) for f in fields if f in row} for row in rows]


def render_json(view, warnings: list[str], out: TextIO | None = None) -> None:
    out = out or sys.stdout  # looked up per call: tests and callers swap sys.stdout
    json.dump({
        "as_of": _exported(view.as_of),
        "horizon_days": view.horizon_days,
        "warnings": warnings,
        "drives": records(view.drives, JSON_FIELDS),
        "not_reporting": records(view.silent, SILENT_FIELDS),
        "degraded_groups": records(view.degraded, GROUP_FIELDS),
    }, out, indent=2)
    out.write("\n")


def render_csv(view, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    as_of = _exported(view.as_of) or ""
    writer = csv.writer(out, quoting=csv.QUOTE_MINIMAL, lineterminator="\r\n")
    writer.writerow(CSV_FIELDS)
    rows = [dict(rec, as_of=as_of) for rec in records(view.drives, JSON_FIELDS)]
    rows += [dict(rec, as_of=as_of) for rec in records(view.silent, SILENT_FIELDS)]
    limits = [NAME_LIMIT if f in _NAME_FIELDS else TEXT_LIMIT for f in CSV_FIELDS]
    for rec in rows:
        cells = [rec.get(f) for f in CSV_FIELDS]
        cells = [" ".join(v) if f == "rules" and v else "; ".join(v) if f == "evidence" and v else v
                 for f, v in zip(CSV_FIELDS, cells)]
        # the same sanitiser as the ticket file (triage.safety): escapes, cuts, formula guard
        writer.writerow([cell(c, limit) for c, limit in zip(cells, limits)])


#: Below this many terminal columns the table folds into four columns (80-column terminals, mail).
WIDE_COLUMNS = 140
#: Widest the where / drive columns of the wide table grow (a usual host/slot fits on one line).
WIDE_NAME_WIDTH = 36
#: Stored identifiers: cut shorter than free text in CSV (triage.safety).
_NAME_FIELDS = frozenset({"serial", "model", "host", "slot", "group"})


def _cells(d: dict) -> dict[str, str]:
    """The text of one drive's cells (rich markup; every stored string through triage.safety)."""
    sev = d["severity"] or "-"
    where = f"{markup_name(d['host'] or '?')}/{markup_name(d['slot'] or '?')}"
    state = d["state"]
    said = "" if not state else (state if state == "new" else f"{state} since {d['first_raised']}")
    return {
        "rank": str(d["rank"]),
        "where": where,
        "group": f"[dim]{markup_name(d['group'])}[/dim]" if isinstance(d["group"], str) else "",
        "drive": f"{markup_name(d['model'] or '?')}\n{markup_name(d['serial'])}",
        "age": "" if missing(d["age_days"]) else f"{d['age_days'] / 365.25:.1f} y",
        "p": "n/a" if missing(d["p_fail"]) else f"{d['p_fail']:.1%}",
        "severity": f"[{_STYLE[sev]}]{sev}[/]" if sev in _STYLE else markup_name(sev),
        "score": f"score {d['score']:.3f}",
        "state": f"[bold]{said}[/bold]" if state == "new" else said,
        "evidence": "\n".join(markup_text(e) for e in d["evidence"] or ()) or "-",
        "action": f"[bold red]{markup_text(d['action'])}[/]" if d["degraded"] else markup_text(d["action"]),
    }


def _title(view, warnings: list[str]) -> str:
    title = f"Drives to look at, by action tier then score; as of {moment_text(view.as_of)}"
    return title + (f" [bold red](see {len(warnings)} warning(s) below)[/]" if warnings else "")


def render_table(view, warnings: list[str]) -> None:
    horizon_days = view.horizon_days
    p_head = f"P(fail {horizon_days:g} d)" if horizon_days else "P(fail)"
    console = stdout_console()
    table = Table(title=_title(view, warnings), title_justify="left", expand=False)
    if console.width >= WIDE_COLUMNS:
        for head in ("#", "where", "drive", "age", p_head, "tier / score", "flag"):
            if head in ("where", "drive"):  # stored strings: folded, so one long slot cannot squeeze the rest
                table.add_column(head, overflow="fold", max_width=WIDE_NAME_WIDTH)
            else:
                table.add_column(head, no_wrap=True)
        table.add_column("evidence", ratio=3)
        table.add_column("what to do", ratio=2)
        for d in view.drives:
            c = _cells(d)
            where = c["where"] + (f"\n{c['group']}" if c["group"] else "")
            table.add_row(c["rank"], where, c["drive"], c["age"], c["p"], f"{c['severity']}\n{c['score']}",
                          c["state"], c["evidence"], c["action"])
    else:
        table.add_column("#", no_wrap=True)
        table.add_column("where / drive", no_wrap=True, overflow="ellipsis", max_width=22)
        table.add_column("risk", no_wrap=True)
        table.add_column("evidence -> what to do", ratio=1)
        for d in view.drives:
            c = _cells(d)
            where = "\n".join(x for x in (c["where"], c["group"], c["drive"]) if x)
            risk = "\n".join(x for x in (c["severity"], c["score"], f"{p_head}: {c['p']}",
                                         f"age {c['age'] or '?'}", c["state"]) if x)
            table.add_row(c["rank"], where, risk, f"{c['evidence']}\n[bold]-> {c['action']}[/bold]")
    console.print(table)
    if warnings:
        console.print("\n".join(f"[bold red]warning:[/] {markup_text(line)}" for line in warnings))
    for d in view.silent:
        if d.get("severity") is None:
            continue
        console.print(f"[bold red]not reporting, flagged before:[/] {markup_name(d['serial'])} at "
                      f"{markup_name(d['host'] or '?')}/{markup_name(d['slot'] or '?')}: {markup_name(d['severity'])} "
                      f"since {d['first_raised']}, last seen {moment_text(d['last_seen'])}")


def render_ranked(view, fmt: str, warnings: list[str] = ()) -> None:
    """``view``: a ``triage.risk.view.RankView`` (the rows to show); ``warnings``:
    ``view.silence_lines``. ``fmt``: table, csv or json."""
    fmt = getattr(fmt, "value", fmt)
    warnings = list(warnings)
    if fmt == "json":
        render_json(view, warnings)
    elif fmt == "csv":
        render_csv(view)
    else:
        render_table(view, warnings)
