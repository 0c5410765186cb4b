"""``triage drive SERIAL``: one drive's story (triage/risk/drive.py, triage/report/drive.py)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import OutputFormat, StoreOption, app, check_output_file, fail, format_option, open_store, say
from triage.cli.risk import GroupConfigOption, NoDefaultRulesOption, RulesOption, _risk_inputs
from triage.exitcodes import Exit


@app.command(epilog="Example: triage drive QHS07000123 --plot qhs07000123.png --store /srv/triage/store")
def drive(
    serial: str = typer.Argument(..., metavar="SERIAL", help="The drive's serial number, as captured."),
    fmt: OutputFormat = format_option("CSV: one row per capture; JSON: the whole story with the raw series"),
    plot: Optional[Path] = typer.Option(None, "--plot", metavar="FILE",
                                        help="Also draw the counter history (.png or .svg, in an existing folder)."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """One drive: identity, place and group state, rule hits with evidence, P(fail) and what drives
    it, and its counter and temperature history."""
    from triage.report.drive import plot_drive_history, render_drive_csv, render_drive_json, render_drive_table
    from triage.risk.drive import UnknownDrive, drive_story

    check_output_file(plot, (".png", ".svg"), "--plot")
    target = open_store(store)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    try:
        story = drive_story(target, serial, ruleset, config=config)
    except UnknownDrive as exc:
        fail(str(exc).encode("unicode_escape").decode("ascii"), Exit.USAGE)
    if fmt is OutputFormat.json:
        render_drive_json(story)
    elif fmt is OutputFormat.csv:
        render_drive_csv(story)
    else:
        render_drive_table(story)
    if plot is not None:
        plot_drive_history(story, plot)
        say(f"drive: plot written to {plot}")
