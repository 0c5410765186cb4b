"""Rank drives for proactive replacement: rule flags + model probability + group awareness.

``rank_drives`` is pure (frames in, frame out); ``rank_store`` reads only what it needs from the
store: the last ``window_days`` (+ a short look-back for degraded groups) of snapshot partitions,
the removal log and the saved model. It never scans the whole history.
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Callable, Sequence

import pandas as pd

from triage.risk.groups import (
    GroupConfig,
    group_risk,
    lost_members,
    member_probability,
    window_probability,
)
from triage.risk.score import (
    SEVERITIES,
    SEVERITY_WEIGHT,
    action_text,
    risk_score,
    severity_name,
)

#: Days of captures looked at to notice a member that went missing (at least this many).
GROUP_LOOKBACK_DAYS = 7

RANK_COLUMNS = [
    "rank", "serial", "model", "host", "slot", "group", "power_on_hours", "age_days", "score",
    "p_fail", "severity", "category", "action", "rules", "evidence", "p_group_loss", "degraded",
    "group_importance",
]


@dataclass
class RankResult:
    drives: pd.DataFrame  # RANK_COLUMNS, best first
    groups: pd.DataFrame  # groups.group_risk's table
    model_used: bool
    horizon_days: float | None
    as_of: datetime | None
    notes: list[str] = field(default_factory=list)


def summarise_flags(flags: pd.DataFrame) -> pd.DataFrame:
    """One row per serial: worst severity, its category, rule ids and evidence (worst first)."""
    columns = ["serial", "severity", "category", "rules", "evidence"]
    if flags is None or flags.empty:
        return pd.DataFrame(columns=columns)
    order = {name: i for i, name in enumerate(SEVERITIES)}
    flags = flags.assign(severity=flags["severity"].map(severity_name))
    flags = flags.assign(_order=flags["severity"].map(lambda s: order.get(s, len(order))))
    flags = flags.sort_values(["serial", "_order", "rule_id"], kind="stable")
    rows = []
    for serial, part in flags.groupby("serial", sort=True):
        evidence = [str(e) if isinstance(e, str) and e else str(t)
                    for e, t in zip(part["evidence"], part.get("title", part["rule_id"]))]
        rows.append({
            "serial": serial,
            "severity": part["severity"].iloc[0],
            "category": part["category"].iloc[0] if "category" in part else None,
            "rules": list(dict.fromkeys(part["rule_id"].astype(str))),
            "evidence": evidence,
        })
    return pd.DataFrame(rows, columns=columns)


def rank_drives(
    latest: pd.DataFrame,
    flags: pd.DataFrame,
    p_fail: pd.Series | None,
    *,
    horizon_days: float | None = None,
    lost: pd.DataFrame | None = None,
    config: GroupConfig | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Score and order drives (see triage.risk.score); returns (drives, groups).

    ``latest``: one row per serial (snapshot columns). ``flags``: rule firings (serial, rule_id,
    severity, category, title, evidence). ``p_fail``: P(fail within ``horizon_days``) by serial, or
    None when there is no model.
    """
    config = config or GroupConfig()
    lost = lost if lost is not None else pd.DataFrame(columns=["group", "serial"])
    drives = latest.reset_index(drop=True).copy()
    summary = summarise_flags(flags)
    drives = drives.merge(summary, on="serial", how="left")
    drives["rules"] = [r if isinstance(r, list) else [] for r in drives["rules"]]
    drives["evidence"] = [e if isinstance(e, list) else [] for e in drives["evidence"]]
    drives["severity"] = drives["severity"].astype(object).where(drives["severity"].notna(), None)
    drives["category"] = drives["category"].astype(object).where(drives["category"].notna(), None)
    if p_fail is not None:
        drives["p_fail"] = drives["serial"].map(p_fail).astype(float)
    else:
        drives["p_fail"] = float("nan")

    # each member's probability over its group's rebuild window
    p_member = []
    for row in drives.itertuples(index=False):
        p_window = None
        if p_fail is not None and horizon_days and not pd.isna(row.p_fail) and isinstance(row.group, str):
            rebuild_days = config.for_group(row.group).rebuild_hours / 24.0
            p_window = window_probability(row.p_fail, horizon_days, rebuild_days)
        p_member.append(member_probability(p_window, row.severity))
    drives["p_member"] = p_member
    groups, importance = group_risk(drives[["serial", "group", "p_member"]], lost, config)

    by_group = groups.set_index("group")
    drives["group_importance"] = drives["serial"].map(importance).fillna(0.0)
    drives["p_group_loss"] = drives["group"].map(by_group["p_group_loss"]).astype(float)
    drives["degraded"] = drives["group"].map(by_group["degraded"]).eq(True)
    lost_n = drives["group"].map(by_group["lost"]).fillna(0).astype(int)
    drives["score"] = [
        risk_score(SEVERITY_WEIGHT.get(s, 0.0), p, g)
        for s, p, g in zip(drives["severity"], drives["p_fail"], drives["group_importance"])
    ]
    drives["action"] = [
        action_text(s, c, d, g, n)
        for s, c, d, g, n in zip(drives["severity"], drives["category"], drives["degraded"],
                                 drives["group"], lost_n)
    ]
    hours = drives["power_on_hours"] if "power_on_hours" in drives else pd.Series(float("nan"), index=drives.index)
    drives["power_on_hours"] = hours
    drives["age_days"] = hours / 24.0
    for column in ("model", "host", "slot", "group"):
        if column not in drives:
            drives[column] = None
    order = drives.assign(_p=drives["p_fail"].fillna(-1.0))
    drives = order.sort_values(["score", "_p", "serial"], ascending=[False, False, True], kind="stable")
    drives = drives.reset_index(drop=True)
    drives["rank"] = range(1, len(drives) + 1)
    return drives[RANK_COLUMNS], groups


def site_of(host: str | None) -> str | None:
    """A host's site: its name up to the first '-' or '.' (fleet naming like ``ash-r3-n07``)."""
    if not isinstance(host, str):
        return None
    for sep in ("-", "."):
        host = host.split(sep, 1)[0]
    return host


def filter_ranked(
    drives: pd.DataFrame,
    *,
    host: Sequence[str] = (),
    site: Sequence[str] = (),
    group: Sequence[str] = (),
    severity: Sequence[str] = (),
    flagged_only: bool = False,
    top: int | None = None,
) -> pd.DataFrame:
    """Keep drives matching every given filter (fnmatch patterns; any pattern of a list may match)."""

    def matches(values: pd.Series, patterns: Sequence[str]) -> pd.Series:
        return values.map(lambda v: isinstance(v, str) and any(fnmatch.fnmatchcase(v, p) for p in patterns))

    keep = pd.Series(True, index=drives.index)
    if host:
        keep &= matches(drives["host"], host)
    if site:
        keep &= matches(drives["host"].map(site_of), site)
    if group:
        keep &= matches(drives["group"], group)
    if severity:
        unknown = set(severity) - set(SEVERITIES)
        if unknown:
            raise ValueError(f"unknown severity {', '.join(sorted(unknown))}; use one of {', '.join(SEVERITIES)}")
        keep &= drives["severity"].isin(list(severity))
    if flagged_only:
        keep &= drives["rules"].map(len) > 0
    out = drives[keep]
    return out.head(top) if top is not None else out


_AUTO = object()


def rank_store(
    store,
    ruleset,
    *,
    evaluate: Callable | None = None,
    model=_AUTO,
    config: GroupConfig | None = None,
) -> RankResult:
    """Rank every current drive in ``store``.

    Reads: snapshot partitions of the last max(ruleset.window_days, GROUP_LOOKBACK_DAYS) + 1 days,
    the removal log, and the newest saved model (``model=None`` forces a rules-only run).
    """
    notes: list[str] = []
    if evaluate is None:
        from triage.rules import evaluate  # noqa: PLC0415  (rules layer, to our left)
    if model is _AUTO:
        model = _latest_model(store, notes)
    days = store.days("snapshots")
    if not days:
        empty = pd.DataFrame(columns=RANK_COLUMNS)
        return RankResult(empty, pd.DataFrame(), model is not None, getattr(model, "horizon_days", None), None,
                          notes + ["the store holds no captures yet"])
    newest = datetime.strptime(days[-1], "%Y-%m-%d").replace(tzinfo=timezone.utc)
    lookback = max(int(getattr(ruleset, "window_days", 0) or 0), GROUP_LOOKBACK_DAYS)
    history = store.read("snapshots", since=newest - timedelta(days=lookback))
    removals = store.read("removals")
    as_of = history["taken_at"].max().to_pydatetime()

    latest = history.sort_values("taken_at").groupby("serial", as_index=False).last()
    lost = lost_members(history, removals)
    gone = set(lost["serial"])
    if len(removals):
        removed_at = removals.groupby("serial")["removed_at"].max()
        left = latest["serial"].map(removed_at) >= latest["taken_at"]
        gone |= set(latest.loc[left.fillna(False).astype(bool), "serial"])
    latest = latest[~latest["serial"].isin(gone)]

    flags = evaluate(ruleset, history, now=as_of)
    p_fail, horizon = None, None
    if model is not None:
        p_fail = model.predict_fail_probability(latest, horizon_days=None, history=history)
        horizon = float(model.horizon_days)
    else:
        notes.append("no saved survival model: ranking on rules alone (p_fail is empty)")
    drives, groups = rank_drives(latest, flags, p_fail, horizon_days=horizon, lost=lost, config=config)
    return RankResult(drives, groups, model is not None, horizon, as_of, notes)


def _latest_model(store, notes: list[str]):
    import triage.survival as survival  # noqa: PLC0415  (survival layer, to our left)

    model, unreadable = survival.readable_latest_model(store)
    if unreadable:
        notes.append(f"saved model unreadable ({unreadable}): ranking on rules alone until 'triage fit' runs")
    return model
