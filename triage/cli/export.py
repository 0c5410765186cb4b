"""``triage export --openmetrics FILE`` and ``triage report --html FILE``: the fleet tonight for
dashboards and browsers (triage/risk/fleet.py, triage/report/openmetrics.py, triage/report/html.py).
``nightly --openmetrics/--html`` writes the same files through ``write_views``."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import StoreOption, app, check_output_file, fail, open_store, say
from triage.cli.risk import GroupConfigOption, NoDefaultRulesOption, RulesOption, _risk_inputs
from triage.exitcodes import Exit

OpenMetricsOption = typer.Option(None, "--openmetrics", metavar="FILE", help="OpenMetrics text file to write (atomic replace).")
HtmlOption = typer.Option(None, "--html", metavar="FILE", help="Self-contained HTML page to write (atomic replace).")


def write_views(store, ruleset, config, *, openmetrics: Optional[Path] = None, html: Optional[Path] = None,
                ranking=None, top: int = 25) -> None:
    """Gather the fleet state once and write whichever of the two files were asked for."""
    from triage.report.files import write_atomically
    from triage.risk.fleet import fleet_state

    if openmetrics is None and html is None:
        return
    state = fleet_state(store, ruleset, config=config, ranking=ranking, with_survival=html is not None)
    try:
        if openmetrics is not None:
            from triage.report.openmetrics import openmetrics_text

            write_atomically(openmetrics, openmetrics_text(state))
            say(f"export: OpenMetrics written to {openmetrics}")
        if html is not None:
            from triage.report.html import html_page

            write_atomically(html, html_page(state, top=top))
            say(f"report: HTML page written to {html}")
    except OSError as exc:
        fail(f"cannot write {exc.filename or ''}: {exc.strerror or exc}", Exit.FAILURE)


@app.command(epilog="Example: triage export --openmetrics /var/lib/node-metrics/triage.om --store /srv/triage/store")
def export(
    openmetrics: Optional[Path] = OpenMetricsOption,
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Write the fleet tonight (P(fail) per drive, flags, cohort AFR with limits, group loss
    probability, newest capture time) as an OpenMetrics text file for a dashboard to scrape."""
    if openmetrics is None:
        fail("say what to export: --openmetrics FILE", Exit.USAGE)
    check_output_file(openmetrics, (), "--openmetrics")
    target = open_store(store)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    write_views(target, ruleset, config, openmetrics=openmetrics)


@app.command(epilog="Example: triage report --html /srv/www/triage/tonight.html --top 30")
def report(
    html: Optional[Path] = HtmlOption,
    top: int = typer.Option(25, "--top", min=1, metavar="N", help="Drives in the page's ranked list."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Write one self-contained HTML page (no network, pictures inline): ranked drives, degraded
    groups, hosts not reporting, cohort failure rates, survival and hazard pictures."""
    if html is None:
        fail("say where to write the page: --html FILE", Exit.USAGE)
    check_output_file(html, (".html", ".htm"), "--html")
    target = open_store(store)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    write_views(target, ruleset, config, html=html, top=top)
