"""The fleet tonight, for the views that show all of it (OpenMetrics export, HTML page).

One call gathers what those views need so they compute nothing themselves: the ranked list and
group table and what stopped reporting (``rank_store``), the cohort failure rates, the
fleet-wide hazard by age band, the survival report of the largest cohorts, and the counter history
of the drives at the top.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

import pandas as pd

from triage.risk.rank import RankResult, _latest_model, rank_store

#: Cohorts drawn on the survival chart: the largest ones (a chart with more lines is unreadable).
PICTURED_COHORTS = 6
#: Flagged drives at the top of the list whose counter history the page draws.
PICTURED_DRIVES = 3


@dataclass
class FleetState:
    ranking: RankResult
    as_of: datetime | None  # newest capture in the store
    cohort_by: tuple[str, ...]
    cohorts: pd.DataFrame  # survival.cohorts.cohort_table rows (afr in % per year)
    fleet_bands: pd.DataFrame  # survival.curves.hazard_by_age_band over every usable drive
    survival: list = field(default_factory=list)  # SurvivalReport of the PICTURED_COHORTS largest cohorts
    not_reporting: pd.DataFrame = field(default_factory=pd.DataFrame)  # rank.NOT_REPORTING_COLUMNS
    histories: dict = field(default_factory=dict)  # serial -> its snapshot rows, oldest first (top flagged drives)
    notes: list[str] = field(default_factory=list)


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

    histories = {}
    if with_survival and len(ranking.drives):
        flagged = ranking.drives[ranking.drives["rules"].map(len) > 0]
        top = list(flagged["serial"].head(PICTURED_DRIVES))
        if top:
            rows = store.read("snapshots", serials=top).sort_values("taken_at", kind="stable")
            histories = {serial: rows[rows["serial"] == serial].reset_index(drop=True) for serial in top}
    return FleetState(ranking=ranking, as_of=ranking.as_of, cohort_by=by, cohorts=cohorts,
                      fleet_bands=bands, survival=reports, not_reporting=ranking.not_reporting, notes=notes,
                      histories=histories)
