"""Render cohort tables, survival reports and fitted-model summaries; plot survival. No computation here."""

from __future__ import annotations

import csv
import json
import math
import sys
from pathlib import Path
from typing import TextIO

import pandas as pd
from rich.table import Table

from triage.report.console import markup_name, markup_text, stdout_console
from triage.report.pictures import chart_text
from triage.safety import cell, name, visible

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

#: Below this many terminal columns the cohort table folds into four columns (80-column terminals).
WIDE_COLUMNS = 140


def _write_csv(table: pd.DataFrame, out: TextIO) -> None:
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 records end in CRLF
    writer.writerow(table.columns)
    for row in _records(table):
        writer.writerow([cell(v) if isinstance(v, str) else "" if v is None else v for v in row.values()])


def render_cohorts(table: pd.DataFrame, fmt: str, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(_records(table), out)
    elif fmt == "csv":
        _write_csv(table, out)
    else:
        _console().print(cohort_grid(table, _console().width))


def _range(row: dict, low: str, high: str, spec: str = ".2f") -> str:
    return f"{_num(row[low], spec)} - {_num(row[high], spec)}"


def _cohort_notes(row: dict) -> str:
    notes = []
    if row["small_sample"]:
        notes.append("small sample")
    if row.get("phase_note"):
        notes.append(markup_text(row["phase_note"]))
    return "; ".join(notes)


def _vs_fleet(row: dict) -> str:
    return (f"{_num(row['vs_fleet'], '.2f')}x ({_range(row, 'vs_fleet_low', 'vs_fleet_high')}), "
            f"p {_p_value(row['vs_fleet_p'])}")


def cohort_grid(table: pd.DataFrame, width: int) -> Table:
    """The cohort table for a terminal ``width`` columns wide: one column per figure when wide,
    four folded columns below ``WIDE_COLUMNS`` (cells break between words, never inside one)."""
    datasheet = "datasheet_afr" in table.columns
    vs_fleet = "vs_fleet" in table.columns
    grid = Table(title="Failure and replacement rates, life phase by cohort", title_justify="left")
    rows = _records(table)
    if width >= WIDE_COLUMNS:
        # the intervals and the phase lead, exposure and counts follow (as the JSON keys)
        heads = ["cohort", "AFR %/yr", "95 % range", "ARR %/yr", "95 % range"]
        if datasheet:
            heads.append("datasheet AFR")
        if vs_fleet:
            heads.append("vs rest of fleet")
        heads += ["phase", "Weibull shape (95 %)", "scale (years)", "drives", "drive-years", "failed", "replaced",
                  "note"]
        for head in heads:
            grid.add_column(head, justify="left" if head in ("cohort", "phase", "note") else "right",
                            overflow="fold")
        for row in rows:
            cells = [markup_name(row["cohort"]), _num(row["afr"], ".2f"), _range(row, "afr_low", "afr_high"),
                     _num(row["arr"], ".2f"), _range(row, "arr_low", "arr_high")]
            if datasheet:
                cells.append(_num(row["datasheet_afr"], ".2f"))
            if vs_fleet:
                cells.append(_vs_fleet(row))
            cells += [row["phase"],
                      f"{_num(row['shape'], '.2f')} ({_num(row['shape_low'], '.2f')}-{_num(row['shape_high'], '.2f')})",
                      _years(row["scale"]), str(row["drives"]), _num(row["drive_days"] / 365.0, ",.1f"),
                      str(row["failures"]), str(row["replacements"]), _cohort_notes(row)]
            grid.add_row(*cells)
        return grid
    grid.add_column("cohort", overflow="fold", ratio=2)
    grid.add_column("failed (AFR %/yr)", justify="right", no_wrap=True)
    grid.add_column("replaced (ARR %/yr)", justify="right", no_wrap=True)
    grid.add_column("phase (Weibull shape)", overflow="fold", ratio=3)
    for row in rows:
        who = f"{markup_name(row['cohort'])}\n{row['drives']} drives\n{_num(row['drive_days'] / 365.0, ',.1f')} drive-years"
        failed = f"{row['failures']}\n{_num(row['afr'], '.2f')}\n{_range(row, 'afr_low', 'afr_high')}"
        if datasheet:
            failed += f"\ndatasheet {_num(row['datasheet_afr'], '.2f')}"
        replaced = f"{row['replacements']}\n{_num(row['arr'], '.2f')}\n{_range(row, 'arr_low', 'arr_high')}"
        phase = row["phase"]
        if row["shape_low"] is not None:
            phase += (f"\nshape {_num(row['shape'], '.2f')} ({_num(row['shape_low'], '.2f')}-"
                      f"{_num(row['shape_high'], '.2f')}), scale {_years(row['scale'])} y")
        if vs_fleet:
            phase += f"\nvs rest of fleet {_vs_fleet(row)}"
        notes = _cohort_notes(row)
        grid.add_row(who, failed, replaced, phase + (f"\n{notes}" if notes else ""))
    return grid


def _p_value(p) -> str:
    p = _plain(p)
    if p is None:
        return "-"
    return "< 0.0001" if p < 0.0001 else f"{p:.2g}" if p < 0.01 else f"{p:.2f}"


# -- triage survival --------------------------------------------------------------------------

def survival_record(report) -> dict:
    w = report.weibull
    record = {
        "cohort": report.cohort,
        "by": list(report.by),
        "drives": report.drives,
        "drive_days": report.drive_days,
        "failures": report.failures,
        "replacements": report.replacements,
        "afr": report.afr,
        "afr_low": report.afr_low,
        "afr_high": report.afr_high,
        "arr": report.arr,
        "arr_low": report.arr_low,
        "arr_high": report.arr_high,
        "events": report.events,
        "small_sample": report.small_sample,
        "weibull": {"shape": w.shape, "shape_low": w.shape_low, "shape_high": w.shape_high,
                    "scale": w.scale, "scale_low": w.scale_low, "scale_high": w.scale_high,
                    "phase": w.phase, "phase_note": w.phase_note},
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


def render_survivals(reports: list, fmt, out: TextIO | None = None) -> None:
    """Several cohorts: one report's output as ``render_survival``; more: a JSON list, one CSV of
    the curves with the cohort as first column, or one set of tables per cohort."""
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if len(reports) == 1 or fmt == "table":
        for report in reports:
            render_survival(report, fmt, out)
    elif fmt == "json":
        _write_json([survival_record(report) for report in reports], out)
    else:
        _write_csv(pd.concat([r.curves.table.assign(cohort=r.cohort)[["cohort", *r.curves.table.columns]]
                              for r in reports], ignore_index=True), out)


def render_survival(report, fmt: str, out: TextIO | None = None, console=None) -> None:
    """Table, JSON (everything), or CSV (the survival curve, one row per failure age)."""
    out = out or sys.stdout
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(survival_record(report), out)
        return
    if fmt == "csv":
        _write_csv(report.curves.table, out)
        return
    console = console or _console()
    w = report.weibull
    lines = [
        f"[bold]{markup_name(report.cohort)}[/bold]  ({report.drives} drives, {report.drive_days / 365:,.1f} "
        f"drive-years, {report.failures} failed, {report.replacements} replaced"
        f"{', small sample' if report.small_sample else ''})",
        f"AFR {_num(report.afr, '.2f')} %/yr (95 %: {_num(report.afr_low, '.2f')} - {_num(report.afr_high, '.2f')}), "
        f"ARR {_num(report.arr, '.2f')} %/yr (95 %: {_num(report.arr_low, '.2f')} - {_num(report.arr_high, '.2f')})",
    ]
    if report.datasheet_afr is not None:
        lines.append(f"datasheet MTTF {report.mttf_hours:,.0f} h implies AFR {report.datasheet_afr:.2f} %/yr")
    lines.append(f"Weibull shape {_num(w.shape, '.2f')} (95 %: {_num(w.shape_low, '.2f')} - "
                 f"{_num(w.shape_high, '.2f')}), scale {_years(w.scale)} years: {w.phase}"
                 + (f" ({markup_text(w.phase_note)})" if w.phase_note else ""))
    lines.append(f"events in the curves and the fit: {report.events}"
                 + (" (proactive pulls censored)" if report.events == "failures" else " (failed or proactive)"))
    for line in lines:
        console.print(line)

    bands = Table(title="Hazard by age band (annualized)", title_justify="left")
    for head in ("age", "drive-days", report.events, "hazard %/yr", "95 % range"):
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
    # headers of several words, so an 80-column terminal wraps them, not the numbers
    for head in ("age (years)", "power-on hours", "survival", "95 % range", "at risk", "cum. hazard"):
        grid.add_column(head, justify="right", overflow="fold")
    for row in _records(shown):
        grid.add_row(_years(row["age_hours"]), _num(row["age_hours"], ",.0f"), _num(row["survival"], ".4f"),
                     f"{_num(row['survival_low'], '.4f')} - {_num(row['survival_high'], '.4f')}",
                     str(row["at_risk"]), _num(row["cumulative_hazard"], ".4f"))
    console.print(grid)


def plot_survival(report, path: Path) -> Path:
    """Kaplan-Meier with its 95 % band and the fitted Weibull, to ``path`` (.png or .svg) in an
    existing folder. A cohort without events gets a figure saying so, not an empty frame."""
    path = Path(path)
    if path.suffix.lower() not in (".png", ".svg"):
        raise ValueError(f"{path}: the plot file must end in .png or .svg")
    if not path.absolute().parent.is_dir():
        raise ValueError(f"{path}: folder {path.absolute().parent} does not exist")
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    curve = report.curves.table
    fig, ax = plt.subplots(figsize=(7, 4.2))
    title = (f"{chart_text(name(report.cohort))}: {report.drives} drives, {report.failures} failed, "
             f"{report.replacements} replaced")
    if not len(curve) or int(curve["failures"].sum()) == 0:
        ax.set_axis_off()
        ax.text(0.5, 0.5, f"no {report.events} in {report.drive_days / 365:,.1f} drive-years:\n"
                          "no survival curve to draw (survival stays at 1)",
                ha="center", va="center", fontsize=12, transform=ax.transAxes)
        ax.set_title(title)
        fig.savefig(path)
        plt.close(fig)
        return path
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
    ax.set_title(title)
    ax.grid(alpha=0.3)
    ax.legend(loc="lower left")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


# -- triage compare ---------------------------------------------------------------------------

def compare_record(c) -> dict:
    r = c.rates
    record = {
        "a": c.a, "b": c.b, "by": list(c.by), "events": c.events,
        "rate_ratio": r.rate_ratio, "rate_ratio_low": r.rate_ratio_low, "rate_ratio_high": r.rate_ratio_high,
        "p_value": r.p_value,
        "hazard_ratio": c.hazard_ratio, "hazard_ratio_low": c.hazard_ratio_low,
        "hazard_ratio_high": c.hazard_ratio_high, "hazard_note": c.hazard_note or None,
        "age_confounded": c.age_confounded,
        "a_side": {"drives": c.drives_a, "failures": r.failures_a, "drive_days": r.drive_days_a,
                   "median_age_hours": c.median_age_a_hours},
        "b_side": {"drives": c.drives_b, "failures": r.failures_b, "drive_days": r.drive_days_b,
                   "median_age_hours": c.median_age_b_hours},
    }
    return {k: {kk: _plain(vv) for kk, vv in v.items()} if isinstance(v, dict) else
            v if isinstance(v, list) else _plain(v) for k, v in record.items()}


def _times(value) -> str:
    value = _plain(value)
    return "-" if value is None else f"{value:.2g}x" if value < 10 else f"{value:.0f}x"


def verdict(c) -> str:
    """One plain-words line: how much more often A fails than B, and after adjusting for age."""
    r = c.rates
    what = "fails" if c.events == "failures" else "is replaced"
    if r.failures_a + r.failures_b == 0:
        return f"Neither cohort has any {c.events} yet: no comparison possible."
    if math.isinf(r.rate_ratio):  # B has none: only a lower limit says anything
        line = (f"{c.a} had {r.failures_a} {c.events}, {c.b} none: {c.a} {what} at least "
                f"{_times(r.rate_ratio_low)} as often (95 % lower limit), p = {_p_value(r.p_value)}")
    else:
        line = (f"{c.a} {what} {_times(r.rate_ratio)} as often as {c.b} "
                f"({_times(r.rate_ratio_low)[:-1]}-{_times(r.rate_ratio_high)}), p = {_p_value(r.p_value)}")
    if math.isfinite(c.hazard_ratio):
        line += (f"; adjusted for age {_times(c.hazard_ratio)} ({_times(c.hazard_ratio_low)[:-1]}-"
                 f"{_times(c.hazard_ratio_high)})")
    else:
        line += f"; {c.hazard_note}"
    return line + "."


def render_compare(c, fmt: str, out: TextIO | None = None, console=None) -> None:
    fmt = getattr(fmt, "value", fmt)
    if fmt == "json":
        _write_json(compare_record(c), out or sys.stdout)
        return
    if fmt == "csv":  # one row: the sides' figures flattened to a_side_* / b_side_*
        record = compare_record(c)
        flat = {}
        for key, value in record.items():
            if isinstance(value, dict):
                flat.update({f"{key}_{k}": v for k, v in value.items()})
            else:
                flat[key] = ",".join(value) if isinstance(value, list) else value
        _write_csv(pd.DataFrame([flat]), out or sys.stdout)
        return
    console = console or _console()
    r = c.rates
    console.print(markup_text(verdict(c)))
    grid = Table(title=f"{c.events} per drive-day, by {','.join(c.by)}", title_justify="left")
    for head in ("cohort", "drives", "drive-years", c.events, "per year %", "median age (years)"):
        grid.add_column(head, justify="left" if head == "cohort" else "right", overflow="fold")
    for label, drives, k, days, age in ((c.a, c.drives_a, r.failures_a, r.drive_days_a, c.median_age_a_hours),
                                        (c.b, c.drives_b, r.failures_b, r.drive_days_b, c.median_age_b_hours)):
        rate = 100 * k / (days / 365.0) if days > 0 else math.nan
        grid.add_row(markup_name(label), str(drives), _num(days / 365.0, ",.1f"), str(k), _num(rate, ".2f"), _years(age))
    console.print(grid)
    if c.age_confounded:
        console.print(f"note: the two cohorts were watched at different ages (median {_years(c.median_age_a_hours)} "
                      f"and {_years(c.median_age_b_hours)} years) and the crude ratio lies outside the age-adjusted "
                      "range: trust the adjusted one.")
    if r.failures_a + r.failures_b < 10:
        console.print(f"note: only {r.failures_a + r.failures_b} {c.events} in all; the ranges are wide for a reason.")


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
    console.print(f"saved {markup_text(path)}")
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


def return_lines(returns: int) -> list[str]:
    """A stderr note when drives came back after a removal (each return is a new at-risk period)."""
    if not returns:
        return []
    return [f"note: {returns} drive(s) seen again after a removal: each removal counted once, "
            "and each return watched from its age then (docs/survival.md, section 1)"]


def exclusion_lines(exclusions: pd.DataFrame, show: int = 5) -> list[str]:
    """A short stderr note about drives left out, with a few examples (every value sanitised)."""
    if exclusions is None or exclusions.empty:
        return []
    lines = [f"note: {len(exclusions)} drive(s) excluded for data quality:"]
    for row in exclusions.head(show).itertuples(index=False):
        lines.append(f"note:   {name(row.serial)}: {visible(row.reason)}")
    if len(exclusions) > show:
        lines.append(f"note:   ... and {len(exclusions) - show} more")
    return lines
