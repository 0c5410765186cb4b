"""The fleet tonight, for the views that show all of it (OpenMetrics export, HTML page).

One call gathers what those views need so they compute nothing themselves: the ranked list and
group table (``rank_store``), the cohort failure rates (``survival.cohorts_of_store``), the
fleet-wide hazard by age band, the survival report of the largest cohorts, and the hosts that
stopped reporting.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone

import pandas as pd

from triage.risk.rank import RankResult, _latest_model, rank_store

#: Data older than this is stale, and a host whose newest capture is this much older than the
#: store's newest is not reporting (36 h: one missed nightly run plus slack; the on-call view's
#: threshold, common practice, no source).
STALE_HOURS = 36.0
NOT_REPORTING_HOURS = STALE_HOURS
#: How far back to look for hosts that went quiet (older silence is a decommissioned host).
NOT_REPORTING_LOOKBACK_DAYS = 14
#: Cohorts drawn on the survival chart: the largest ones (a chart with more lines is unreadable).
PICTURED_COHORTS = 6
#: Flagged drives at the top of the list whose counter history the page draws.
PICTURED_DRIVES = 3


def stale_age_hours(as_of: datetime | None, now: datetime | None = None,
                    threshold: float = STALE_HOURS) -> float | None:
    """Hours since ``as_of`` when that is more than ``threshold`` (the data is stale), else None.

    No data at all (``as_of`` None) is infinitely stale: never news.
    """
    if as_of is None:
        return float("inf")
    now = now or datetime.now(timezone.utc)
    age = (pd.Timestamp(now) - pd.Timestamp(as_of)) / pd.Timedelta(hours=1)
    return float(age) if age > threshold else None


@dataclass
class FleetState:
    ranking: RankResult
    as_of: datetime | None  # newest capture in the store
    cohort_by: tuple[str, ...]
    cohorts: pd.DataFrame  # survival.cohorts.cohort_table rows (afr in % per year)
    fleet_bands: pd.DataFrame  # survival.curves.hazard_by_age_band over every usable drive
    survival: list = field(default_factory=list)  # SurvivalReport of the PICTURED_COHORTS largest cohorts
    not_reporting: pd.DataFrame = field(default_factory=pd.DataFrame)  # host, drives, last_seen, silent_hours
    histories: dict = field(default_factory=dict)  # serial -> its snapshot rows, oldest first (top flagged drives)
    notes: list[str] = field(default_factory=list)


def not_reporting_hosts(recent: pd.DataFrame, removals: pd.DataFrame, as_of: datetime,
                        hours: float = NOT_REPORTING_HOURS) -> pd.DataFrame:
    """Hosts whose newest capture is more than ``hours`` before ``as_of``.

    ``recent``: snapshot rows (serial, host, taken_at) of the last days. Drives removed after
    their last capture do not count (their host may simply have lost that drive).
    Returns host, drives (not removed), last_seen, silent_hours; longest silence first.
    """
    columns = ["host", "drives", "last_seen", "silent_hours"]
    frame = recent.dropna(subset=["host"])
    if frame.empty:
        return pd.DataFrame(columns=columns)
    last = frame.groupby("serial", as_index=False).agg(host=("host", "last"), last_seen=("taken_at", "max"))
    if len(removals):
        removed_at = removals.groupby("serial")["removed_at"].max()
        gone = pd.to_datetime(last["serial"].map(removed_at), utc=True) >= last["last_seen"]
        last = last[~gone.fillna(False).astype(bool)]
    hosts = last.groupby("host", as_index=False).agg(drives=("serial", "size"), last_seen=("last_seen", "max"))
    silent = (pd.Timestamp(as_of) - hosts["last_seen"]) / pd.Timedelta(hours=1)
    hosts = hosts.assign(silent_hours=silent)[silent > hours]
    return hosts.sort_values(["silent_hours", "host"], ascending=[False, True])[columns].reset_index(drop=True)


def fleet_state(store, ruleset, *, config=None, ranking: RankResult | None = None,
                with_survival: bool = True) -> FleetState:
    """Everything the fleet-wide views show, from ``store`` (``ranking``: reuse tonight's)."""
    from triage.survival.cohorts import cohort_table, survival_report  # noqa: PLC0415  (survival layer)
    from triage.survival.curves import hazard_by_age_band  # noqa: PLC0415
    from triage.survival.observations import at_risk_drives  # noqa: PLC0415
    from triage.survival.run import EmptyStore, load_observations  # noqa: PLC0415

    notes: list[str] = []
    model = _latest_model(store, notes)
    if ranking is None:
        ranking = rank_store(store, ruleset, config=config, model=model)
    notes += [n for n in ranking.notes if n not in notes]
    # the cohort numbers are those of 'triage cohorts' with its defaults, by the saved model's
    # cohort keys
    by = tuple(model.by) if model is not None else ("model",)

    cohorts, bands, reports = pd.DataFrame(), pd.DataFrame(), []
    try:
        obs = load_observations(store, by)
    except EmptyStore:
        obs = None
    if obs is not None:
        cohorts = cohort_table(obs)
        usable = at_risk_drives(obs.drives)
        bands = hazard_by_age_band(usable["entry_hours"], usable["exit_hours"], usable["event"])
        if with_survival and len(cohorts):
            largest = cohorts.sort_values(["drives", "cohort"], ascending=[False, True])["cohort"]
            reports = [survival_report(obs, label) for label in largest.head(PICTURED_COHORTS)]

    quiet = pd.DataFrame()
    if ranking.as_of is not None:
        since = ranking.as_of - timedelta(days=NOT_REPORTING_LOOKBACK_DAYS)
        recent = store.read("snapshots", columns=["serial", "host", "taken_at"], since=since)
        quiet = not_reporting_hosts(recent, store.read("removals"), ranking.as_of)
    histories = {}
    if with_survival and len(ranking.drives):
        flagged = ranking.drives[ranking.drives["rules"].map(len) > 0]
        top = list(flagged["serial"].head(PICTURED_DRIVES))
        if top:
            rows = store.read("snapshots", serials=top).sort_values("taken_at", kind="stable")
            histories = {serial: rows[rows["serial"] == serial].reset_index(drop=True) for serial in top}
    return FleetState(ranking=ranking, as_of=ranking.as_of, cohort_by=by, cohorts=cohorts,
                      fleet_bands=bands, survival=reports, not_reporting=quiet, notes=notes,
                      histories=histories)
