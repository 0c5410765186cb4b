"""Render one drive's story (``triage.risk.drive.DriveStory``): terminal, JSON, history plot.

No computation here beyond scaling values into sparkline glyphs and axes.
"""

from __future__ import annotations

import json
import math
import sys
from datetime import datetime
from pathlib import Path
from typing import TextIO

import numpy as np
import pandas as pd
from rich.table import Table

from triage.report.console import stdout_console
from triage.report.safe import for_terminal as t
from triage.report.pictures import chart_text
from triage.risk.view import stale_warning

#: Eight heights, lowest first (Unicode "Block Elements" U+2581..U+2588).
SPARK_GLYPHS = "\u2581\u2582\u2583\u2584\u2585\u2586\u2587\u2588"
SPARK_WIDTH = 40

#: Series shown as sparklines and plotted, with their unit; others stay in JSON only.
HISTORY_SHOWN = (
    ("temperature_c", "temperature", "degC"),
    ("reallocated_sectors", "reallocated sectors", "sectors"),
    ("pending_sectors", "pending sectors", "sectors"),
    ("offline_uncorrectable", "offline uncorrectable", "sectors"),
    ("reported_uncorrectable", "reported uncorrectable", "errors"),
    ("command_timeouts", "command timeouts", "count"),
    ("crc_errors", "interface CRC errors", "count"),
    ("nvme_media_errors", "NVMe media errors", "count"),
    ("nvme_spare_pct", "NVMe available spare", "%"),
    ("nvme_used_pct", "NVMe endurance used", "%"),
    ("nvme_error_log_entries", "NVMe error log entries", "count"),
)


def _plain(value):
    if value is None:
        return None
    if isinstance(value, (list, tuple, set, frozenset, np.ndarray, pd.Series)):
        return [_plain(v) for v in list(value)]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (pd.Timestamp, datetime)):
        return value.isoformat().replace("+00:00", "Z")
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, float) and value.is_integer() and abs(value) < 2 ** 53:
        return int(value)  # counters read back as float when a night had no value
    return value


#: Series drawn even when they never leave zero (the others are listed as "stayed at 0").
ALWAYS_DRAWN = ("temperature_c", "nvme_spare_pct", "nvme_used_pct")


def shown_series(history: pd.DataFrame) -> list[tuple[str, str, str]]:
    """The HISTORY_SHOWN series this drive reported at least once."""
    return [(c, label, unit) for c, label, unit in HISTORY_SHOWN
            if c in history.columns and history[c].notna().any()]


def split_series(history: pd.DataFrame) -> tuple[list[tuple[str, str, str]], list[str]]:
    """(series worth drawing, labels of counters that stayed at zero all along)."""
    drawn, flat = [], []
    for column, label, unit in shown_series(history):
        if column in ALWAYS_DRAWN or (history[column].fillna(0) != 0).any():
            drawn.append((column, label, unit))
        else:
            flat.append(label)
    return drawn, flat


def sparkline(values, width: int = SPARK_WIDTH) -> str:
    """Newest ``width`` values as block glyphs, scaled from their min to max; a gap is a space."""
    values = [None if v is None or pd.isna(v) else float(v) for v in list(values)[-width:]]
    known = [v for v in values if v is not None]
    if not known:
        return ""
    low, high = min(known), max(known)
    top = len(SPARK_GLYPHS) - 1
    if high == low:
        return "".join(" " if v is None else SPARK_GLYPHS[0] for v in values)
    return "".join(" " if v is None else SPARK_GLYPHS[round((v - low) / (high - low) * top)] for v in values)


# -- JSON ---------------------------------------------------------------------------------------

def drive_record(story) -> dict:
    """The ``--format json`` object: the contract keys first, then the rest of the story."""
    ident = story.identity
    ranked = story.ranked or {}
    record = {
        "serial": story.serial,
        "model": _plain(ident.get("model")),
        "firmware": _plain(ident.get("firmware")),
        "host": _plain(ident.get("host")),
        "slot": _plain(ident.get("slot")),
        "group": _plain(ident.get("group")),
        "p_fail": _plain(story.p_fail),
        "flags": [{k: _plain(v) for k, v in row.items()} for row in story.flags.to_dict("records")],
        "history": [{k: _plain(v) for k, v in row.items()} for row in story.history.to_dict("records")],
        "horizon_days": _plain(story.horizon_days),
        "as_of": _plain(story.as_of),
        "last_seen": _plain(story.last_seen),
        "identity": {k: _plain(v) for k, v in ident.items()},
        "rank": _plain(ranked.get("rank")),
        "of": story.fleet_drives,
        "score": _plain(ranked.get("score")),
        "severity": _plain(ranked.get("severity")),
        "action": _plain(ranked.get("action")),
        "rate_ratio": _plain(story.rate_ratio),
        "contributions": [{k: _plain(v) for k, v in row.items()} for row in story.contributions.to_dict("records")],
        "group_state": None if story.group is None else {k: _plain(v) for k, v in story.group.items()},
        "group_members": [{k: _plain(v) for k, v in r.items()} for r in story.group_members.to_dict("records")],
        "group_lost": [{k: _plain(v) for k, v in r.items()} for r in story.group_lost.to_dict("records")],
        "removal": None if story.removal is None else {k: _plain(v) for k, v in story.removal.items()},
    }
    return record


def render_drive_json(story, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    json.dump(drive_record(story), out, indent=2, allow_nan=False)
    out.write("\n")


def render_drive_csv(story, out: TextIO | None = None) -> None:
    """The history, one RFC 4180 row per capture (CRLF line ends), serial first."""
    import csv

    out = out or sys.stdout
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(["serial", *story.history.columns])
    for row in story.history.to_dict("records"):
        writer.writerow([story.serial, *("" if _plain(v) is None else _plain(v) for v in row.values())])


# -- terminal -----------------------------------------------------------------------------------

def _when(moment) -> str:
    return "?" if moment is None or pd.isna(moment) else pd.Timestamp(moment).strftime("%Y-%m-%d %H:%M UTC")


def _capacity(value) -> str:
    return "?" if value is None or pd.isna(value) else f"{float(value) / 1e12:,.2f} TB"


def render_drive_table(story) -> None:
    console = stdout_console()
    ident = story.identity
    say = console.print
    say(f"[bold]{t(story.serial)}[/bold]  {t(ident.get('model') or '?')}  firmware {t(ident.get('firmware') or '?')}"
        f"  {_capacity(ident.get('user_capacity_bytes'))}  {t(ident.get('bus') or '')}")
    say(f"WWN {t(ident.get('wwn') or '-')}  device {t(ident.get('device') or '?')}"
        f"  at {t(ident.get('host') or '?')} slot {t(ident.get('slot') or '?')}")
    say(f"last seen {_when(story.last_seen)}; newest capture in the store {_when(story.as_of)}")
    warning = stale_warning(story.as_of)
    if warning:
        say(f"[bold yellow]warning:[/] {t(warning)}")
    if story.removal is not None:
        say(f"[bold]removed[/bold] {_when(story.removal.get('removed_at'))} "
            f"({t(story.removal.get('reason'))}{': ' + t(story.removal.get('note')) if story.removal.get('note') else ''})")

    _group_lines(story, say)
    _risk_lines(story, say)

    if len(story.flags):
        flags = Table(title="Rules that fired", title_justify="left")
        for head in ("severity", "category", "rule", "evidence"):
            flags.add_column(head, overflow="fold")
        for row in story.flags.itertuples(index=False):
            flags.add_row(t(row.severity), t(row.category), t(row.rule_id), t(row.evidence or row.title))
        say(flags)
    else:
        say("no rule fired on this drive")

    series, flat = split_series(story.history)
    if series:
        first, last = story.history["taken_at"].iloc[0], story.history["taken_at"].iloc[-1]
        width = max(10, min(SPARK_WIDTH, console.width - 64))  # the trend gives way on narrow terminals
        shown = min(len(story.history), width)
        grid = Table(title=f"History: {len(story.history)} captures {_when(first)[:10]} to {_when(last)[:10]}"
                           f" (last {shown} drawn)", title_justify="left")
        grid.add_column("counter", min_width=20, overflow="fold")
        grid.add_column("first -> last", justify="right", no_wrap=True)
        grid.add_column("range", justify="right", no_wrap=True)
        grid.add_column("trend", no_wrap=True)
        for column, label, unit in series:
            values = story.history[column]
            known = values.dropna()
            grid.add_row(f"{label} ({unit})", f"{_n(known.iloc[0])} -> {_n(known.iloc[-1])}",
                         f"{_n(known.min())}-{_n(known.max())}", sparkline(values, width))
        say(grid)
    if flat:
        say(f"stayed at 0 in every capture: {', '.join(flat)}")
    for note in story.notes:
        console.print(f"note: {t(note)}", style="dim")


def _n(value) -> str:
    value = float(value)
    return f"{value:,.0f}" if value.is_integer() else f"{value:,.1f}"


def _group_lines(story, say) -> None:
    group_name = story.identity.get("group")
    if not isinstance(group_name, str):
        say("not in a redundancy group")
        return
    g = story.group
    if g is None:
        say(f"group {t(group_name)}: not in tonight's group table")
        return
    state = "[bold red]DEGRADED[/bold red]" if g["degraded"] else "healthy"
    say(f"group {t(group_name)}: {state}, {g['members']} member(s) reporting, {g['lost']} lost, "
        f"can lose {g['tolerance']} (left {g['tolerance_left']}); P(group loses data during a "
        f"{g['rebuild_hours']:g} h rebuild window) {g['p_group_loss']:.2%}")
    for row in story.group_lost.itertuples(index=False):
        say(f"  lost member {t(row.serial)} at {t(row.host)} slot {t(row.slot)}, last seen {_when(row.last_seen)}")
    others = story.group_members[story.group_members["serial"] != story.serial]
    flagged = others[others["severity"].notna()]
    for row in flagged.itertuples(index=False):
        p = "n/a" if pd.isna(row.p_fail) else f"{row.p_fail:.1%}"
        say(f"  also flagged in this group: {t(row.serial)} at {t(row.host)} slot {t(row.slot)}: "
            f"{t(row.severity)}, P(fail) {p}, rank {row.rank}")


def _risk_lines(story, say) -> None:
    ranked = story.ranked
    if ranked is not None:
        say(f"rank {ranked['rank']} of {story.fleet_drives} (score {ranked['score']:.3f}); "
            f"worst severity {t(ranked['severity'] or 'none')}")
        say(f"what to do: [bold]{t(ranked['action'])}[/bold]")
    horizon = f"{story.horizon_days:g} d" if story.horizon_days else ""
    if story.p_fail is None:
        say(f"P(fail {horizon}): n/a" + (" (no saved model)" if story.horizon_days is None else ""))
        return
    say(f"P(fail within {horizon}): [bold]{story.p_fail:.2%}[/bold]"
        + (f"; failure rate {story.rate_ratio:.2f} x that of a drive of its cohort and age "
           "with no warning and no growth" if story.rate_ratio is not None else ""))
    moving = story.contributions[story.contributions["term"].abs() > 0.01] if len(story.contributions) else []
    for row in (moving.head(5).itertuples(index=False) if len(moving) else []):
        say(f"  {t(row.covariate)} = {row.value:g}: x {row.factor:.2f}")


# -- plot ---------------------------------------------------------------------------------------

def history_figure(serial: str, model, history: pd.DataFrame):
    """One panel per counter that moved (and temperature) against capture time; a Figure."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import MaxNLocator

    series, flat = split_series(history)
    series = series or [("power_on_hours", "power-on hours", "hours")]
    rows = len(series)
    fig, axes = plt.subplots(rows, 1, figsize=(8, 1.6 + 1.5 * rows), sharex=True, squeeze=False)
    when = pd.to_datetime(history["taken_at"], utc=True).dt.tz_convert(None)
    for ax, (column, label, unit) in zip(axes[:, 0], series):
        ax.plot(when, history[column].astype(float), marker=".", markersize=3, linewidth=1.2,
                color="tab:red" if column != "temperature_c" else "tab:blue")
        ax.set_ylabel(unit)
        if column != "temperature_c":
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_title(label, fontsize=10, loc="left")
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("capture time (UTC)" + (f"; stayed at 0: {', '.join(flat)}" if flat else ""))
    fig.autofmt_xdate()
    fig.suptitle(f"{chart_text(serial)} ({chart_text(model) or '?'}): counter history")
    fig.tight_layout()
    return fig


def plot_drive_history(story, path: Path) -> Path:
    """``history_figure`` of the story's drive, to .png or .svg."""
    from triage.report.pictures import save_figure

    return save_figure(history_figure(story.serial, story.identity.get("model"), story.history), path)
