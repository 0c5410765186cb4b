"""Simulate Quillmere Hosting's invented fleet, night by night, vectorised over drives.

The simulation has two parts:

* :func:`generate_fleet` decides everything about each drive's life up front: where it sits, its
  age on arrival, when it would fail (a Weibull draw conditional on having survived to its
  arrival age), whether the failure is announced by counters, when it leaves and why, and who
  replaces it. Counter growth is kept as a sparse list of ``(night, drive, counter, delta)``
  events plus a baseline per drive, so memory stays proportional to the drives, not to
  drives x nights.
* :meth:`Fleet.nights` replays the window: each night it applies that night's events and yields
  a :class:`NightState` with the dense arrays (power-on hours, temperature, counters) of the
  drives captured that night. The writer and the ground truth both read these states, so the
  files and the truth cannot drift apart.

Why some failures come without warning: in a large population study many failed drives showed
no SMART counts before failing (Pinheiro, Weber & Barroso, "Failure Trends in a Large Disk Drive
Population", FAST 2007: over half of the failed drives had no count in the four strongest
signals, and roughly a third none in any signal; figures from memory). We announce about 60 % of
failures (``FleetSpec.warned_fraction``) and let the rest vanish unannounced.

Same ``FleetSpec`` (seed included) -> same fleet: every random number comes from generators
seeded with ``(seed, stream)`` tuples; nothing reads global random state.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, timedelta, timezone
from typing import Iterator

import numpy as np
import pandas as pd

from triage.demo.catalog import (
    HOURS_PER_YEAR,
    MODELS,
    REMOVAL_NOTES,
    SITES,
    WWN_COMPANY_ID,
    DriveModel,
    Site,
)

#: Counters kept per drive. ATA ones map to SMART attribute raw values, NVMe ones to log 02h.
COUNTERS = (
    "reallocated_sectors",  # ATA 5
    "reallocation_events",  # ATA 196
    "pending_sectors",  # ATA 197
    "offline_uncorrectable",  # ATA 198
    "reported_uncorrectable",  # ATA 187
    "command_timeouts",  # ATA 188
    "crc_errors",  # ATA 199
    "spin_retries",  # ATA 10
    "media_errors",  # NVMe
    "error_log_entries",  # NVMe
    "spare_loss_pct",  # NVMe: available spare lost to a failing drive's retirements
    "power_cycles",  # ATA 12 / NVMe
    "unsafe_shutdowns",  # NVMe
)
C = {name: i for i, name in enumerate(COUNTERS)}

# Failure announcement modes (what grows in the weeks before a warned failure).
MODE_NONE, MODE_MEDIA, MODE_MECHANICAL, MODE_SSD, MODE_NVME = 0, 1, 2, 3, 4

#: NVMe invented warning composite temperature threshold (WCTEMP), kelvin: 70 C.
NVME_WARNING_TEMP_K = 343
NVME_SPARE_THRESHOLD_PCT = 10
SECOND_US = 1_000_000
HOUR_US = 3600 * SECOND_US
#: Announced failures and pulls look this far past the window (their warnings start inside it).
LOOKAHEAD_DAYS = 60


@dataclass(frozen=True)
class FleetSpec:
    """What to simulate. Every field has a working default; ``seed`` decides all the rest."""

    seed: int = 14
    n_drives: int = 1200  # drives installed at the start, rounded up to whole hosts
    days: int = 120  # nightly captures
    start: date = date(2026, 8, 1)  # first capture night (local date)
    sites: tuple[Site, ...] = SITES
    models: tuple[DriveModel, ...] = MODELS
    warned_fraction: float = 0.6  # failures preceded by counter growth (Pinheiro et al. 2007)
    proactive_fraction: float = 0.2  # announced failures pulled before they fail
    background_fraction: float = 0.06  # healthy ATA drives with a few benign media events
    false_alarm_fraction: float = 0.05  # of those, pulled on warning although healthy
    retired_fraction: float = 0.01  # drives retired healthy during the window
    unreplaced_fraction: float = 0.1  # failed drives left without a replacement
    bad_cable_fraction: float = 0.015  # slots whose cable/backplane adds CRC errors
    missed_capture_rate: float = 0.002  # a drive missing from one night's capture
    host_outage_fraction: float = 0.05  # hosts powered off for 1-3 nights (maintenance)
    hosts_without_thresholds: int = 1  # hosts whose collector sends no thresholds sector
    bad_lines: int = 0  # invalid lines appended to the capture files (for demos and tests)

    def __post_init__(self) -> None:
        if self.n_drives < 1:
            raise ValueError(f"n_drives must be at least 1, got {self.n_drives}")
        if self.days < 1:
            raise ValueError(f"days must be at least 1, got {self.days}")
        if not self.sites or not self.models:
            raise ValueError("a fleet needs at least one site and one drive model")
        if self.bad_lines < 0:
            raise ValueError(f"bad_lines must be >= 0, got {self.bad_lines}")
        for name in ("warned_fraction", "proactive_fraction", "background_fraction",
                     "false_alarm_fraction", "retired_fraction", "unreplaced_fraction",
                     "bad_cable_fraction", "missed_capture_rate", "host_outage_fraction"):
            value = getattr(self, name)
            if not 0.0 <= value <= 1.0:
                raise ValueError(f"{name} must be between 0 and 1, got {value}")


@dataclass
class NightState:
    """The drives captured on one night and their state, one array element per drive.

    ``drive`` indexes the fleet's drive arrays; rows are ordered by site, host and slot.
    """

    night: int
    day: date  # local capture date (the same at every site: collectors run 02:00-03:00)
    drive: np.ndarray  # int64 drive indices
    taken_at_us: np.ndarray  # int64 UTC microseconds since the Unix epoch
    power_on_hours: np.ndarray  # float64, exact; reported values are floored
    temperature_c: np.ndarray  # int64
    temperature_min_c: np.ndarray  # int64, lowest seen so far
    temperature_max_c: np.ndarray  # int64, highest seen so far
    pending_max: np.ndarray  # int64, most pending sectors seen so far (drives the worst value)
    counters: np.ndarray  # int64, shape (n, len(COUNTERS))
    warning_temp_minutes: np.ndarray  # int64 (NVMe)

    def __len__(self) -> int:
        return len(self.drive)


@dataclass
class Fleet:
    """A generated fleet: static facts per host, slot and drive, plus the event lists.

    Per-night states come from :meth:`nights`. Array attributes are indexed by drive (``d_*``),
    slot (``s_*``) or host (``h_*``).
    """

    spec: FleetSpec
    t0_us: int  # window start: the start date 00:00 UTC, microseconds since the epoch
    hosts: pd.DataFrame  # host, site, model, slots, outage_start/end (hours), thresholds
    slots: pd.DataFrame  # host, slot, device, group, position, bad_cable
    groups: pd.DataFrame  # group, host, site, layout, tolerance, members, missing_at_end
    drives: pd.DataFrame  # one row per drive (static facts and lifecycle)
    removals: pd.DataFrame  # serial, removed_at, reason, note (within the window)
    host_base_us: np.ndarray  # (days, hosts) int64: when each host's collector starts
    host_off: np.ndarray  # (days, hosts) bool: host powered off that night
    host_heat_c: np.ndarray  # (days, hosts) float: extra heat (a cooling fault)
    events: dict[str, np.ndarray]  # night, drive, counter, delta (sorted by night)
    baseline: np.ndarray  # (drives, len(COUNTERS)) int64: counters at arrival
    arrays: dict[str, np.ndarray] = field(repr=False)  # per-drive numeric arrays used nightly

    @property
    def window_end_us(self) -> int:
        return self.t0_us + self.spec.days * 24 * HOUR_US

    def nights(self) -> Iterator[NightState]:
        """Replay the window, one :class:`NightState` per capture night, in order."""
        return _replay(self)


# --------------------------------------------------------------------------------------------
# Hazard


def draw_failure_ages(
    shape: float | np.ndarray,
    scale: float | np.ndarray,
    entry_age: float | np.ndarray,
    rng: np.random.Generator,
    size: int | None = None,
) -> np.ndarray:
    """Failure ages (power-on hours) from a Weibull, conditional on surviving to ``entry_age``.

    Left truncation: a drive that joins the fleet at age a0 is a survivor, so its failure age
    follows ``S(a) / S(a0)`` for a > a0. With ``S(a) = exp(-(a / eta) ** k)`` the cumulative
    hazard ``H(a) = (a / eta) ** k`` of the failure age minus ``H(a0)`` is Exp(1), hence
    ``a = eta * ((a0 / eta) ** k + E) ** (1 / k)`` with ``E ~ Exp(1)`` (inverse transform of the
    conditional survival; Klein & Moeschberger, "Survival Analysis", 2nd ed., 3.4 on left
    truncation, from memory).
    """
    shape = np.asarray(shape, dtype=float)
    scale = np.asarray(scale, dtype=float)
    entry_age = np.asarray(entry_age, dtype=float)
    if size is None:
        size = np.broadcast(shape, scale, entry_age).shape
    e = rng.standard_exponential(size)
    return scale * ((entry_age / scale) ** shape + e) ** (1.0 / shape)


def hazard_scale(model: DriveModel, firmware_index: np.ndarray) -> np.ndarray:
    """Weibull scale with the firmware's hazard ratio folded in: ``eta * r ** (-1 / k)``."""
    ratios = np.asarray(model.firmware_hazard_ratios, dtype=float)[firmware_index]
    return model.weibull_scale_hours * ratios ** (-1.0 / model.weibull_shape)


# --------------------------------------------------------------------------------------------
# Layout: sites, hosts, slots, redundancy groups


def _device_name(bus: str, position: int) -> str:
    if bus == "nvme":
        return f"/dev/nvme{position}"
    letters, n = "", position
    while True:  # sda..sdz, sdaa.. (the kernel's scheme)
        letters = chr(ord("a") + n % 26) + letters
        n = n // 26 - 1
        if n < 0:
            return f"/dev/sd{letters}"


def _layout(spec: FleetSpec, rng: np.random.Generator):
    site_w = np.array([s.weight for s in spec.sites], float)
    model_w = np.array([m.host_weight for m in spec.models], float)
    hosts, slots, groups = [], [], []
    per_site = [0] * len(spec.sites)
    total = 0
    while total < spec.n_drives:
        site = int(rng.choice(len(spec.sites), p=site_w / site_w.sum()))
        model = int(rng.choice(len(spec.models), p=model_w / model_w.sum()))
        m = spec.models[model]
        n_slots = int(rng.choice(m.slots_per_host, p=np.array(m.slot_weights) / sum(m.slot_weights)))
        per_site[site] += 1
        host = f"{spec.sites[site].name}-st{per_site[site]:02d}"
        h = len(hosts)
        hosts.append((host, site, model, n_slots))
        if m.kind == "hdd":  # double-parity groups of 8-12; leftover bays are ungrouped spares
            size, tolerance, layout = int(rng.choice([8, 10, 12])), 2, "double-parity"
        else:  # solid state in mirrored pairs
            size, tolerance, layout = 2, 1, "mirror"
        n_groups = n_slots // size
        for g in range(n_groups):
            groups.append((f"{host}-g{g + 1}", host, spec.sites[site].name, layout, tolerance, size))
        for pos in range(n_slots):
            g = pos // size
            group = f"{host}-g{g + 1}" if g < n_groups else None
            slots.append((h, f"bay{pos + 1:02d}", _device_name(m.bus, pos), group, pos))
        total += n_slots
    hosts = pd.DataFrame(hosts, columns=["host", "site", "model", "slots"])
    slots = pd.DataFrame(slots, columns=["host_index", "slot", "device", "group", "position"])
    groups = pd.DataFrame(groups, columns=["group", "host", "site", "layout", "tolerance", "members"])
    return hosts, slots, groups


# --------------------------------------------------------------------------------------------
# Generation


def generate_fleet(spec: FleetSpec) -> Fleet:
    """Decide the whole fleet for ``spec`` (in memory; pure: no files, no global state)."""
    rng = np.random.default_rng([spec.seed, 1])
    days = spec.days
    T = days * 24.0  # window length, hours
    t0 = datetime(spec.start.year, spec.start.month, spec.start.day, tzinfo=timezone.utc)
    t0_us = int(t0.timestamp()) * SECOND_US

    hosts, slots, groups = _layout(spec, rng)
    n_hosts = len(hosts)
    site_of_host = hosts["site"].to_numpy()
    offset_min = np.array([s.utc_offset_minutes for s in spec.sites])[site_of_host]
    subsecond = np.array([s.subsecond for s in spec.sites])[site_of_host]

    # Collector start: 02:00 local plus up to an hour, every night, per host.
    start_local = 2 * HOUR_US + rng.integers(0, HOUR_US, size=(days, n_hosts))
    start_local = np.where(subsecond, start_local // 1000 * 1000, start_local // SECOND_US * SECOND_US)
    night_us = (np.arange(days, dtype=np.int64) * 24 * HOUR_US)[:, None]
    host_base_us = t0_us + night_us + start_local - offset_min[None, :] * 60 * SECOND_US
    base_hours = (host_base_us - t0_us) / HOUR_US

    # Maintenance: a few hosts powered off for 1-3 nights; no captures, power-on hours pause.
    outage = rng.random(n_hosts) < spec.host_outage_fraction
    outage &= days >= 8
    off_start = np.full(n_hosts, np.inf)
    off_end = np.full(n_hosts, np.inf)
    off_night = np.full(n_hosts, -1)
    off_len = np.zeros(n_hosts, dtype=int)
    hard_off = rng.random(n_hosts) < 0.4  # power pulled: NVMe counts an unsafe shutdown
    for h in np.flatnonzero(outage):
        d0 = int(rng.integers(3, days - 4))
        length = int(rng.integers(1, 4))
        off_night[h], off_len[h] = d0, length
        off_start[h] = base_hours[d0, h] - 10.0
        off_end[h] = base_hours[d0 + length - 1, h] + 6.0
    host_off = (base_hours >= off_start[None, :]) & (base_hours < off_end[None, :])

    # One host's collector sends no thresholds sector (an older collector build).
    thresholds = np.ones(n_hosts, dtype=bool)
    ata_hosts = np.flatnonzero([spec.models[m].bus == "ata" for m in hosts["model"]])
    k = min(spec.hosts_without_thresholds, len(ata_hosts))
    if k:
        thresholds[rng.choice(ata_hosts, size=k, replace=False)] = False

    # A cooling fault: one solid-state host (at birch if there is one) runs hot for 2 nights.
    host_heat = np.zeros((days, n_hosts))
    nvme_hosts = np.flatnonzero([spec.models[m].bus == "nvme" for m in hosts["model"]])
    if len(nvme_hosts) and days >= 6:
        at_birch = [h for h in nvme_hosts if spec.sites[site_of_host[h]].name == "birch"]
        h = int(rng.choice(at_birch if at_birch else nvme_hosts))
        d0 = int(rng.integers(2, days - 3))
        host_heat[d0 : d0 + 2, h] = 24.0

    hosts["outage_start_h"] = off_start
    hosts["outage_end_h"] = off_end
    hosts["thresholds"] = thresholds
    hosts["site_name"] = [spec.sites[s].name for s in site_of_host]
    hosts["utc_offset_minutes"] = offset_min
    hosts["subsecond"] = subsecond

    # Bad cables / backplane bays: CRC errors climb for whoever sits in the slot.
    n_slots = len(slots)
    slots["bad_cable"] = rng.random(n_slots) < spec.bad_cable_fraction
    slots["cable_onset_night"] = rng.integers(-30, max(days, 1), size=n_slots)
    slots["cable_rate"] = np.exp(rng.uniform(np.log(0.2), np.log(10.0), size=n_slots))
    slot_host = slots["host_index"].to_numpy()
    slot_model = hosts["model"].to_numpy()[slot_host]

    # -- drives, generation by generation (replacements of replacements...) -----------------
    cols: dict[str, list[np.ndarray]] = {}

    def append(**arrays):
        for key, value in arrays.items():
            cols.setdefault(key, []).append(np.asarray(value))

    first = np.arange(n_slots)
    gen_slot = first
    gen_te = np.zeros(n_slots)
    gen_new = None  # the first population: ages by model
    generation = 0
    while len(gen_slot):
        n = len(gen_slot)
        model = slot_model[gen_slot]
        host = slot_host[gen_slot]
        a0 = np.empty(n)
        fw = np.empty(n, dtype=np.int64)
        shape = np.empty(n)
        scale = np.empty(n)
        for mi, m in enumerate(spec.models):
            sel = np.flatnonzero(model == mi)
            if not len(sel):
                continue
            weights = np.array(m.firmware_weights) / sum(m.firmware_weights)
            if gen_new is None:
                lo, hi = m.entry_age_years
                used = rng.uniform(lo, hi, len(sel)) * HOURS_PER_YEAR
                fresh = rng.uniform(0.0, 48.0, len(sel))  # factory burn-in hours
                a0[sel] = np.where(rng.random(len(sel)) < m.new_fraction, fresh, used)
                fw[sel] = rng.choice(len(m.firmwares), size=len(sel), p=weights)
            else:  # replacements arrive new, mostly on the current firmware
                a0[sel] = rng.uniform(0.0, 30.0, len(sel))
                newest = len(m.firmwares) - 1
                fw[sel] = np.where(rng.random(len(sel)) < 0.8, newest,
                                   rng.choice(len(m.firmwares), size=len(sel), p=weights))
            shape[sel] = m.weibull_shape
            scale[sel] = hazard_scale(m, fw[sel])
        failure_age = draw_failure_ages(shape, scale, a0, rng)
        t_fail = _time_at_powered_hours(gen_te, failure_age - a0, off_start[host], off_end[host])

        kind = np.array([spec.models[mi].kind for mi in model])
        warned = rng.random(n) < spec.warned_fraction
        mode = np.where(~warned, MODE_NONE,
                        np.where(kind == "nvme", MODE_NVME,
                                 np.where(kind == "ssd", MODE_SSD,
                                          np.where(rng.random(n) < 0.7, MODE_MEDIA, MODE_MECHANICAL))))
        lead_days = np.select(
            [mode == MODE_MEDIA, mode == MODE_MECHANICAL, mode == MODE_SSD, mode == MODE_NVME],
            [rng.uniform(14, 56, n), rng.uniform(5, 30, n), rng.uniform(10, 40, n), rng.uniform(10, 45, n)],
            default=0.0,
        )
        onset = np.where(warned, t_fail - 24.0 * lead_days, np.inf)
        near = t_fail < T + 24.0 * LOOKAHEAD_DAYS  # its warning (if any) may show in the window

        # Ops pull some announced failures before they happen.
        pull = np.full(n, np.inf)
        pulled = warned & near & (rng.random(n) < spec.proactive_fraction)
        lead = np.where(warned, t_fail - onset, 0.0)
        when = np.maximum(np.where(warned, onset, t_fail) + rng.uniform(0.4, 0.9, n) * lead, gen_te + 24.0)
        ok = pulled & (when < t_fail) & (when < T)
        pull[ok] = when[ok]

        # Healthy drives with a few benign media events; a few of them get pulled anyway.
        background = (kind != "nvme") & ~near & (rng.random(n) < spec.background_fraction)
        bg_first = np.where(background, gen_te + rng.random(n) * np.maximum(T - gen_te, 0.0), np.inf)
        false_alarm = np.full(n, np.inf)
        fa = background & (rng.random(n) < spec.false_alarm_fraction)
        when = bg_first + 24.0 * rng.uniform(2, 10, n)
        false_alarm[fa & (when < T)] = when[fa & (when < T)]

        retire = np.full(n, np.inf)
        if gen_new is None:  # the oldest disks are the likeliest to be retired
            weight = np.where(np.array([spec.models[mi].weibull_shape > 1.5 and spec.models[mi].kind == "hdd"
                                        for mi in model]), 4.0, 1.0)
            chosen = rng.random(n) < np.minimum(1.0, spec.retired_fraction * weight)
            retire[chosen] = rng.uniform(0.05, 0.95, chosen.sum()) * T

        candidates = np.stack([t_fail, pull, false_alarm, retire])
        which = np.argmin(candidates, axis=0)
        exit_t = candidates[which, np.arange(n)]
        reason = np.array(["failed", "proactive", "proactive", "retired"], dtype=object)[which]
        inside = exit_t < T
        exit_t = np.where(inside, exit_t, np.inf)
        reason = np.where(inside, reason, None)
        failed = reason == "failed"
        removed = np.where(failed, exit_t + 24.0 * rng.uniform(0.5, 5.0, n), exit_t)
        note_pick = rng.random(n)

        # Replacements go into the same slot: at the removal visit, or a little later.
        replace = np.isfinite(removed) & (removed < T)
        replace &= ~(failed & (rng.random(n) < spec.unreplaced_fraction))
        install = removed + np.where(failed & (rng.random(n) < 0.3), 24.0 * rng.uniform(0.1, 2.0, n), 0.0)
        if generation == 0:
            # Leave at least one redundancy group degraded at the end of the window: the last
            # failure in a grouped slot waits for parts.
            grouped = slots["group"].to_numpy()[gen_slot] != None  # noqa: E711 (object array)
            candidates_deg = np.flatnonzero(failed & grouped)
            if len(candidates_deg):
                replace[candidates_deg[np.argmax(exit_t[candidates_deg])]] = False
        replace &= install < T - 1.0

        append(
            slot=gen_slot, model=model, host=host, firmware=fw, entry_t=gen_te, entry_age=a0,
            failure_age=failure_age, t_fail=t_fail, warned=warned, mode=mode, onset=onset,
            exit_t=exit_t, reason=reason, removed=removed, bg_first=bg_first,
            generation=np.full(n, generation), note_pick=note_pick,
        )
        gen_slot = gen_slot[replace]
        gen_te = install[replace]
        gen_new = False
        generation += 1

    d = {key: np.concatenate(parts) for key, parts in cols.items()}
    n = len(d["slot"])

    serial, wwn = _identities(spec, d["model"], rng)
    arrays = _static_arrays(spec, d, hosts, rng)
    baseline = _baselines(spec, d, arrays, rng)
    events = _events(spec, d, slots, hosts, off_night, off_len, hard_off, rng)

    site_idx = site_of_host[d["host"]]
    drives = pd.DataFrame({
        "serial": serial,
        "model": [spec.models[m].name for m in d["model"]],
        "firmware": [spec.models[m].firmwares[f] for m, f in zip(d["model"], d["firmware"])],
        "bus": [spec.models[m].bus for m in d["model"]],
        "user_capacity_bytes": np.array([spec.models[m].user_capacity_bytes for m in d["model"]], dtype=np.int64),
        "site": [spec.sites[s].name for s in site_idx],
        "host": hosts["host"].to_numpy()[d["host"]],
        "slot": slots["slot"].to_numpy()[d["slot"]],
        "group": slots["group"].to_numpy()[d["slot"]],
        "device": slots["device"].to_numpy()[d["slot"]],
        "wwn": wwn,
        "entry_time": _to_time(t0_us, d["entry_t"]),
        "entry_age_hours": d["entry_age"],
        "failure_age_hours": d["failure_age"],  # latent; observed only when failed
        "failed": d["reason"] == "failed",
        "failure_time": _to_time(t0_us, np.where(d["reason"] == "failed", d["t_fail"], np.inf)),
        "warned": d["warned"] & (d["t_fail"] < T + 24.0 * LOOKAHEAD_DAYS),
        "warning_onset": _to_time(t0_us, np.where(d["warned"] & (d["t_fail"] < T + 24.0 * LOOKAHEAD_DAYS),
                                                  d["onset"], np.inf)),
        "exit_time": _to_time(t0_us, d["exit_t"]),
        "exit_reason": d["reason"],
        "removed_at": _to_time(t0_us, np.where(d["removed"] < T, d["removed"], np.inf)).dt.floor("s"),
        "generation": d["generation"],
    })
    removals = _removals(spec, drives, d)
    groups["missing_at_end"] = _missing_at_end(groups, slots, d, T)
    slots_out = slots.assign(host=hosts["host"].to_numpy()[slot_host])
    return Fleet(
        spec=spec, t0_us=t0_us, hosts=hosts, slots=slots_out, groups=groups, drives=drives,
        removals=removals, host_base_us=host_base_us, host_off=host_off, host_heat_c=host_heat,
        events=events, baseline=baseline, arrays={**arrays, **{k: d[k] for k in (
            "slot", "model", "host", "firmware", "entry_t", "entry_age", "exit_t", "mode", "t_fail")}},
    )


def _time_at_powered_hours(te, powered, off_start, off_end):
    """Fleet time (hours) at which a drive installed at ``te`` has run ``powered`` more hours.

    Power-on hours stop while its host is off (at most one outage per host).
    """
    t = te + powered
    s = np.maximum(te, off_start)
    has_outage = np.isfinite(off_end)
    end = np.where(has_outage, off_end, 0.0)
    gap = np.where(has_outage, np.maximum(end - np.where(has_outage, s, 0.0), 0.0), 0.0)
    return np.where(t > s, t + gap, t)


def _powered_hours(te, t, off_start, off_end):
    """Hours a drive installed at ``te`` has been powered on by fleet time ``t``."""
    overlap = np.minimum(t, off_end) - np.maximum(te, off_start)
    overlap = np.where(np.isfinite(off_start), np.clip(overlap, 0.0, None), 0.0)
    return (t - te) - overlap


def _to_time(t0_us: int, hours: np.ndarray) -> pd.Series:
    hours = np.asarray(hours, dtype=float)
    finite = np.isfinite(hours)
    us = np.where(finite, np.round(np.where(finite, hours, 0.0) * HOUR_US), 0).astype(np.int64) + t0_us
    out = pd.Series(us.astype("datetime64[us]")).dt.tz_localize("UTC")
    return out.where(finite)


def _identities(spec: FleetSpec, model: np.ndarray, rng: np.random.Generator):
    """Invented serials (unique; never a real vendor's format) and NAA-5 WWNs."""
    n = len(model)
    serial = np.empty(n, dtype=object)
    wwn = np.full(n, None, dtype=object)
    digits36 = "0123456789ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    for mi, m in enumerate(spec.models):
        sel = np.flatnonzero(model == mi)
        if not len(sel):
            continue
        base = {"digits": 10, "base36": 36, "hex": 16}[m.serial_style]
        space = base ** m.serial_length
        # strictly increasing numbers with random gaps, then shuffled: unique without a set
        numbers = space // 7 + np.cumsum(rng.integers(1, 4000, len(sel)))
        numbers = numbers[rng.permutation(len(sel))]
        alphabet = digits36[:base]
        for i, number in zip(sel, numbers.tolist()):
            chars = []
            for _ in range(m.serial_length):
                number, r = divmod(number, base)
                chars.append(alphabet[r])
            serial[i] = m.serial_prefix + "".join(reversed(chars))
        if m.has_wwn:
            vendor = (mi << 32) + np.cumsum(rng.integers(1, 5000, len(sel)))
            vendor = vendor[rng.permutation(len(sel))]
            for i, v in zip(sel, vendor.tolist()):
                wwn[i] = f"{(5 << 60) | (WWN_COMPANY_ID << 36) | v:016x}"
    return serial, wwn


def _static_arrays(spec, d, hosts, rng):
    """Per-drive numbers that shape the nightly readings."""
    n = len(d["slot"])
    models = spec.models
    load = rng.random(n)
    temp_base = (
        np.array([spec.sites[s].ambient_c for s in hosts["site"].to_numpy()[d["host"]]])
        + np.array([models[m].temp_offset_c for m in d["model"]])
        + rng.normal(0.0, 1.5, n)  # airflow differs bay to bay
        + 3.0 * load
    )
    capacity = np.array([models[m].user_capacity_bytes for m in d["model"]], float)
    lo = np.array([models[m].write_dwpd[0] for m in d["model"]])
    hi = np.array([models[m].write_dwpd[1] for m in d["model"]])
    dwpd = np.exp(rng.uniform(np.log(np.maximum(lo, 1e-6)), np.log(np.maximum(hi, 1e-6))))
    write_bytes_per_hour = np.where(hi > 0, capacity * dwpd / 24.0, 0.0)
    endurance = np.array([max(models[m].endurance_bytes, 1.0) for m in d["model"]])
    return {
        "load": load,
        "temp_base": temp_base,
        "write_bytes_per_hour": write_bytes_per_hour,
        "read_ratio": rng.uniform(1.2, 4.0, n),
        "busy_fraction": 0.02 + 0.2 * load,
        "endurance_bytes": endurance,
        "start_stop_extra": rng.poisson(d["entry_age"] / (24 * 20.0)),
        "read_error_value": rng.integers(75, 85, n),
        "seek_error_value": rng.integers(80, 91, n),
        "spin_up_value": rng.integers(90, 98, n),
        "const_worst_drop": rng.integers(0, 6, n),
        "temp_min0": np.round(temp_base - rng.uniform(4, 10, n)).astype(np.int64),
        "temp_max0": np.round(temp_base + rng.uniform(3, 9, n)).astype(np.int64),
        "warn_minutes0": np.where(rng.random(n) < 0.05, rng.integers(1, 200, n), 0),
        "poh_minute_byte": np.array([models[m].name == "Tallow 14T" for m in d["model"]]),
    }


def _baselines(spec, d, arrays, rng):
    """Counters as they stand when a drive arrives (used drives bring a history)."""
    n = len(d["slot"])
    a0 = d["entry_age"]
    used = a0 > 100.0
    ata = np.array([spec.models[m].bus == "ata" for m in d["model"]])
    b = np.zeros((n, len(COUNTERS)), dtype=np.int64)
    has_realloc = ata & used & (rng.random(n) < 0.08)
    realloc = np.where(has_realloc, rng.geometric(0.05, n), 0)
    b[:, C["reallocated_sectors"]] = realloc
    b[:, C["reallocation_events"]] = np.ceil(realloc / rng.uniform(2, 8, n)).astype(np.int64)
    b[:, C["reported_uncorrectable"]] = np.where(ata & used & (rng.random(n) < 0.03),
                                                 rng.integers(1, 20, n), 0)
    b[:, C["command_timeouts"]] = np.where(ata & used & (rng.random(n) < 0.04), rng.integers(1, 12, n), 0)
    b[:, C["crc_errors"]] = np.where(ata & used & (rng.random(n) < 0.03), rng.integers(1, 50, n), 0)
    b[:, C["power_cycles"]] = 1 + rng.poisson(a0 / (24 * 60.0))
    b[:, C["unsafe_shutdowns"]] = np.where(~ata, rng.poisson(a0 / (24 * 400.0)), 0)
    b[:, C["error_log_entries"]] = np.where(~ata & (rng.random(n) < 0.3), rng.poisson(a0 / (24 * 30.0)), 0)
    return b


class _EventList:
    def __init__(self) -> None:
        self.parts: list[tuple[np.ndarray, np.ndarray, int, np.ndarray]] = []

    def add(self, drive, night, counter: str, delta) -> None:
        drive = np.asarray(drive, dtype=np.int64)
        if not len(drive):
            return
        night = np.floor(np.asarray(night, dtype=float)).astype(np.int64)
        delta = np.broadcast_to(np.asarray(delta, dtype=np.int64), drive.shape)
        self.parts.append((drive, night, C[counter], delta))

    def finish(self, days: int) -> dict[str, np.ndarray]:
        if not self.parts:
            empty = np.zeros(0, dtype=np.int64)
            return {"night": empty, "drive": empty, "counter": empty, "delta": empty}
        drive = np.concatenate([p[0] for p in self.parts])
        night = np.concatenate([p[1] for p in self.parts])
        counter = np.concatenate([np.full(len(p[0]), p[2]) for p in self.parts])
        delta = np.concatenate([p[3] for p in self.parts])
        keep = (night < days) & (delta != 0)
        night = np.maximum(night[keep], -1)  # -1: before the window, part of the arrival state
        order = np.argsort(night, kind="stable")
        return {"night": night[order], "drive": drive[keep][order],
                "counter": counter[keep][order], "delta": delta[keep][order]}


def _episodes(rng, drives, lo, hi, counts, bias=1.0):
    """``counts[i]`` event nights for each drive, between ``lo[i]`` and ``hi[i]`` (nights).

    ``bias`` > 1 crowds them towards ``hi`` (``u ** (1 / bias)``): trouble accelerates.
    """
    rep = np.repeat(np.arange(len(drives)), counts)
    u = rng.random(len(rep)) ** (1.0 / bias)
    nights = lo[rep] + (hi[rep] - lo[rep]) * u
    return drives[rep], nights, rep


def _events(spec, d, slots, hosts, off_night, off_len, hard_off, rng) -> dict[str, np.ndarray]:
    """The sparse counter events of the whole window."""
    days = spec.days
    ev = _EventList()
    n = len(d["slot"])
    to_night = 1.0 / 24.0
    te_n = d["entry_t"] * to_night
    fail_n = d["t_fail"] * to_night
    onset_n = d["onset"] * to_night
    life_end_n = np.minimum(np.minimum(d["exit_t"], d["t_fail"]), days * 24.0) * to_night
    pool = np.array([spec.models[m].spare_pool for m in d["model"]])
    horizon = days + LOOKAHEAD_DAYS
    far = fail_n >= horizon  # no failure in sight: free for benign noise
    # Announced trouble shows by the last capture before the failure: events end a night early.
    fail_n = np.maximum(fail_n - 1.0, onset_n)

    # -- announced failures: ATA media (pending -> reallocated, uncorrectables) -------------
    idx = np.flatnonzero((d["mode"] == MODE_MEDIA) & (fail_n < horizon))
    k = 2 + rng.poisson(5, len(idx))
    drv, nights, _ = _episodes(rng, idx, onset_n[idx], fail_n[idx], k, bias=2.0)
    p = 1 + rng.geometric(0.2, len(drv))
    ev.add(drv, nights, "pending_sectors", p)
    ev.add(drv, nights, "reported_uncorrectable", rng.binomial(p, 0.5))
    ev.add(drv, nights, "offline_uncorrectable", rng.binomial(p, 0.3))
    resolved = rng.random(len(drv)) < 0.75
    later = nights + 1 + rng.integers(0, 6, len(drv))
    ev.add(drv[resolved], later[resolved], "pending_sectors", -p[resolved])
    ev.add(drv[resolved], later[resolved], "reallocated_sectors", p[resolved])
    ev.add(drv[resolved], later[resolved], "reallocation_events", 1)
    # a third run out of spare sectors: attribute 5 falls to its threshold before the end
    burst = idx[rng.random(len(idx)) < 0.35]
    at = fail_n[burst] - rng.uniform(1, 8, len(burst))
    ev.add(burst, at, "reallocated_sectors", np.ceil(0.93 * pool[burst]).astype(np.int64))
    ev.add(burst, at, "reallocation_events", 3)

    # -- announced failures: ATA mechanical (spin retries, command timeouts) -------------------
    idx = np.flatnonzero((d["mode"] == MODE_MECHANICAL) & (fail_n < horizon))
    drv, nights, _ = _episodes(rng, idx, onset_n[idx], fail_n[idx], 1 + rng.poisson(3, len(idx)), bias=1.5)
    ev.add(drv, nights, "spin_retries", 1)
    drv, nights, _ = _episodes(rng, idx, onset_n[idx], fail_n[idx], 2 + rng.poisson(4, len(idx)), bias=1.5)
    ev.add(drv, nights, "command_timeouts", 1 + rng.poisson(6, len(drv)))

    # -- announced failures: ATA solid state (retired blocks, uncorrectables) ----------------
    idx = np.flatnonzero((d["mode"] == MODE_SSD) & (fail_n < horizon))
    drv, nights, _ = _episodes(rng, idx, onset_n[idx], fail_n[idx], 2 + rng.poisson(4, len(idx)), bias=2.0)
    ev.add(drv, nights, "reallocated_sectors", rng.integers(1, 4, len(drv)))
    ev.add(drv, nights, "reported_uncorrectable", rng.poisson(2, len(drv)))
    burst = idx[rng.random(len(idx)) < 0.3]
    ev.add(burst, fail_n[burst] - rng.uniform(1, 6, len(burst)), "reallocated_sectors",
           np.ceil(0.93 * pool[burst]).astype(np.int64))

    # -- announced failures: NVMe (media errors; spare collapse; degraded / read-only) -----------
    idx = np.flatnonzero((d["mode"] == MODE_NVME) & (fail_n < horizon))
    drv, nights, _ = _episodes(rng, idx, onset_n[idx], fail_n[idx], 3 + rng.poisson(8, len(idx)), bias=2.0)
    media = 1 + rng.geometric(0.15, len(drv))
    ev.add(drv, nights, "media_errors", media)
    ev.add(drv, nights, "error_log_entries", media + rng.poisson(1, len(drv)))
    spare = idx[rng.random(len(idx)) < 0.55]
    start = fail_n[spare] - rng.uniform(2, 12, len(spare))
    steps = rng.integers(3, 6, len(spare))
    drv, nights, rep = _episodes(rng, spare, start, fail_n[spare], steps)
    total = 100 - rng.integers(1, NVME_SPARE_THRESHOLD_PCT, len(spare))  # ends below threshold
    ev.add(drv, nights, "spare_loss_pct", np.ceil(total[rep] / steps[rep]).astype(np.int64))
    degraded_n = np.full(n, np.inf)
    readonly_n = np.full(n, np.inf)
    degraded_n[spare] = start
    others = np.setdiff1d(idx, spare)
    chosen = others[rng.random(len(others)) < 0.4]
    degraded_n[chosen] = fail_n[chosen] - rng.uniform(1, 5, len(chosen))
    ro = spare[rng.random(len(spare)) < 0.25]
    readonly_n[ro] = fail_n[ro] - 1.0

    # -- healthy drives: benign media events (ATA) ---------------------------------------------
    idx = np.flatnonzero(np.isfinite(d["bg_first"]))
    first_n = d["bg_first"][idx] * to_night
    k = rng.poisson(0.8, len(idx))
    drv_first = idx
    drv_more, nights_more, _ = _episodes(rng, idx, first_n, np.full(len(idx), float(days)), k)
    drv = np.concatenate([drv_first, drv_more])
    nights = np.concatenate([first_n, nights_more])
    p = 1 + rng.geometric(0.4, len(drv))
    ev.add(drv, nights, "pending_sectors", p)
    outcome = rng.random(len(drv))  # 55 % reallocated, 30 % cleared by a rewrite, 15 % stay
    later = nights + 1 + rng.integers(0, 4, len(drv))
    realloc = outcome < 0.55
    cleared = (outcome >= 0.55) & (outcome < 0.85)
    ev.add(drv[realloc | cleared], later[realloc | cleared], "pending_sectors", -p[realloc | cleared])
    ev.add(drv[realloc], later[realloc], "reallocated_sectors", p[realloc])
    ev.add(drv[realloc], later[realloc], "reallocation_events", 1)

    ata = np.array([spec.models[m].bus == "ata" for m in d["model"]])
    nvme = ~ata
    healthy_life = np.maximum(life_end_n - np.maximum(te_n, 0.0), 0.0)
    idx = np.flatnonzero(ata & far & (rng.random(n) < 0.03))
    drv, nights, _ = _episodes(rng, idx, np.maximum(te_n[idx], 0.0), life_end_n[idx],
                               1 + rng.poisson(1, len(idx)))
    ev.add(drv, nights, "command_timeouts", rng.integers(1, 4, len(drv)))

    # -- NVMe: benign error-log growth and the odd media error -----------------------------------
    idx = np.flatnonzero(nvme & (rng.random(n) < 0.15))
    rate = rng.uniform(0.05, 0.5, len(idx))
    drv, nights, _ = _episodes(rng, idx, np.maximum(te_n[idx], 0.0), life_end_n[idx],
                               rng.poisson(rate * healthy_life[idx]))
    ev.add(drv, nights, "error_log_entries", 1)
    idx = np.flatnonzero(nvme & far & (rng.random(n) < 0.005))
    drv, nights, _ = _episodes(rng, idx, np.maximum(te_n[idx], 0.0), life_end_n[idx], np.ones(len(idx), int))
    ev.add(drv, nights, "media_errors", rng.integers(1, 3, len(drv)))
    ev.add(drv, nights, "error_log_entries", 1)

    # -- bad cables: CRC errors for every drive that sits in the slot ---------------------------
    bad = slots["bad_cable"].to_numpy()[d["slot"]] & ata
    idx = np.flatnonzero(bad)
    onset = slots["cable_onset_night"].to_numpy()[d["slot"][idx]].astype(float)
    lam = slots["cable_rate"].to_numpy()[d["slot"][idx]]
    first = np.maximum(onset, np.ceil(te_n[idx]))
    last = np.minimum(np.ceil(life_end_n[idx]), days - 1)
    count = np.maximum(last - np.maximum(first, 0) + 1, 0).astype(np.int64)
    rep = np.repeat(np.arange(len(idx)), count)
    offsets = np.arange(len(rep)) - np.repeat(np.cumsum(count) - count, count)
    ev.add(idx[rep], np.maximum(first[rep], 0) + offsets, "crc_errors", rng.poisson(lam[rep]))
    before = (first < 0) & (te_n[idx] <= 0)  # the bad cable predates the window
    ev.add(idx[before], np.full(before.sum(), -1.0), "crc_errors", rng.poisson(lam[before] * -first[before]))

    # -- maintenance outages: one power cycle on return (hard power-off: NVMe unsafe shutdown) --
    for h in np.flatnonzero(off_night >= 0):
        back = off_night[h] + off_len[h]
        on_host = np.flatnonzero((d["host"] == h) & (te_n < off_night[h]) & (life_end_n > back))
        ev.add(on_host, np.full(len(on_host), float(back)), "power_cycles", 1)
        if hard_off[h]:
            ev.add(on_host[nvme[on_host]], np.full(nvme[on_host].sum(), float(back)), "unsafe_shutdowns", 1)

    events = ev.finish(days)
    events["degraded_night"] = degraded_n
    events["read_only_night"] = readonly_n
    return events


def _removals(spec: FleetSpec, drives: pd.DataFrame, d) -> pd.DataFrame:
    logged = drives[drives["removed_at"].notna()]
    notes = []
    for reason, pick in zip(logged["exit_reason"], d["note_pick"][logged.index.to_numpy()]):
        options = REMOVAL_NOTES[reason]
        notes.append(options[int(pick * len(options))])
    out = pd.DataFrame({
        "serial": logged["serial"].to_numpy(),
        "removed_at": logged["removed_at"].to_numpy(),
        "reason": logged["exit_reason"].to_numpy(),
        "note": notes,
        "site": logged["site"].to_numpy(),
    })
    out["removed_at"] = pd.to_datetime(out["removed_at"], utc=True)
    return out.sort_values(["removed_at", "serial"], kind="stable").reset_index(drop=True)


def _missing_at_end(groups, slots, d, T) -> np.ndarray:
    """Per group: slots with no working drive when the window closes."""
    alive = (d["entry_t"] <= T) & ~(d["exit_t"] <= T)
    filled = np.zeros(len(slots), dtype=bool)
    filled[d["slot"][alive]] = True
    missing = pd.Series(~filled).groupby(slots["group"].to_numpy()).sum()
    return groups["group"].map(missing).fillna(0).astype(np.int64).to_numpy()


# --------------------------------------------------------------------------------------------
# Replay


def _replay(fleet: Fleet) -> Iterator[NightState]:
    spec, a = fleet.spec, fleet.arrays
    days = spec.days
    n = len(a["slot"])
    host = a["host"]
    position = fleet.slots["position"].to_numpy()[a["slot"]]
    subsecond = fleet.hosts["subsecond"].to_numpy()[host]
    step_us = np.where(subsecond, 737_000, SECOND_US)  # one drive after the other
    drive_offset_us = position * step_us
    off_start = fleet.hosts["outage_start_h"].to_numpy()[host]
    off_end = fleet.hosts["outage_end_h"].to_numpy()[host]
    # rows ordered by site name, host name, slot
    host_rank = np.argsort(np.lexsort((fleet.hosts["host"].to_numpy(), fleet.hosts["site_name"].to_numpy())))
    sort_key = host_rank[host].astype(np.int64) * 4096 + position

    counters = fleet.baseline.copy()
    ev = fleet.events
    bounds = np.searchsorted(ev["night"], np.arange(-1, days + 1))
    _apply(counters, ev, bounds[0], bounds[1])  # history before the window
    temp_min = a["temp_min0"].copy()
    temp_max = a["temp_max0"].copy()
    pending_max = counters[:, C["pending_sectors"]].copy()
    warn_minutes = a["warn_minutes0"].astype(np.int64).copy()
    nvme = np.array([spec.models[m].bus == "nvme" for m in a["model"]])

    for night in range(days):
        rng = np.random.default_rng([spec.seed, 2, night])
        _apply(counters, ev, bounds[night + 1], bounds[night + 2])
        taken_us = fleet.host_base_us[night, host] + drive_offset_us
        t = (taken_us - fleet.t0_us) / HOUR_US
        present = (a["entry_t"] <= t) & (t < a["exit_t"]) & ~fleet.host_off[night, host]
        present &= rng.random(n) >= spec.missed_capture_rate
        noise = rng.normal(0.0, 0.8, n) + rng.normal(0.0, 0.7, fleet.host_base_us.shape[1])[host]
        idx = np.flatnonzero(present)
        idx = idx[np.argsort(sort_key[idx], kind="stable")]

        day = spec.start + timedelta(days=night)
        season = 2.0 * np.sin(2 * np.pi * (day.timetuple().tm_yday - 110) / 365.25)
        temp = np.round(a["temp_base"][idx] + season + noise[idx] + fleet.host_heat_c[night, host[idx]])
        temp = temp.astype(np.int64)
        temp_min[idx] = np.minimum(temp_min[idx], temp)
        temp_max[idx] = np.maximum(temp_max[idx], temp)
        pending_max[idx] = np.maximum(pending_max[idx], counters[idx, C["pending_sectors"]])
        hot = nvme[idx] & (temp + 273 >= NVME_WARNING_TEMP_K)
        warn_minutes[idx[hot]] += rng.integers(30, 300, hot.sum())

        poh = a["entry_age"][idx] + _powered_hours(a["entry_t"][idx], t[idx], off_start[idx], off_end[idx])
        yield NightState(
            night=night, day=day, drive=idx, taken_at_us=taken_us[idx], power_on_hours=poh,
            temperature_c=temp, temperature_min_c=temp_min[idx].copy(),
            temperature_max_c=temp_max[idx].copy(), pending_max=pending_max[idx].copy(),
            counters=counters[idx].copy(), warning_temp_minutes=warn_minutes[idx].copy(),
        )


def _apply(counters, ev, lo, hi) -> None:
    if hi > lo:
        np.add.at(counters, (ev["drive"][lo:hi], ev["counter"][lo:hi]), ev["delta"][lo:hi])
        np.maximum(counters, 0, out=counters)  # a cleared pending sector cannot go negative
