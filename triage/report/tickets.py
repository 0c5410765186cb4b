"""Render the ticket export's outcome: one summary line for logs. No computation here."""

from __future__ import annotations

from pathlib import Path


def summary_line(counts, out: Path) -> str:
    return (f"tickets: {counts.new} new, {counts.ongoing} ongoing, {counts.cleared} cleared "
            f"-> {out}")
