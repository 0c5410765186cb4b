"""What the drives report on a night: SMART attribute tables and NVMe health fields.

Turns a :class:`~triage.demo.fleet.NightState` into the field values of the standard structures
(still numbers, not bytes). The writer encodes them; the ground truth reads the same numbers, so
the two agree by construction and the tests can check the encoding against the parsers.

Normalized values are invented but follow the SFF-8035i conventions: values run 1-253, higher is
better, ``worst`` is the lowest value seen, and an attribute whose value falls to or below a
non-zero threshold has "tripped" (for a pre-failure attribute, flags bit 0, that predicts
failure). The particular curves below (value = 100 - counter, and so on) are common practice in
spirit, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from triage.demo.fleet import (
    C,
    NVME_SPARE_THRESHOLD_PCT,
    NVME_WARNING_TEMP_K,
    Fleet,
    NightState,
)

#: attribute id -> (flags, threshold). Bit 0 = pre-failure; 1 = online collection;
#: 2 = performance; 3 = error rate; 4 = event count; 5 = self-preserving (SFF-8035i flag bits).
#: Thresholds are invented but plausible.
ATTRIBUTE_FLAGS_THRESHOLDS = {
    1: (0x000F, 44),  # read error rate
    3: (0x0003, 21),  # spin-up time
    4: (0x0032, 20),  # start/stop count
    5: (0x0033, 10),  # reallocated sectors
    7: (0x000F, 30),  # seek error rate
    9: (0x0032, 0),  # power-on hours
    10: (0x0013, 97),  # spin retries
    12: (0x0032, 20),  # power cycles
    177: (0x0013, 5),  # wear levelling (solid state)
    187: (0x0032, 0),  # reported uncorrectable
    188: (0x0032, 0),  # command timeouts
    194: (0x0022, 0),  # temperature
    196: (0x0032, 0),  # reallocation events
    197: (0x0012, 0),  # pending sectors
    198: (0x0010, 0),  # offline uncorrectable
    199: (0x003E, 0),  # interface CRC errors
    241: (0x0032, 0),  # total LBAs written
}

NVME_DATA_UNIT_BYTES = 512_000  # NVMe Base Spec 2.0, log 02h: 1000 units of 512 bytes


@dataclass
class AtaReadings:
    """SMART tables of the drives of one model on one night (rows = ``rows`` of the night)."""

    rows: np.ndarray  # positions in the NightState
    ids: tuple[int, ...]
    flags: np.ndarray  # (attributes,)
    thresholds: np.ndarray  # (attributes,)
    value: np.ndarray  # (rows, attributes) int64
    worst: np.ndarray  # (rows, attributes) int64
    raw: np.ndarray  # (rows, attributes) int64, 48-bit

    def column(self, attribute_id: int, what: str = "raw") -> np.ndarray | None:
        if attribute_id not in self.ids:
            return None
        return getattr(self, what)[:, self.ids.index(attribute_id)]


def _clip(v) -> np.ndarray:
    return np.clip(np.asarray(v, dtype=np.int64), 1, 253)


def written_bytes(fleet: Fleet, state: NightState) -> np.ndarray:
    """Bytes written over the drive's life: its write load times power-on hours."""
    return fleet.arrays["write_bytes_per_hour"][state.drive] * state.power_on_hours


def percentage_used(fleet: Fleet, state: NightState) -> np.ndarray:
    used = np.floor(100.0 * written_bytes(fleet, state) / fleet.arrays["endurance_bytes"][state.drive])
    return used.astype(np.int64)


def ata_readings(fleet: Fleet, state: NightState, model_index: int) -> AtaReadings:
    """The SMART attribute table of every drive of ``model_index`` captured on this night."""
    model = fleet.spec.models[model_index]
    a = fleet.arrays
    rows = np.flatnonzero(a["model"][state.drive] == model_index)
    drv = state.drive[rows]
    cnt = state.counters[rows]
    poh = np.floor(state.power_on_hours[rows]).astype(np.int64)
    temp = state.temperature_c[rows]
    ids = model.smart_attributes
    n = len(rows)
    value = np.zeros((n, len(ids)), dtype=np.int64)
    worst = np.zeros_like(value)
    raw = np.zeros_like(value)

    def counter_value(c):
        return _clip(100 - c)

    used = percentage_used(fleet, state)[rows]
    for j, attr in enumerate(ids):
        if attr == 1:
            v, w, r = a["read_error_value"][drv], a["read_error_value"][drv] - a["const_worst_drop"][drv], 0
        elif attr == 3:
            v = a["spin_up_value"][drv]
            w, r = v - a["const_worst_drop"][drv], (4000 + 3000 * a["load"][drv]).astype(np.int64)
        elif attr == 4:
            r = cnt[:, C["power_cycles"]] + a["start_stop_extra"][drv]
            v = w = _clip(100 - r // 1000)
        elif attr == 5:
            r = cnt[:, C["reallocated_sectors"]]
            v = w = _clip(100 - (100 * r) // model.spare_pool)
        elif attr == 7:
            v, w, r = a["seek_error_value"][drv], a["seek_error_value"][drv] - a["const_worst_drop"][drv], 0
        elif attr == 9:
            minutes = np.floor((state.power_on_hours[rows] % 1.0) * 60).astype(np.int64)
            # Some drives keep extra counts above the low 32 bits (common practice, no source).
            r = np.where(a["poh_minute_byte"][drv], poh | (minutes << 32), poh)
            v = w = _clip(100 - poh // 877)
        elif attr == 10:
            r = cnt[:, C["spin_retries"]]
            v = w = counter_value(r)
        elif attr == 12:
            r = cnt[:, C["power_cycles"]]
            v = w = _clip(100 - r // 1000)
        elif attr == 177:
            r = np.floor(written_bytes(fleet, state)[rows] / model.user_capacity_bytes).astype(np.int64)
            v = w = _clip(100 - used)
        elif attr == 187:
            r = cnt[:, C["reported_uncorrectable"]]
            v = w = counter_value(r)
        elif attr == 188:
            r = cnt[:, C["command_timeouts"]]
            v = w = _clip(100 - r // 10)
        elif attr == 194:
            tmin, tmax = state.temperature_min_c[rows], state.temperature_max_c[rows]
            # current in the low byte, lowest and highest seen in bytes 2 and 4 (common practice)
            r = temp if model.name == "Marrow 4T" else temp | (tmin << 16) | (tmax << 32)
            v, w = _clip(100 - temp), _clip(100 - tmax)
        elif attr == 196:
            r = cnt[:, C["reallocation_events"]]
            v = w = counter_value(r)
        elif attr == 197:
            r = cnt[:, C["pending_sectors"]]
            v, w = counter_value(r), counter_value(state.pending_max[rows])
        elif attr == 198:
            r = cnt[:, C["offline_uncorrectable"]]
            v = w = counter_value(r)
        elif attr == 199:
            r = cnt[:, C["crc_errors"]]
            v = w = 200
        elif attr == 241:
            r = np.floor(written_bytes(fleet, state)[rows] / 512).astype(np.int64)
            v = w = 100
        else:  # pragma: no cover - catalog and table are edited together
            raise ValueError(f"no reading defined for attribute {attr}")
        value[:, j], worst[:, j], raw[:, j] = v, w, r
    flags = np.array([ATTRIBUTE_FLAGS_THRESHOLDS[i][0] for i in ids], dtype=np.int64)
    thresholds = np.array([ATTRIBUTE_FLAGS_THRESHOLDS[i][1] for i in ids], dtype=np.int64)
    return AtaReadings(rows, ids, flags, thresholds, value, np.minimum(worst, value), raw)


def nvme_readings(fleet: Fleet, state: NightState) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Rows of the night that are NVMe, and their log 02h fields (NvmeHealth names)."""
    a = fleet.arrays
    bus = np.array([m.bus for m in fleet.spec.models])
    rows = np.flatnonzero(bus[a["model"][state.drive]] == "nvme")
    drv = state.drive[rows]
    cnt = state.counters[rows]
    poh = state.power_on_hours[rows]
    temp_k = state.temperature_c[rows] + 273
    used = percentage_used(fleet, state)[rows]
    spare = np.clip(100 - used // 12 - cnt[:, C["spare_loss_pct"]], 0, 100)
    night = state.night
    warning = (
        np.where(spare < NVME_SPARE_THRESHOLD_PCT, 1 << 0, 0)
        | np.where(temp_k >= NVME_WARNING_TEMP_K, 1 << 1, 0)
        | np.where(night >= fleet.events["degraded_night"][drv], 1 << 2, 0)
        | np.where(night >= fleet.events["read_only_night"][drv], 1 << 3, 0)
    )
    written = written_bytes(fleet, state)[rows]
    units_written = np.ceil(written / NVME_DATA_UNIT_BYTES).astype(np.int64)  # the spec rounds up
    units_read = np.ceil(written * a["read_ratio"][drv] / NVME_DATA_UNIT_BYTES).astype(np.int64)
    fields = {
        "critical_warning": warning.astype(np.int64),
        "composite_temperature_k": temp_k.astype(np.int64),
        "available_spare_pct": spare.astype(np.int64),
        "spare_threshold_pct": np.full(len(rows), NVME_SPARE_THRESHOLD_PCT, dtype=np.int64),
        "percentage_used": np.minimum(used, 255),
        "data_units_read": units_read,
        "data_units_written": units_written,
        "host_read_commands": units_read * 12,
        "host_write_commands": units_written * 8,
        "controller_busy_minutes": np.floor(poh * 60 * a["busy_fraction"][drv]).astype(np.int64),
        "power_cycles": cnt[:, C["power_cycles"]],
        "power_on_hours": np.floor(poh).astype(np.int64),
        "unsafe_shutdowns": cnt[:, C["unsafe_shutdowns"]],
        "media_errors": cnt[:, C["media_errors"]],
        "error_log_entries": cnt[:, C["error_log_entries"]],
        "warning_temp_minutes": state.warning_temp_minutes[rows],
        "critical_temp_minutes": np.zeros(len(rows), dtype=np.int64),
    }
    return rows, fields
