"""The nightly page: one self-contained HTML file for people who read the fleet in a browser or
a mail. Every number comes from ``triage.risk.fleet.FleetState``.

Self-contained: no script, no external style sheet, font or image; pictures are inline PNG
``data:`` URIs and a Content-Security-Policy forbids the page any network fetch. Every string
that came from a drive or a capture file goes through ``safe.for_html`` (control characters made
visible, then ``html.escape``), so a hostile model name is text, never markup.
"""

from __future__ import annotations

import base64
from datetime import datetime, timezone

import pandas as pd

from triage.report.drive import history_figure
from triage.report.pictures import figure_bytes, hazard_figure, survival_figure
from triage.report.safe import for_html as h
from triage.risk.view import stale_warning
from triage.risk.score import DEGRADED_CAUTION

#: Cohorts next to the whole fleet on the hazard-by-age chart.
HAZARD_COHORTS = 3

_STYLE = """
body{font:14px/1.4 system-ui,sans-serif;margin:1.5em;color:#111;max-width:80em}
h1{font-size:1.4em;margin:0 0 .2em}h2{font-size:1.15em;margin:1.6em 0 .4em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.4em 0}th,td{border:1px solid #ccc;padding:.25em .5em;vertical-align:top;text-align:left}
th{background:#f2f2f2}td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.caution{background:#fde8e8;border-left:4px solid #b00;padding:.4em .6em;margin:.3em 0}
.stale{background:#fff4d6;border-left:4px solid #b70;padding:.4em .6em}
.sev{white-space:nowrap}.sev-replace-now{color:#b00;font-weight:bold}.sev-replace-soon{color:#960}.sev-check-path{color:#707}
.muted{color:#666}img{max-width:100%;height:auto;display:block;margin:.5em 0}
ul.ev{margin:0;padding-left:1.1em}
"""


def _when(moment) -> str:
    return "unknown" if moment is None or pd.isna(moment) else pd.Timestamp(moment).strftime("%Y-%m-%d %H:%M UTC")


def _pct(value, spec: str = ".1%") -> str:
    return "n/a" if value is None or pd.isna(value) else format(float(value), spec)


def _num(value, spec: str) -> str:
    return "-" if value is None or pd.isna(value) else format(float(value), spec)


def _image(fig, alt: str) -> str:
    data = base64.b64encode(figure_bytes(fig)).decode("ascii")
    return f'<img alt="{h(alt)}" src="data:image/png;base64,{data}">'


def _table(heads: list[str], rows: list[list[str]], numeric: set[int] = frozenset()) -> str:
    """``rows`` hold cells already escaped."""
    head = "".join(f"<th>{h(x)}</th>" for x in heads)
    body = "".join("<tr>" + "".join(f'<td class="n">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                    for i, c in enumerate(row)) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _ranked(state, top: int) -> str:
    drives = state.ranking.drives
    flagged = drives[drives["rules"].map(len) > 0] if len(drives) else drives
    shown = flagged.head(top)
    if shown.empty:
        return "<p>No rule fired on any current drive.</p>"
    horizon = state.ranking.horizon_days
    p_head = f"P(fail {horizon:g} d)" if horizon else "P(fail)"
    rows = []
    for d in shown.itertuples(index=False):
        evidence = "".join(f"<li>{h(e)}</li>" for e in d.evidence)
        action = h(d.action)
        if d.degraded:
            action = f'<div class="caution">{action}</div>'
        rows.append([
            str(d.rank), f"{h(d.host)} / {h(d.slot)}<br><span class=muted>{h(d.group)}</span>",
            f"{h(d.model)}<br>{h(d.serial)}", _num(d.age_days / 365.25 if not pd.isna(d.age_days) else None, ".1f"),
            _pct(d.p_fail), f'<span class="sev sev-{h(d.severity)}">{h(d.severity)}</span>',
            f'<ul class="ev">{evidence}</ul>', action, _num(d.score, ".3f"),
        ])
    more = len(flagged) - len(shown)
    note = f"<p class=muted>{more} more flagged drive(s) not shown; <code>triage rank</code> lists all.</p>" if more > 0 else ""
    return _table(["#", "where / group", "model / serial", "age (years)", p_head, "severity", "evidence",
                   "what to do", "score"], rows, numeric={0, 3, 4, 8}) + note


def _degraded(state) -> str:
    groups = state.ranking.groups
    degraded = groups[groups["degraded"]] if len(groups) else groups
    if degraded.empty:
        return "<p>No redundancy group has lost a member.</p>"
    lost = state.ranking.lost
    parts = []
    for g in degraded.itertuples(index=False):
        caution = DEGRADED_CAUTION.format(group=g.group, lost=g.lost)
        members = lost[lost["group"] == g.group] if len(lost) else lost
        rows = [[h(m.serial), h(m.host), h(m.slot), h(_when(m.last_seen))] for m in members.itertuples(index=False)]
        parts.append(
            f"<h3>{h(g.group)}</h3><div class=caution>{h(caution)}</div>"
            f"<p>{g.members} member(s) reporting, can lose {g.tolerance}, {g.tolerance_left} left; "
            f"P(group loses data during a {g.rebuild_hours:g} h rebuild window): {_pct(g.p_group_loss, '.2%')}</p>"
            + (_table(["lost member", "host", "slot", "last seen"], rows) if rows else ""))
    return "".join(parts)


def _not_reporting(state) -> str:
    quiet = state.not_reporting
    if quiet is None or quiet.empty:
        return "<p>Every drive seen in the last nights reported in the newest one.</p>"
    rows = [[h(q.scope), h(q.name), "" if pd.isna(q.hosts) else str(q.hosts), str(q.drives), h(_when(q.last_seen))]
            for q in quiet.itertuples(index=False)]
    return _table(["scope", "name", "hosts", "drives", "last capture"], rows, numeric={2, 3})


def _cohorts(state) -> str:
    cohorts = state.cohorts
    if cohorts is None or cohorts.empty:
        return "<p>No cohort yet (nothing stored).</p>"
    rows = [[h(c.cohort), str(c.drives), _num(c.drive_days / 365.0, ",.1f"), str(c.failures),
             _num(c.afr, ".2f"), f"{_num(c.afr_low, '.2f')} - {_num(c.afr_high, '.2f')}",
             str(c.replacements), _num(c.arr, ".2f"), h(c.phase), "small sample" if c.small_sample else ""]
            for c in cohorts.itertuples(index=False)]
    return _table([f"cohort ({', '.join(state.cohort_by)})", "drives", "drive-years", "failures", "AFR %/yr",
                   "95 % range", "replacements", "ARR %/yr", "life phase (Weibull)", "note"], rows,
                  numeric={1, 2, 3, 4, 5, 6, 7})


def _pictures(state) -> str:
    parts = []
    if state.survival:
        parts.append(_image(survival_figure(state.survival), "survival by age of the largest cohorts"))
    if state.fleet_bands is not None and len(state.fleet_bands):
        bands = {"whole fleet": state.fleet_bands}
        for report in state.survival[:HAZARD_COHORTS]:
            bands[report.cohort] = report.bands
        parts.append(_image(hazard_figure(bands), "failure rate by age band"))
    drives = state.ranking.drives.set_index("serial") if len(state.ranking.drives) else None
    for serial, history in state.histories.items():
        model = drives.at[serial, "model"] if drives is not None and serial in drives.index else None
        parts.append(_image(history_figure(serial, model, history), f"counter history of {serial}"))
    return "".join(parts) or "<p>No pictures: nothing stored yet.</p>"


def html_page(state, top: int = 25, now: datetime | None = None) -> str:
    """The whole page as a string (UTF-8)."""
    now = now or datetime.now(timezone.utc)
    stale = ""
    if state.as_of is None:
        stale = '<p class="stale">The store holds no captures: nothing below is news.</p>'
    else:
        warning = stale_warning(state.as_of, now=now)
        if warning:
            stale = f'<p class="stale">Warning: {h(warning)}; this page is not tonight\'s fleet.</p>'
    notes = "".join(f"<li>{h(n)}</li>" for n in state.notes)
    sections = [
        ("Drives to look at, most urgent first", _ranked(state, top)),
        ("Degraded redundancy groups", _degraded(state)),
        ("Not reporting", _not_reporting(state)),
        ("Failure rate by cohort", _cohorts(state)),
        ("Pictures", _pictures(state)),
    ]
    body = "".join(f"<h2>{h(title)}</h2>{content}" for title, content in sections)
    return (
        "<!DOCTYPE html>\n<html lang=en><head><meta charset=utf-8>"
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
        "style-src 'unsafe-inline'\">"
        "<meta name=viewport content=\"width=device-width,initial-scale=1\">"
        f"<title>triage: fleet as of {h(_when(state.as_of))}</title><style>{_STYLE}</style></head><body>"
        f"<h1>Fleet drive health</h1><p>As of the newest capture: <b>{h(_when(state.as_of))}</b>; "
        f"page written {h(_when(now))}.</p>{stale}"
        + (f"<ul class=muted>{notes}</ul>" if notes else "")
        + body + "</body></html>\n"
    )
