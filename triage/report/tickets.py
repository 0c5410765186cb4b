"""Render the ticket export's outcome: one summary line for logs. No computation here."""

from __future__ import annotations

from pathlib import Path

from triage.risk.score import moment_text


def summary_line(counts, out: Path, as_of=None) -> str:
    return (f"tickets (as of {moment_text(as_of)}): {counts.new} new, {counts.ongoing} ongoing, "
            f"{counts.not_reporting} not-reporting, {counts.cleared} cleared -> {out}")
