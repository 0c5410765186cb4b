"""A small simulated fleet with known lifetimes, for the survival tests (invented models only).

Lifetimes are Weibull with proportional hazards: H(t | x) = (t / scale) ** shape * exp(beta * x),
x = 1 for drives carrying pending sectors
(the hazard depends on having any, not on how many). Drives join at a random age (left truncation) and the
failure age is drawn conditional on having survived to it:

    H(T) = H(entry) - log(U),  U ~ Uniform(0, 1)   =>   T = scale * (H(T) * exp(-beta x)) ** (1 / shape)
"""

from __future__ import annotations

import numpy as np
import pandas as pd

MODELS = ("QH-HD8T-A", "Tallow 14T")
CAPACITY = {"QH-HD8T-A": 8_000_000_000_000, "Tallow 14T": 14_000_000_000_000}
START = pd.Timestamp("2026-01-05T02:00:00Z")


def truncated_weibull(rng, entry, shape, scale, log_hr=0.0):
    """Failure ages given survival to ``entry`` (inverse transform of the conditional CDF)."""
    u = rng.uniform(size=len(entry))
    cumulative = (entry / scale) ** shape * np.exp(log_hr) - np.log(u)
    return scale * (cumulative * np.exp(-log_hr)) ** (1 / shape)


def simulate_fleet(n_drives=600, days=120, seed=7, shape=1.5, scale_hours=60_000.0, max_entry_years=3.0,
                   pending_fraction=0.15, pending_log_hr=np.log(4.0), proactive_share=0.2,
                   retire_share=0.02):
    rng = np.random.default_rng(seed)
    serial = np.array([f"QHS{seed:02d}{i:06d}" for i in range(n_drives)])
    model = rng.choice(MODELS, size=n_drives)
    entry = np.floor(rng.uniform(0, max_entry_years * 8766, size=n_drives))
    pending = rng.uniform(size=n_drives) < pending_fraction
    pending_count = np.where(pending, rng.integers(1, 60, size=n_drives), 0).astype(float)
    log_hr = np.where(pending, pending_log_hr, 0.0)
    failure_age = truncated_weibull(rng, entry, shape, scale_hours, log_hr)
    window_end = entry + 24.0 * days
    fails = failure_age < window_end
    retire_age = np.where(rng.uniform(size=n_drives) < retire_share,
                          entry + rng.uniform(24, 24 * days, size=n_drives), np.inf)
    retires = ~fails & (retire_age < window_end)
    exit_age = np.where(fails, failure_age, np.where(retires, retire_age, window_end))
    offset_min = rng.integers(0, 50, size=n_drives)

    captures = np.arange(days)
    ages = entry[:, None] + 24.0 * captures[None, :]
    alive = ages < exit_age[:, None]
    alive[:, 0] = True  # every drive has its first snapshot
    drive, night = np.nonzero(alive)
    n = len(drive)
    taken_at = START + pd.to_timedelta(night, unit="D") + pd.to_timedelta(offset_min[drive], unit="min")
    snapshots = pd.DataFrame({
        "serial": serial[drive],
        "model": model[drive],
        "firmware": "QF12",
        "bus": "ata",
        "user_capacity_bytes": np.array([CAPACITY[m] for m in model])[drive],
        "taken_at": taken_at,
        "power_on_hours": ages[drive, night].astype(np.int64),
        "temperature_c": (36 + rng.integers(-1, 2, size=n)).astype(float),
        "reallocated_sectors": 0.0,
        "reallocation_events": 0.0,
        "pending_sectors": pending_count[drive],
        "offline_uncorrectable": 0.0,
        "reported_uncorrectable": 0.0,
        "command_timeouts": 0.0,
        "nvme_critical_warning": np.nan,
        "nvme_spare_pct": np.nan,
        "nvme_spare_threshold_pct": np.nan,
        "nvme_media_errors": np.nan,
    })
    gone = np.flatnonzero(fails | retires)
    removed_at = START + pd.to_timedelta(np.round((exit_age[gone] - entry[gone]) * 3600), unit="s") \
        + pd.to_timedelta(offset_min[gone], unit="min")
    reason = np.where(retires[gone], "retired",
                      np.where(rng.uniform(size=len(gone)) < proactive_share, "proactive", "failed"))
    removals = pd.DataFrame({"serial": serial[gone], "removed_at": removed_at, "reason": reason,
                             "note": "", "source_file": "sim.csv"})
    truth = pd.DataFrame({"serial": serial, "model": model, "entry": entry, "exit": exit_age,
                          "failed": fails, "pending": pending})
    return snapshots, removals, truth


def simulated_store(root, **fleet):
    """A store at ``root`` holding ``simulate_fleet(**fleet)``'s snapshots and removals; returns
    (store, snapshots)."""
    from triage.store.dataset import Store

    snapshots, removals, _ = simulate_fleet(**fleet)
    store = Store(root)
    store.append("snapshots", snapshots)
    store.append("removals", removals)
    return store, snapshots
