"""The demo's work folder: captures, store and ticket file of one invented fleet.

A marker file ``demo.json`` records the fleet (seed, drives, nights). Running the demo again
with the same fleet reuses the store (the capture files come out byte-identical, so ingest
skips them); a different fleet starts afresh, because mixing two invented fleets in one store
would be meaningless. A non-empty folder without the marker is not ours and is left alone.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass
from pathlib import Path

from triage.demo.fleet import FleetSpec

MARKER = "demo.json"


class NotADemoFolder(ValueError):
    """The --work folder holds files the demo did not write."""


@dataclass(frozen=True)
class DemoFolder:
    root: Path

    @property
    def captures(self) -> Path:
        return self.root / "captures"

    @property
    def store(self) -> Path:
        return self.root / "store"

    @property
    def tickets(self) -> Path:
        return self.root / "tickets.csv"


def _fleet_key(spec: FleetSpec) -> dict:
    return {"seed": spec.seed, "drives": spec.n_drives, "days": spec.days, "bad_lines": spec.bad_lines}


def prepare_demo_folder(work: Path, spec: FleetSpec) -> tuple[DemoFolder, bool]:
    """Make ``work`` ready for ``spec``; returns (folder, reused) -- reused when the store is kept."""
    work = Path(work)
    folder = DemoFolder(work)
    marker = work / MARKER
    if work.exists() and not work.is_dir():
        raise NotADemoFolder(f"{work}: not a directory")
    if work.is_dir() and any(work.iterdir()) and not marker.is_file():
        raise NotADemoFolder(f"{work}: folder is not empty and holds no {MARKER}; choose another --work")
    if marker.is_file():
        try:
            previous = json.loads(marker.read_text(encoding="utf-8"))
        except json.JSONDecodeError:
            previous = None
        if previous == _fleet_key(spec):
            return folder, True
        for part in (folder.captures, folder.store):
            if part.exists():
                shutil.rmtree(part)
        folder.tickets.unlink(missing_ok=True)
    work.mkdir(parents=True, exist_ok=True)
    marker.write_text(json.dumps(_fleet_key(spec)) + "\n", encoding="utf-8")
    return folder, False
