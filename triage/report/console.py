"""Terminal helpers shared by renderers: colour and progress only on a TTY, NO_COLOR respected."""

from __future__ import annotations

import os
import sys
from contextlib import contextmanager
from typing import Callable, Iterator

from rich.console import Console
from rich.markup import escape
from rich.progress import (
    BarColumn,
    DownloadColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeElapsedColumn,
    TransferSpeedColumn,
)

from triage.safety import TEXT_LIMIT, name, visible


def markup_name(value: object) -> str:
    """An identifier (host, slot, serial...) for a rich table: sanitised, cut, markup escaped."""
    return escape(name(value))


def markup_text(value: object, limit: int | None = TEXT_LIMIT) -> str:
    """Free text (evidence, actions, paths) for rich output: sanitised, cut, markup escaped."""
    return escape(visible(value, limit))


def stderr_console() -> Console:
    return Console(stderr=True, no_color=bool(os.environ.get("NO_COLOR")))


def stdout_console() -> Console:
    # rich itself honours NO_COLOR; colour only when stdout is a terminal
    return Console(no_color=bool(os.environ.get("NO_COLOR")) or not sys.stdout.isatty())


@contextmanager
def progress_bar(label: str, *, in_bytes: bool = False) -> Iterator[Callable[[int, int], None]]:
    """A progress callback ``(done, total)``: a bar on a terminal's stderr, silent elsewhere.
    ``in_bytes``: the counts are bytes (shown as sizes, with the rate)."""
    if not sys.stderr.isatty():
        yield lambda done, total: None
        return
    counts = (DownloadColumn(), TransferSpeedColumn()) if in_bytes else (MofNCompleteColumn(),)
    with Progress(TextColumn(label), BarColumn(), *counts, TimeElapsedColumn(),
                  console=stderr_console(), transient=True) as bar:
        task = bar.add_task(label, total=None)

        def update(done: int, total: int) -> None:
            bar.update(task, completed=done, total=total)

        yield update
