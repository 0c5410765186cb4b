"""Render cohort tables, survival reports and fitted-model summaries; plot survival. No computation here."""

from __future__ import annotations

import csv
import json
import math
import sys
from pathlib import Path
from typing import TextIO

import pandas as pd
from rich.markup import escape
from rich.table import Table

from triage.report.console import stdout_console

HOURS_PER_YEAR = 8766.0  # for showing ages in years only
TABLE_CURVE_ROWS = 25


def _plain(value):
    if value is None:
        return None
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _records(frame: pd.DataFrame) -> list[dict]:
    return [{k: _plain(v) for k, v in row.items()} for row in frame.to_dict("records")]


def _num(value, spec: str) -> str:
    value = _plain(value)
    return "-" if value is None else format(value, spec)


def _years(hours) -> str:
    hours = _plain(hours)
    return "-" if hours is None else f"{hours / HOURS_PER_YEAR:.2f}"


def _console():
    """stdout console; piped output is not cut at 80 columns (a file should keep every digit)."""
    console = stdout_console()
    if not console.is_terminal:
        console.width = max(console.width, 160)
    return console


def _write_json(obj, out: TextIO) -> None:
    json.dump(obj, out, indent=2, allow_nan=False)
    out.write("\n")


# -- triage cohorts ---------------------------------------------------------------------------

def _write_csv(table: pd.DataFrame, out: TextIO) -> None:
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 records end in CRLF
    writer.writerow(table.columns)
    for row in _records(table):
        writer.writerow(["" if v is None else v for v in row.values()])


def render_cohorts(table: pd.DataFrame, fmt: str, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(_records(table), out)
    elif fmt == "csv":
        _write_csv(table, out)
    else:
        _cohort_table(table)


def _cohort_table(table: pd.DataFrame) -> None:
    datasheet = "datasheet_afr" in table.columns
    grid = Table(title="Failure rate and life phase by cohort", title_justify="left")
    heads = ["cohort", "AFR %/yr", "95 % range"]
    if datasheet:
        heads.append("datasheet AFR")
    heads += ["phase", "Weibull shape (95 %)", "scale (years)", "drives", "drive-years", "failures", "note"]
    for head in heads:
        grid.add_column(head, justify="left" if head in ("cohort", "phase", "note") else "right",
                        overflow="fold")
    for row in _records(table):
        cells = [
            escape(str(row["cohort"])),
            _num(row["afr"], ".2f"),
            f"{_num(row['afr_low'], '.2f')} - {_num(row['afr_high'], '.2f')}",
        ]
        if datasheet:
            cells.append(_num(row["datasheet_afr"], ".2f"))
        cells += [
            row["phase"],
            f"{_num(row['shape'], '.2f')} ({_num(row['shape_low'], '.2f')}-{_num(row['shape_high'], '.2f')})",
            _years(row["scale"]),
            str(row["drives"]),
            _num(row["drive_days"] / 365.0, ",.1f"),
            str(row["failures"]),
            "small sample" if row["small_sample"] else "",
        ]
        grid.add_row(*cells)
    _console().print(grid)


# -- triage survival --------------------------------------------------------------------------

def survival_record(report) -> dict:
    w = report.weibull
    record = {
        "cohort": report.cohort,
        "by": list(report.by),
        "drives": report.drives,
        "drive_days": report.drive_days,
        "failures": report.failures,
        "afr": report.afr,
        "afr_low": report.afr_low,
        "afr_high": report.afr_high,
        "small_sample": report.small_sample,
        "weibull": {"shape": w.shape, "shape_low": w.shape_low, "shape_high": w.shape_high,
                    "scale": w.scale, "scale_low": w.scale_low, "scale_high": w.scale_high,
                    "phase": w.phase},
        "youngest_entry_hours": report.curves.youngest_entry_hours,
        "curve": _records(report.curves.table),
        "age_bands": _records(report.bands),
    }
    if report.datasheet_afr is not None:
        record["mttf_hours"] = report.mttf_hours
        record["datasheet_afr"] = report.datasheet_afr
    plain = {k: v if isinstance(v, (list, dict)) else _plain(v) for k, v in record.items()}
    plain["weibull"] = {k: _plain(v) for k, v in record["weibull"].items()}
    return plain


def render_survival(report, fmt: str, out: TextIO | None = None) -> None:
    """Table, JSON (everything), or CSV (the survival curve, one row per failure age)."""
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(survival_record(report), out)
        return
    if fmt == "csv":
        _write_csv(report.curves.table, out)
        return
    console = _console()
    w = report.weibull
    lines = [
        f"[bold]{escape(report.cohort)}[/bold]  ({report.drives} drives, {report.drive_days / 365:,.1f} "
        f"drive-years, {report.failures} failures{', small sample' if report.small_sample else ''})",
        f"AFR {_num(report.afr, '.2f')} %/yr (95 %: {_num(report.afr_low, '.2f')} - {_num(report.afr_high, '.2f')})",
    ]
    if report.datasheet_afr is not None:
        lines.append(f"datasheet MTTF {report.mttf_hours:,.0f} h implies AFR {report.datasheet_afr:.2f} %/yr")
    lines.append(f"Weibull shape {_num(w.shape, '.2f')} (95 %: {_num(w.shape_low, '.2f')} - "
                 f"{_num(w.shape_high, '.2f')}), scale {_years(w.scale)} years: {w.phase}")
    for line in lines:
        console.print(line)

    bands = Table(title="Hazard by age band (annualized)", title_justify="left")
    for head in ("age", "drive-days", "failures", "hazard %/yr", "95 % range"):
        bands.add_column(head, justify="left" if head == "age" else "right", overflow="fold")
    for row in _records(report.bands):
        bands.add_row(row["band"], _num(row["drive_days"], ",.0f"), str(row["failures"]),
                      _num(row["hazard"], ".2f"),
                      f"{_num(row['hazard_low'], '.2f')} - {_num(row['hazard_high'], '.2f')}")
    console.print(bands)

    curve = report.curves.table
    shown = curve
    if len(curve) > TABLE_CURVE_ROWS:
        picks = sorted(set(round(i * (len(curve) - 1) / (TABLE_CURVE_ROWS - 1)) for i in range(TABLE_CURVE_ROWS)))
        shown = curve.iloc[picks]
    start_years = report.curves.youngest_entry_hours / HOURS_PER_YEAR
    title = f"Survival by age (Kaplan-Meier, delayed entry), given survival to {start_years:.2f} years"
    if len(shown) < len(curve):
        title += f": {len(shown)} of {len(curve)} failure ages; --format json has all"
    grid = Table(title=title, title_justify="left")
    for head in ("age (years)", "power-on hours", "survival", "95 % range", "at risk", "cum. hazard"):
        grid.add_column(head, justify="right", overflow="fold")
    for row in _records(shown):
        grid.add_row(_years(row["age_hours"]), _num(row["age_hours"], ",.0f"), _num(row["survival"], ".4f"),
                     f"{_num(row['survival_low'], '.4f')} - {_num(row['survival_high'], '.4f')}",
                     str(row["at_risk"]), _num(row["cumulative_hazard"], ".4f"))
    console.print(grid)


def plot_survival(report, path: Path) -> Path:
    """Kaplan-Meier with its 95 % band and the fitted Weibull, to ``path`` (.png or .svg)."""
    path = Path(path)
    if path.suffix.lower() not in (".png", ".svg"):
        raise ValueError(f"{path}: the plot file must end in .png or .svg")
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    curve = report.curves.table
    fig, ax = plt.subplots(figsize=(7, 4.2))
    years = curve["age_hours"] / HOURS_PER_YEAR
    ax.fill_between(years, curve["survival_low"], curve["survival_high"], step="post", alpha=0.25,
                    color="tab:blue", label="95 % band")
    ax.step(years, curve["survival"], where="post", color="tab:blue", label="Kaplan-Meier (delayed entry)")
    if len(report.weibull_curve) and report.weibull_curve["survival"].notna().any():
        w = report.weibull
        ax.plot(report.weibull_curve["age_hours"] / HOURS_PER_YEAR, report.weibull_curve["survival"],
                color="tab:orange", linestyle="--",
                label=f"Weibull shape {w.shape:.2f}, scale {w.scale / HOURS_PER_YEAR:.1f} y")
    ax.set_xlabel("age (power-on years)")
    ax.set_ylabel(f"survival, given alive at {report.curves.youngest_entry_hours / HOURS_PER_YEAR:.2f} years")
    ax.set_title(f"{report.cohort}: {report.drives} drives, {report.failures} failures")
    ax.grid(alpha=0.3)
    ax.legend(loc="lower left")
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path)
    plt.close(fig)
    return path


# -- triage fit -------------------------------------------------------------------------------

def fit_record(model, path: Path) -> dict:
    coefficients = model.coefficients().reset_index(names="covariate")
    landmark = model.landmark_
    return {
        "path": str(path),
        "horizon_days": float(model.horizon_days),
        "by": list(model.by),
        "events": "failed and proactive" if model.count_proactive else "failed",
        "data_window": model.data_window_,
        "holdout": model.holdout_,
        "calibration": None if model.calibration_ is None else _records(model.calibration_),
        "coefficients": _records(coefficients),
        "cohorts": list(landmark.design_.cohorts),
        "landmark_rows": int(landmark.n_rows_),
    }


def render_fit(model, path: Path, fmt: str, out: TextIO | None = None) -> None:
    """Table, JSON (everything), or CSV (the covariate hazard ratios)."""
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(fit_record(model, path), out)
        return
    if fmt == "csv":
        _write_csv(model.coefficients().reset_index(names="covariate"), out)
        return
    console = _console()
    window = model.data_window_
    console.print(f"saved {escape(str(path))}")
    console.print(f"data {window['first_taken_at']} to {window['last_taken_at']}: {window['snapshots']:,} "
                  f"snapshots, {window['drives']:,} drives, {window['failures']:,} failures, "
                  f"{window['landmark_rows']:,} drive states at {window['landmarks']} weekly landmarks, "
                  f"{window['excluded_drives']} drives excluded")
    grid = Table(title=f"Failure rate ratio over the next {model.horizon_days:g} days, per covariate",
                 title_justify="left")
    for head in ("covariate", "rate ratio", "95 % range", "coef", "se"):
        grid.add_column(head, justify="left" if head == "covariate" else "right", overflow="fold")
    for row in _records(model.coefficients().reset_index(names="covariate")):
        grid.add_row(row["covariate"], _num(row["rate_ratio"], ".3g"),
                     f"{_num(row['rate_ratio_low'], '.3g')} - {_num(row['rate_ratio_high'], '.3g')}",
                     _num(row["coef"], ".4f"), _num(row["se"], ".4f"))
    console.print(grid)
    if model.holdout_ is None:
        console.print("held-out check: skipped (the data window is shorter than two horizons, "
                      "or the training side holds no failure)")
        return
    h = model.holdout_
    console.print(f"held-out check: drives in service on {h['cut'][:10]}, next {h['horizon_days']:g} days: "
                  f"predicted {h['predicted_failures']:.1f} failures, observed {h['observed_failures']}, "
                  f"concordance {_num(h['concordance'], '.3f')}")
    cal = Table(title="Calibration by decile of predicted probability", title_justify="left")
    for head in ("decile", "drives", "mean P(fail)", "predicted", "observed"):
        cal.add_column(head, justify="right", overflow="fold")
    for row in _records(model.calibration_):
        cal.add_row(str(row["decile"]), str(row["drives"]), _num(row["mean_predicted"], ".2%"),
                    _num(row["predicted_failures"], ".1f"), str(row["observed_failures"]))
    console.print(cal)


def exclusion_lines(exclusions: pd.DataFrame, show: int = 5) -> list[str]:
    """A short stderr note about drives left out, with a few examples (serials escaped by caller's echo)."""
    if exclusions is None or exclusions.empty:
        return []
    lines = [f"note: {len(exclusions)} drive(s) excluded for data quality:"]
    for row in exclusions.head(show).itertuples(index=False):
        serial = str(row.serial).encode("unicode_escape").decode("ascii")
        lines.append(f"note:   {serial}: {row.reason}")
    if len(exclusions) > show:
        lines.append(f"note:   ... and {len(exclusions) - show} more")
    return lines
