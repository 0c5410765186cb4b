"""The ground truth of a generated fleet, as pandas frames.

``snapshots`` has the columns and meanings of ``triage.store.schema.SNAPSHOTS`` (without
``source_file``): exactly what ingest should store from the written capture files. The other
frames say what really happened (failures, warnings, removals, redundancy groups), which the
files only hint at.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa

from triage.demo.fleet import Fleet, NightState
from triage.demo.readings import NVME_DATA_UNIT_BYTES, ata_readings, nvme_readings
from triage.store.schema import ATA_COUNTER_ATTRIBUTES, SNAPSHOTS

SNAPSHOT_COLUMNS = [name for name in SNAPSHOTS.names if name != "source_file"]

DRIVE_COLUMNS = [
    "serial", "model", "firmware", "bus", "user_capacity_bytes", "site", "host", "slot", "group",
    "entry_age_hours", "failed", "failure_time", "warned",
    # beyond the minimum: the rest of each drive's story
    "device", "wwn", "entry_time", "failure_age_hours", "warning_onset", "exit_time",
    "exit_reason", "removed_at", "generation",
]


@dataclass
class GroundTruth:
    snapshots: pd.DataFrame  # one row per capture line written (bad lines excluded)
    removals: pd.DataFrame  # serial, removed_at, reason, note: the rows of removals.csv
    drives: pd.DataFrame  # one row per drive that was ever installed
    groups: pd.DataFrame  # group, host, site, layout, tolerance, members, missing_at_end


def ground_truth(fleet: Fleet) -> GroundTruth:
    """Replay ``fleet`` and collect the truth (timestamps tz-aware UTC)."""
    nights = [_snapshot_columns(fleet, state) for state in fleet.nights()]
    removals = fleet.removals[["serial", "removed_at", "reason", "note"]].copy()
    removals["note"] = removals["note"].where(removals["note"] != "", None)
    return GroundTruth(
        snapshots=_assemble(nights),
        removals=removals.reset_index(drop=True),
        drives=fleet.drives[DRIVE_COLUMNS].copy(),
        groups=fleet.groups.copy(),
    )


def _snapshot_columns(fleet: Fleet, state: NightState) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """One night's snapshot columns: name -> (values, missing mask)."""
    n = len(state)
    spec = fleet.spec
    drv = state.drive
    drives = fleet.drives
    model_of = fleet.arrays["model"][drv]
    none = np.zeros(n, dtype=bool)
    cols: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name in ("serial", "model", "firmware", "bus", "wwn", "host", "device", "slot", "group"):
        values = drives[name].to_numpy()[drv]
        cols[name] = (values, pd.isna(values))
    cols["user_capacity_bytes"] = (drives["user_capacity_bytes"].to_numpy()[drv], none)
    cols["rotation_rpm"] = (np.array([m.rotation_rpm for m in spec.models])[model_of], none)
    cols["taken_at"] = (state.taken_at_us, none)
    cols["power_on_hours"] = (np.floor(state.power_on_hours).astype(np.int64), none)
    temperature = state.temperature_c.copy()
    cols["temperature_c"] = (temperature, none)

    def column(name, dtype=np.int64):
        if name not in cols:
            cols[name] = (np.zeros(n, dtype=dtype), np.ones(n, dtype=bool))
        return cols[name]

    counter_ids = {name: attr for attr, name in ATA_COUNTER_ATTRIBUTES.items()}
    thresholds_host = fleet.hosts["thresholds"].to_numpy()[fleet.arrays["host"][drv]]
    for mi, m in enumerate(spec.models):
        if m.bus != "ata":
            continue
        r = ata_readings(fleet, state, mi)
        if not len(r.rows):
            continue
        for name, attr in counter_ids.items():
            raw = r.column(attr)
            if raw is not None:
                values, missing = column(name)
                values[r.rows], missing[r.rows] = raw, False
        # SFF-8035i: an attribute trips when its value is at or below a non-zero threshold.
        crossed = (r.thresholds > 0) & (r.value <= r.thresholds)
        prefail = crossed & ((r.flags & 1) == 1)
        known = thresholds_host[r.rows]
        for name, mask in (("threshold_tripped", crossed), ("prefail_tripped", prefail)):
            values, missing = column(name, bool)
            values[r.rows], missing[r.rows] = mask.any(axis=1), ~known
    rows, fields = nvme_readings(fleet, state)
    if len(rows):
        values, missing = column("power_cycles")
        values[rows], missing[rows] = fields["power_cycles"], False
        temperature[rows] = fields["composite_temperature_k"] - 273
        for name, source in (
            ("nvme_critical_warning", "critical_warning"),
            ("nvme_spare_pct", "available_spare_pct"),
            ("nvme_spare_threshold_pct", "spare_threshold_pct"),
            ("nvme_used_pct", "percentage_used"),
            ("nvme_media_errors", "media_errors"),
            ("nvme_unsafe_shutdowns", "unsafe_shutdowns"),
            ("nvme_error_log_entries", "error_log_entries"),
        ):
            values, missing = column(name)
            values[rows], missing[rows] = fields[source], False
        values, missing = column("data_written_bytes")
        values[rows], missing[rows] = fields["data_units_written"] * NVME_DATA_UNIT_BYTES, False
    cols["counters_clamped"] = (np.zeros(n, dtype=bool), none)  # every demo counter fits int64
    for name in SNAPSHOT_COLUMNS:
        column(name, bool if pa.types.is_boolean(SNAPSHOTS.field(name).type) else np.int64)
    return cols


def _assemble(nights: list[dict[str, tuple[np.ndarray, np.ndarray]]]) -> pd.DataFrame:
    """Concatenate the nights and type each column once, as the schema's Arrow type says."""
    out = {}
    for name in SNAPSHOT_COLUMNS:
        kind = SNAPSHOTS.field(name).type
        if nights:
            values = np.concatenate([night[name][0] for night in nights])
            missing = np.concatenate([night[name][1] for night in nights]).astype(bool)
        else:
            dtype = bool if pa.types.is_boolean(kind) else np.int64
            values, missing = np.zeros(0, dtype=dtype), np.zeros(0, dtype=bool)
        if pa.types.is_timestamp(kind):
            out[name] = pd.Series(values.astype("datetime64[us]")).dt.tz_localize("UTC")
        elif pa.types.is_boolean(kind):
            out[name] = pd.Series(pd.arrays.BooleanArray(values.astype(bool), missing))
        elif pa.types.is_integer(kind):
            array = pd.arrays.IntegerArray(values.astype(np.int64), missing)
            out[name] = pd.Series(array).astype("Int32" if pa.types.is_int32(kind) else "Int64")
        else:
            obj = values.astype(object)
            obj[missing] = None
            out[name] = pd.Series(obj, dtype=object)
    return pd.DataFrame(out)


__all__ = ["GroundTruth", "ground_truth", "SNAPSHOT_COLUMNS"]
