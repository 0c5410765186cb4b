"""The ``triage`` command line: thin wiring over the library, one module per command group.

Every command calls one library function and hands its result to a renderer in
``triage.report``. Data goes to stdout; logs and progress go to stderr. Exit codes live in
``triage.exitcodes``.
"""

from __future__ import annotations

import sys

from triage.cli.common import app
from triage.cli import drive, export, ingest, predict, risk, rules, survival  # noqa: F401  (each registers its commands)


def main() -> None:
    app()


if __name__ == "__main__":
    sys.exit(main())
