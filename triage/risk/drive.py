"""One drive's story for ``triage drive``: who it is, where it sits, what fired, how likely it is
to fail and why, and how its counters moved.

What pushes P(fail) up or down
------------------------------
The fleet model is proportional-hazards (``triage.survival.model``): a drive's hazard is its
cohort's baseline at its age times the relative hazard ``exp(beta . (x - centre))``. A sum in the
exponent is a product of one factor per covariate (Cox, "Regression models and life-tables",
JRSS B 34, 1972, eq. 2; Klein & Moeschberger, Survival Analysis, 2nd ed., 8.1)::

    exp(beta . (x - centre)) = prod_k exp(beta_k * (x_k - centre_k))

so ``factor_k = exp(beta_k * (x_k - centre_k))`` is how many times this drive's failure rate is
that of a drive of the same cohort and age at the fleet's covariate centre, from covariate ``k``
alone; factors multiply, their logs (``term_k``) add. The baseline (age, cohort) is the rest of
the story and is shown as the probability a centre drive of that age would have.
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
IDENTITY_FIELDS = ("model", "firmware", "bus", "capacity_bytes", "rotation_rpm", "wwn", "host", "device",
                   "slot", "group")
FLAG_FIELDS = ("rule_id", "severity", "category", "title", "evidence")
CONTRIBUTION_COLUMNS = ("covariate", "value", "centre", "coef", "term", "factor")


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


def hazard_terms(features: pd.Series, coef: pd.Series, centre: pd.Series) -> pd.DataFrame:
    """One row per covariate: value, centre, coef, term = coef * (value - centre), factor = exp(term).

    Largest effect (|term|) first; ``exp(term.sum())`` is the drive's relative hazard.
    """
    names = list(coef.index)
    value = features.reindex(names).astype(float).to_numpy()
    beta = coef.astype(float).to_numpy()
    middle = centre.reindex(names).astype(float).to_numpy()
    term = beta * (value - middle)
    table = pd.DataFrame({"covariate": names, "value": value, "centre": middle, "coef": beta,
                          "term": term, "factor": np.exp(term)})
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
    relative_hazard: float | None
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
        known = store.read("snapshots", columns=["serial"])["serial"].unique()
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
        contributions, relative = _contributions(model, history.tail(1), notes)

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
        relative_hazard=relative,
        contributions=contributions,
        group=group,
        group_members=members,
        group_lost=lost,
        removal=removal,
        notes=notes,
    )


def _contributions(model, latest: pd.DataFrame, notes: list[str]) -> tuple[pd.DataFrame, float | None]:
    """hazard_terms of the drive's newest capture under the saved model's coefficients."""
    from triage.survival.observations import covariate_features  # noqa: PLC0415  (survival layer)

    try:
        coef = model.coefficients()["coef"]
        centre = model.center_
    except (AttributeError, KeyError, ValueError) as exc:
        notes.append(f"the saved model does not expose its coefficients ({exc}): no contributions shown")
        return pd.DataFrame(columns=CONTRIBUTION_COLUMNS), None
    features = covariate_features(latest).iloc[0]
    terms = hazard_terms(features, coef, centre)
    return terms, float(np.exp(terms["term"].sum()))
