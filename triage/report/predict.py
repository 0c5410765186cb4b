"""Render the backtest and the forecast: table, csv, json, and the recall / false-alarm plot.

No computation here: every number comes from ``triage.risk.backtest`` and ``triage.risk.forecast``.
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path
from typing import TextIO

from rich.table import Table

from triage.report.console import markup_name, markup_text
from triage.report.survival import _console, _num, _plain, _records, _write_csv, _write_json
from triage.safety import cell

BASELINE = "drive-self-assessment"
COMBINED = "combined"
METHOD_KEYS = ("method", "failures", "caught", "recall", "false_alarm_drives", "scored_drives",
               "false_alarm_rate", "lead_days_median")


# -- backtest ---------------------------------------------------------------------------------

def backtest_record(result) -> dict:
    """The JSON contract of ``triage backtest`` (keys fixed by the issue; more are welcome)."""
    return {
        "horizon_days": result.horizon_days,
        "first_night": f"{result.first_night:%Y-%m-%d}",
        "last_night": f"{result.last_night:%Y-%m-%d}",
        "training_days": result.training_days,
        "refit_days": result.refit_days,
        "refits": list(result.refits),
        "methods": [{k: _plain(row[k]) for k in METHOD_KEYS} for row in result.methods.to_dict("records")],
        "operating_point": {k: _plain(v) for k, v in result.operating_point.items()},
        "curve": _records(result.curve),
        "forecast_coverage": _plain(result.forecast_coverage),
        "forecasts": _records(result.forecasts) if len(result.forecasts) else [],
        "notes": list(result.notes),
    }


def render_backtest(result, fmt: str, out: TextIO | None = None) -> None:
    """Table, JSON (everything) or CSV (one row per method)."""
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(backtest_record(result), out)
        return
    if fmt == "csv":
        _write_csv(result.methods, out)
        return
    console = _console()
    methods = result.methods.set_index("method")
    console.print(f"backtest of nights {result.first_night:%Y-%m-%d} to {result.last_night:%Y-%m-%d} "
                  f"(trained on the {result.training_days} days before the first; model refitted every "
                  f"{result.refit_days} days: {', '.join(result.refits) or 'never'}), "
                  f"horizon {result.horizon_days:g} days")
    combined, baseline = methods.loc[COMBINED], methods.loc[BASELINE]
    point = result.operating_point
    head = Table(title=f"Our flags against the drive's own verdict (false alarms held within "
                       f"{point['max_false_alarm']:.2%})", title_justify="left")
    for name in ("", "combined score", "drive's own verdict", "ratio"):
        head.add_column(name, justify="left" if not name else "right", overflow="fold")
    ratio = (combined["recall"] / baseline["recall"]) if baseline["recall"] else None
    head.add_row("failures caught", f"{int(combined['caught'])} of {int(combined['failures'])}",
                 f"{int(baseline['caught'])} of {int(baseline['failures'])}", "")
    head.add_row("recall", _num(combined["recall"], ".1%"), _num(baseline["recall"], ".1%"),
                 "-" if ratio is None else f"{ratio:.1f}x")
    head.add_row("false-alarm drives", f"{int(combined['false_alarm_drives'])} of {int(combined['scored_drives'])}",
                 f"{int(baseline['false_alarm_drives'])} of {int(baseline['scored_drives'])}", "")
    head.add_row("false-alarm rate", _num(combined["false_alarm_rate"], ".2%"),
                 _num(baseline["false_alarm_rate"], ".2%"), "")
    head.add_row("median lead (days)", _num(combined["lead_days_median"], ".1f"),
                 _num(baseline["lead_days_median"], ".1f"), "")
    console.print(head)
    console.print(f"operating point: score >= {point['score_threshold']:.3f}")
    grid = Table(title="Every method", title_justify="left")
    for name in ("method", "caught", "recall", "false alarms", "rate", "lead (d)"):
        grid.add_column(name, justify="left" if name == "method" else "right", overflow="fold")
    for row in _records(result.methods):
        grid.add_row(markup_name(row["method"]), f"{row['caught']}/{row['failures']}", _num(row["recall"], ".1%"),
                     f"{row['false_alarm_drives']}/{row['scored_drives']}", _num(row["false_alarm_rate"], ".2%"),
                     _num(row["lead_days_median"], ".1f"))
    console.print(grid)
    if result.forecast_coverage is not None:
        console.print(f"forecast check: the 90 % interval held the observed failures in "
                      f"{result.forecast_coverage:.0%} of {len(result.forecasts)} forecasts "
                      f"(fleet and cohorts, at each refit)")
    for note in result.notes:
        console.print(f"note: {markup_text(note)}")


def plot_backtest(result, path: Path) -> Path:
    """Recall against false-alarm rate of the combined score, the drive's own verdict marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    methods = result.methods.set_index("method")
    fig, ax = plt.subplots(figsize=(7, 5))
    curve = result.curve.sort_values(["false_alarm_rate", "recall"])
    ax.step(curve["false_alarm_rate"] * 100, curve["recall"] * 100, where="post", color="tab:blue",
            label="combined score (rules + P(fail))")
    base = methods.loc[BASELINE]
    ax.plot([base["false_alarm_rate"] * 100], [base["recall"] * 100], "s", color="tab:red", markersize=8,
            label="drive's own verdict")
    point = result.operating_point
    ax.plot([point["false_alarm_rate"] * 100], [point["recall"] * 100], "o", color="tab:blue", markersize=8,
            label=f"operating point (score >= {point['score_threshold']:.2f})")
    ax.axvline(point["max_false_alarm"] * 100, color="grey", linestyle=":", linewidth=1,
               label=f"false-alarm limit {point['max_false_alarm']:.1%}")
    ax.set_xscale("symlog", linthresh=0.1)
    ax.set_xlim(0, 100)
    ax.set_ylim(0, 100)
    ax.set_xlabel("false-alarm drives (% of drives scored)")
    ax.set_ylabel(f"failures flagged within {result.horizon_days:g} days before (%)")
    ax.set_title(f"Backtest {result.first_night:%Y-%m-%d} to {result.last_night:%Y-%m-%d}: "
                 f"{int(base['failures'])} failures")
    ax.grid(alpha=0.3)
    ax.legend(loc="lower right", fontsize="small")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


# -- forecast ---------------------------------------------------------------------------------

FORECAST_KEYS = ("scope", "name", "drives", "expected", "interval_low", "interval_high", "spares")


def render_forecast(forecast, fmt: str, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    rows = [{k: _plain(row[k]) for k in FORECAST_KEYS} for row in forecast.rows.to_dict("records")]
    if fmt == "json":
        _write_json(rows, out)
        return
    if fmt == "csv":
        writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 records end in CRLF
        writer.writerow(FORECAST_KEYS)
        for row in rows:
            writer.writerow([cell(row[k]) if isinstance(row[k], str) else row[k] for k in FORECAST_KEYS])
        return
    console = _console()
    console.print(f"failures expected in the {forecast.days:g} days after {forecast.as_of:%Y-%m-%d %H:%M} UTC "
                  f"(as of the newest capture used), spares for a {forecast.service_level:.0%} service level")
    grid = Table(title="Failure forecast", title_justify="left")
    for name in ("scope", "name", "drives", "expected", "90 % range", "spares"):
        grid.add_column(name, justify="left" if name in ("scope", "name") else "right", overflow="fold")
    for row in rows:
        grid.add_row(row["scope"], markup_name(row["name"]), f"{row['drives']:,}", f"{row['expected']:.1f}",
                     f"{row['interval_low']} - {row['interval_high']}", str(row["spares"]))
    console.print(grid)
    for note in forecast.notes:
        console.print(f"note: {markup_text(note)}")
