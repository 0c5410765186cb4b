"""One drive's story for ``triage drive``: who it is, where it sits, what fired, how likely it is
to fail and why, and how its counters moved.

What pushes P(fail) up or down
------------------------------
The fleet model (``triage.survival.model``) is a log-linear rate model: the drive's failure rate
over the next H days is ``exp(b0 + age + cohort + beta . x)``, so each covariate multiplies the
rate by its own factor ``exp(beta_k * x_k)`` and the factors of a drive multiply (McCullagh &
Nelder, Generalized Linear Models, 2nd ed., 6.2, multiplicative effects of a log link). The
model reports them (``predict_details``' ``factor_*`` columns); this view lists them, largest
effect first, and their product: how many times the drive's rate is that of a drive of the same
cohort and age with every covariate at zero (no warning, no growth).
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from datetime import datetime
from typing import Callable

import numpy as np
import pandas as pd

from triage.risk.rank import RankResult, _latest_model, rank_store

#: Snapshot fields of the history, in the order people read them (JSON carries them all).
HISTORY_FIELDS = (
    "power_on_hours", "temperature_c", "reallocated_sectors", "pending_sectors",
    "offline_uncorrectable", "reported_uncorrectable", "command_timeouts", "crc_errors",
    "reallocation_events", "spin_retries", "power_cycles", "nvme_critical_warning",
    "nvme_spare_pct", "nvme_used_pct", "nvme_media_errors", "nvme_error_log_entries",
    "nvme_unsafe_shutdowns", "data_written_bytes",
)
#: Who the drive is and where it sits (its newest capture's values).
IDENTITY_FIELDS = ("model", "firmware", "bus", "user_capacity_bytes", "rotation_rpm", "wwn", "host", "device",
                   "slot", "group")
FLAG_FIELDS = ("rule_id", "severity", "category", "title", "evidence")
CONTRIBUTION_COLUMNS = ("covariate", "value", "term", "factor")  # term = log(factor)


class UnknownDrive(LookupError):
    """No capture of this serial in the store; ``suggestions`` holds close serials."""

    def __init__(self, serial: str, suggestions: list[str]):
        self.serial = serial
        self.suggestions = suggestions
        hint = f"; did you mean {' or '.join(repr(s) for s in suggestions)}?" if suggestions else ""
        super().__init__(f"no drive with serial {serial!r} in the store{hint}")


def close_serials(serial: str, known, n: int = 3) -> list[str]:
    """Serials like ``serial``: a case-insensitive match first, then difflib's closest ratios."""
    known = sorted({str(k) for k in known})
    folded = [k for k in known if k.casefold() == serial.casefold()]
    return (folded + [k for k in difflib.get_close_matches(serial, known, n=n, cutoff=0.6) if k not in folded])[:n]


def contribution_table(factors: pd.Series, values: pd.Series) -> pd.DataFrame:
    """CONTRIBUTION_COLUMNS from a drive's factors and covariate values; largest |log factor| first."""
    names = list(factors.index)
    factor = factors.astype(float).to_numpy()
    term = np.log(factor)
    table = pd.DataFrame({"covariate": names, "value": values.reindex(names).astype(float).to_numpy(),
                          "term": term, "factor": factor})
    order = np.argsort(-np.abs(term), kind="stable")
    return table.iloc[order].reset_index(drop=True)


@dataclass
class DriveStory:
    serial: str
    identity: dict  # IDENTITY_FIELDS from the newest capture
    history: pd.DataFrame  # taken_at + HISTORY_FIELDS, oldest first, one row per capture
    last_seen: datetime
    as_of: datetime | None  # newest capture in the store (the "as of" of this view)
    flags: pd.DataFrame  # FLAG_FIELDS, one row per rule that fired on this drive
    ranked: dict | None  # this drive's row of the ranked list (None: not current)
    fleet_drives: int  # drives in tonight's ranked list
    horizon_days: float | None
    p_fail: float | None
    rate_ratio: float | None  # product of the factors: rate over a same-cohort, same-age drive at x = 0
    contributions: pd.DataFrame  # CONTRIBUTION_COLUMNS, largest effect first; empty without a model
    group: dict | None  # its group's row of groups.group_risk, if it belongs to one
    group_members: pd.DataFrame  # rank, serial, host, slot, severity, p_fail of the group's members
    group_lost: pd.DataFrame  # members the group lost: serial, host, slot, last_seen
    removal: dict | None  # the newest removal-log entry for this serial
    notes: list[str] = field(default_factory=list)


_AUTO = object()


def drive_story(store, serial: str, ruleset, *, config=None, model=_AUTO,
                rank: Callable[..., RankResult] | None = None) -> DriveStory:
    """Assemble ``serial``'s story from ``store`` (raises ``UnknownDrive`` with close serials).

    The ranking is tonight's fleet ranking (``rank_store``), so the drive's rank, group state and
    P(fail) are the numbers ``triage rank`` shows.
    """
    history = store.read("snapshots", serials=[serial])
    if history.empty:
        known = store.current_state(columns=[], days_back=0)[0].sightings["serial"].to_pylist()  # no scan
        raise UnknownDrive(serial, close_serials(serial, known))
    history = history.sort_values("taken_at", kind="stable").reset_index(drop=True)
    newest = history.iloc[-1]
    notes: list[str] = []
    if model is _AUTO:
        model = _latest_model(store, notes)
    result = (rank or rank_store)(store, ruleset, config=config, model=model)
    notes += result.notes

    flags = result.flags
    if flags is not None and len(flags):
        flags = flags[flags["serial"] == serial]
    flags = (flags if flags is not None and len(flags) else pd.DataFrame(columns=FLAG_FIELDS))
    flags = flags.reindex(columns=list(FLAG_FIELDS)).reset_index(drop=True)

    rows = result.drives[result.drives["serial"] == serial]
    ranked = rows.iloc[0].to_dict() if len(rows) else None
    p_fail = None if ranked is None or pd.isna(ranked["p_fail"]) else float(ranked["p_fail"])
    if ranked is None:
        notes.append(f"{serial} is not in tonight's ranking (removed, or not captured in the last "
                     "nights): no P(fail) or rank")

    contributions = pd.DataFrame(columns=CONTRIBUTION_COLUMNS)
    relative = None
    if model is not None and ranked is not None:
        contributions, relative = _contributions(model, serial, history, notes)

    group_name = newest.get("group")
    group, members, lost = None, pd.DataFrame(), pd.DataFrame()
    if isinstance(group_name, str) and len(result.groups):
        match = result.groups[result.groups["group"] == group_name]
        group = match.iloc[0].to_dict() if len(match) else None
        members = result.drives.loc[result.drives["group"] == group_name,
                                    ["rank", "serial", "host", "slot", "severity", "p_fail"]].reset_index(drop=True)
        if len(result.lost):
            lost = result.lost.loc[result.lost["group"] == group_name,
                                   ["serial", "host", "slot", "last_seen"]].reset_index(drop=True)

    removals = store.read("removals", serials=[serial])
    removal = removals.sort_values("removed_at").iloc[-1].to_dict() if len(removals) else None

    columns = ["taken_at"] + [f for f in HISTORY_FIELDS if f in history.columns]
    return DriveStory(
        serial=serial,
        identity={f: newest.get(f) for f in IDENTITY_FIELDS},
        history=history[columns],
        last_seen=newest["taken_at"].to_pydatetime(),
        as_of=result.as_of,
        flags=flags,
        ranked=ranked,
        fleet_drives=len(result.drives),
        horizon_days=result.horizon_days,
        p_fail=p_fail,
        rate_ratio=relative,
        contributions=contributions,
        group=group,
        group_members=members,
        group_lost=lost,
        removal=removal,
        notes=notes,
    )


def _contributions(model, serial: str, history: pd.DataFrame,
                   notes: list[str]) -> tuple[pd.DataFrame, float | None]:
    """The saved model's rate factors for the drive's newest state (growth from its history)."""
    try:
        details = model.predict_details(history.tail(1), history=history)
        states = model.states(history.tail(1), history)
    except (AttributeError, KeyError, ValueError) as exc:
        notes.append(f"the saved model does not give its rate factors ({exc}): no contributions shown")
        return pd.DataFrame(columns=CONTRIBUTION_COLUMNS), None
    details = details[details["serial"] == serial]
    states = states[states["serial"] == serial]
    columns = [c for c in details.columns if c.startswith("factor_")]
    if details.empty or not columns:
        return pd.DataFrame(columns=CONTRIBUTION_COLUMNS), None
    factors = details.iloc[0][columns].rename(lambda c: c[len("factor_"):])
    values = states.iloc[0] if len(states) else pd.Series(dtype=float)
    table = contribution_table(factors, values)
    return table, float(table["factor"].prod())
