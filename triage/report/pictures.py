"""Charts people would rather look at than read: survival of several cohorts on one chart and
hazard by age band (the bathtub). Numbers come from ``triage.survival``; nothing is computed here
beyond converting hours to years for the axes.

Each function returns a matplotlib Figure; ``save_figure`` writes it to .png or .svg and
``figure_bytes`` gives the PNG bytes for an HTML page. Legends go outside the plotting area so
they never cover a curve; every string from the data goes through ``chart_text`` so a cohort
named with a ``$`` stays text.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from triage.report.safe import printable

HOURS_PER_YEAR = 8766.0
FIGSIZE = (8.0, 4.6)
DPI = 100
#: A band with less exposure than this is not drawn: its limits would span the whole chart
#: (common practice, no source).
MIN_DRIVE_YEARS = 1.0


def chart_text(value) -> str:
    """A drive- or cohort-derived string for a chart: printable, and ``$`` escaped so matplotlib
    never reads it as mathtext (an unbalanced ``$^{$`` would stop the drawing with an error)."""
    return printable(value).replace("$", r"\$")


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _legend_below(ax, drop: float = 0.16) -> None:
    """Legend under the axes (``drop`` axes-heights below), never over the data; saving with
    bbox_inches="tight" keeps it in the file."""
    if not ax.get_legend_handles_labels()[0]:
        return
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -drop), borderaxespad=0.0, fontsize=9, frameon=False,
              ncol=1)


def survival_figure(reports):
    """Kaplan-Meier (delayed entry) of each report's cohort with its 95 % band, one chart.

    Curves start where each cohort first has enough drives at risk (``curves.youngest_entry_hours``)
    and are conditional on surviving to that age: the legend says the age.
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=FIGSIZE, dpi=DPI)
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    drawn = 0
    for i, report in enumerate(reports):
        curve = report.curves.table
        colour = colours[i % len(colours)]
        events = getattr(report, "events", "failures")
        count = report.replacements if events == "replacements" else report.failures
        label = (f"{chart_text(report.cohort)}: {report.drives} drives, {count} {events}"
                 f" (from {report.curves.youngest_entry_hours / HOURS_PER_YEAR:.1f} y)")
        if not len(curve) or count == 0:
            ax.plot([], [], color=colour, label=label + ": no curve")
            continue
        years = curve["age_hours"] / HOURS_PER_YEAR
        ax.fill_between(years, curve["survival_low"], curve["survival_high"], step="post", alpha=0.15,
                        color=colour, linewidth=0)
        ax.step(years, curve["survival"], where="post", color=colour, label=label)
        drawn += 1
    if not drawn:
        ax.text(0.5, 0.5, "no events in these cohorts yet: no survival curve to draw",
                transform=ax.transAxes, ha="center", va="center")
    ax.set_xlabel("age (power-on years)")
    ax.set_ylabel("fraction still working (95 % band)")
    ax.set_title("Survival by age, Kaplan-Meier with delayed entry", parse_math=False)
    ax.grid(alpha=0.3)
    _legend_below(ax)
    return fig


def hazard_figure(bands_by_label: dict):
    """Annualized hazard by age band with 95 % limits (the bathtub), one series per label.

    ``bands_by_label``: label -> ``hazard_by_age_band`` table (band, age_from_hours, age_to_hours,
    drive_days, failures, hazard, hazard_low, hazard_high; hazard in % per year).
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=FIGSIZE, dpi=DPI)
    count = max(len(bands_by_label), 1)
    width = 0.8 / count
    names: list[str] = []
    any_exposure = False
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    thin = False
    for i, (label, bands) in enumerate(bands_by_label.items()):
        names = names or list(bands["band"])
        seen = (bands["drive_days"] >= MIN_DRIVE_YEARS * 365.0).to_numpy()
        thin |= bool(((bands["drive_days"] > 0) & ~seen).any())
        if not seen.any():
            continue
        any_exposure = True
        x = (np.arange(len(bands)) + (i - (count - 1) / 2) * width)[seen]
        hazard = bands["hazard"].to_numpy(dtype=float)[seen]
        low = np.clip(hazard - bands["hazard_low"].to_numpy(dtype=float)[seen], 0, None)
        high = np.clip(bands["hazard_high"].to_numpy(dtype=float)[seen] - hazard, 0, None)
        failures = int(bands["failures"].sum())
        colour = colours[i % len(colours)]
        ax.bar(x, hazard, width=width * 0.9, color=colour, label=f"{chart_text(label)} ({failures} failures)")
        ax.errorbar(x, hazard, yerr=[low, high], fmt="none", ecolor=colour, elinewidth=1, capsize=3, alpha=0.8)
    tops = [b["hazard"].max() for b in bands_by_label.values() if (b["drive_days"] > 0).any()]
    top = np.nanmax(tops) if tops and np.isfinite(np.nanmax(tops)) else 0.0
    if top > 0 and ax.get_ylim()[1] > 3 * top:  # a thin band's huge upper limit would flatten the bars
        ax.set_ylim(0, 3 * top)
        ax.text(0.99, 0.98, "limits above the frame are cut", transform=ax.transAxes, ha="right", va="top",
                fontsize=8, color="0.35")
    if not any_exposure:
        ax.text(0.5, 0.5, "no drive-days observed", transform=ax.transAxes, ha="center", va="center")
    ax.set_xticks(np.arange(len(names)), names, rotation=20, ha="right")
    ax.set_xlabel("age band (power-on time)" + (f"; bands under {MIN_DRIVE_YEARS:g} drive-year left out"
                                                 if thin else ""))
    ax.set_ylabel("hazard, % per drive-year (95 % limits)")
    ax.set_title("Failure rate by age band (the bathtub)", parse_math=False)
    ax.grid(alpha=0.3, axis="y")
    _legend_below(ax, drop=0.26)
    return fig


def save_figure(fig, path: Path) -> Path:
    path = Path(path)
    if path.suffix.lower() not in (".png", ".svg"):
        raise ValueError(f"{path}: the plot file must end in .png or .svg")
    fig.savefig(path, bbox_inches="tight")
    _pyplot().close(fig)
    return path


def figure_bytes(fig) -> bytes:
    """PNG bytes of ``fig`` (for a data: URI), then closes it."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", bbox_inches="tight")
    _pyplot().close(fig)
    return buffer.getvalue()
