"""The ``triage`` command line: thin wiring over the library, one module per command group.

Every command calls one library function and hands its result to a renderer in
``triage.report``. Data goes to stdout; logs and progress go to stderr. Exit codes live in
``triage.exitcodes``.
"""

from __future__ import annotations

import sys

import typer

from triage.cli.common import app
from triage.cli import drive, export, ingest, predict, risk, rules, survival  # noqa: F401  (each registers its commands)


def main() -> None:
    from triage.cli.common import fail, os_failure

    try:
        app()
    except OSError as exc:  # last resort for any command: one line, not a traceback
        try:
            fail(os_failure(exc))
        except typer.Exit as stop:
            sys.exit(stop.exit_code)


if __name__ == "__main__":
    sys.exit(main())
