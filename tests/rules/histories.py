"""Hand-built drive histories for rule tests (invented drives; Quillmere Hosting style serials).

``hdd("QHA001", pending_sectors=[0, 0, 24])`` is a healthy 7200 rpm ATA disk captured once a day
from ``T0`` with those pending counts; lists give one value per capture, scalars hold for all.
``days=[0, 3, 7]`` places captures at those day offsets instead. ``frame(...)`` joins drives into
a DataFrame typed exactly as the store returns it (through the SNAPSHOTS Arrow schema).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa

from triage.rules import DriveHistory, compile_expression
from triage.rules.expr import Expression
from triage.rules.fields import Kind
from triage.rules.model import Category, Rule, Severity
from triage.rules.template import compile_template
from triage.store.schema import SNAPSHOTS

T0 = pd.Timestamp("2031-03-01T02:00:00Z")

ATA_COUNTERS = (
    "reallocated_sectors", "reallocation_events", "pending_sectors", "offline_uncorrectable",
    "reported_uncorrectable", "command_timeouts", "crc_errors", "spin_retries",
)
NVME_FIELDS = ("nvme_critical_warning", "nvme_spare_pct", "nvme_spare_threshold_pct", "nvme_used_pct",
               "nvme_media_errors", "nvme_unsafe_shutdowns", "nvme_error_log_entries")

HEALTHY_HDD = {
    "model": "QH-HD8T-A", "firmware": "QA12", "bus": "ata", "rotation_rpm": 7200, "temperature_c": 38,
    "threshold_tripped": False, "prefail_tripped": False, "power_cycles": 40,
    **{name: 0 for name in ATA_COUNTERS},
}
HEALTHY_ATA_SSD = {**HEALTHY_HDD, "model": "Tallow S960", "rotation_rpm": 0}
HEALTHY_NVME = {
    "model": "Corvid NV1920", "firmware": "CV3", "bus": "nvme", "rotation_rpm": 0, "temperature_c": 41,
    "power_cycles": 12, "nvme_critical_warning": 0, "nvme_spare_pct": 100, "nvme_spare_threshold_pct": 10,
    "nvme_used_pct": 3, "nvme_media_errors": 0, "nvme_unsafe_shutdowns": 1, "nvme_error_log_entries": 0,
}


def _drive(serial: str, healthy: dict, days=None, **fields) -> list[dict]:
    lengths = {len(v) for v in fields.values() if isinstance(v, (list, tuple))}
    if days is not None:
        lengths.add(len(days))
    if len(lengths) > 1:
        raise ValueError(f"per-capture lists of different lengths: {sorted(lengths)}")
    count = lengths.pop() if lengths else 1
    offsets = list(days) if days is not None else list(range(count))
    rows = []
    for i, offset in enumerate(offsets):
        row = {"serial": serial, "taken_at": T0 + pd.Timedelta(days=offset), **healthy}
        for name, value in fields.items():
            row[name] = value[i] if isinstance(value, (list, tuple)) else value
        rows.append(row)
    return rows


def hdd(serial: str, days=None, **fields) -> list[dict]:
    return _drive(serial, HEALTHY_HDD, days, **fields)


def ata_ssd(serial: str, days=None, **fields) -> list[dict]:
    return _drive(serial, HEALTHY_ATA_SSD, days, **fields)


def nvme(serial: str, days=None, **fields) -> list[dict]:
    return _drive(serial, HEALTHY_NVME, days, **fields)


def frame(*drives: list[dict]) -> pd.DataFrame:
    rows = [row for drive in drives for row in drive]
    table = pa.Table.from_pylist(
        [{c: r.get(c) for c in SNAPSHOTS.names} for r in rows], schema=SNAPSHOTS
    )
    return table.to_pandas()


def at(day: float) -> pd.Timestamp:
    """The moment ``day`` days after T0."""
    return T0 + pd.Timedelta(days=day)


def values(expression: str, history: pd.DataFrame, now=None) -> dict[str, object]:
    """serial -> value of ``expression`` (None where unknown)."""
    drives = DriveHistory(history, now)
    compiled = compile_expression(expression)
    result = drives.evaluate(compiled)
    vals = np.broadcast_to(result.values, (drives.n_drives,))
    known = np.broadcast_to(result.known, (drives.n_drives,))
    out = {}
    for serial, value, ok in zip(drives.serials, vals.tolist(), known.tolist()):
        out[serial] = value if ok else None
    return out


def make_rule(when: str, explain: str = "fired", severity: str = "watch", category: str = "media",
              rule_id: str = "test.rule") -> Rule:
    from pathlib import Path

    return Rule(
        id=rule_id, title=f"test {rule_id}", severity=Severity(severity), category=Category(category),
        when=compile_expression(when, expect=Kind.BOOL), explain=compile_template(explain), source="test",
        enabled=True, path=Path("test.toml"), line=1, origin="site",
    )


def compiled(text: str) -> Expression:
    return compile_expression(text)
