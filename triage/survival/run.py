"""The store-level library functions behind ``triage fit``, ``cohorts``, ``survival`` and ``compare``."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Sequence

import pandas as pd

from triage.survival.cohorts import SurvivalReport, cohort_table, survival_report
from triage.survival.compare import Comparison, compare_cohorts, versus_fleet
from triage.survival.landmark import store_reader
from triage.survival.model import FleetRiskModel
from triage.survival.observations import REMOVAL_COLUMNS, Observations, observations, scan_store


class EmptyStore(RuntimeError):
    """The store holds no snapshots (nothing ingested yet, or the wrong --store)."""


def _store(store):
    from triage.store.dataset import Store

    return store if hasattr(store, "read") else Store(Path(store))


def _check_not_empty(store) -> None:
    if not store.days("snapshots"):
        raise EmptyStore(f"{store.root}: no snapshots stored (run 'triage ingest' first, or check --store)")


def read_removals(store) -> pd.DataFrame:
    return store.read("removals", columns=list(REMOVAL_COLUMNS))


def load_observations(store, by: Sequence[str] = ("model",), count_proactive: bool = False,
                      progress: Callable[[int, int], None] | None = None, engine=None) -> Observations:
    """The observation table of a store (reads only the columns the survival layer uses);
    ``engine``: where the chunks are read and boiled down (``scan_store``)."""
    store = _store(store)
    _check_not_empty(store)
    removals = read_removals(store)
    scan = scan_store(store, progress=progress, removals=removals, engine=engine)
    return observations(scan, removals, by, count_proactive)


def cohorts_of_store(store, by: Sequence[str] = ("model",), count_proactive: bool = False,
                     mttf_hours: float | None = None, vs_fleet: bool = False,
                     progress: Callable[[int, int], None] | None = None,
                     engine=None) -> tuple[pd.DataFrame, Observations]:
    """(cohort table, observations) for ``triage cohorts``; ``vs_fleet`` adds each cohort's rate
    ratio against the rest of the fleet (``compare.versus_fleet``)."""
    obs = load_observations(store, by, count_proactive, progress, engine=engine)
    table = cohort_table(obs, mttf_hours=mttf_hours)
    if vs_fleet:
        table = table.merge(versus_fleet(obs), on="cohort", how="left")
    return table, obs


def compare_of_store(store, a: str, b: str, by: Sequence[str] = ("model",), count_proactive: bool = False,
                     progress: Callable[[int, int], None] | None = None) -> tuple[Comparison, Observations]:
    """(comparison of cohort a with cohort b, observations) for ``triage compare``."""
    obs = load_observations(store, by, count_proactive, progress)
    return compare_cohorts(obs, a, b), obs


def survival_of_store(store, cohort: str, by: Sequence[str] = ("model",), count_proactive: bool = False,
                      mttf_hours: float | None = None,
                      progress: Callable[[int, int], None] | None = None) -> tuple[SurvivalReport, Observations]:
    """(survival report of one cohort, observations) for ``triage survival``."""
    obs = load_observations(store, by, count_proactive, progress)
    return survival_report(obs, cohort, mttf_hours=mttf_hours), obs


def survival_reports_of_store(store, cohorts: Sequence[str], by: Sequence[str] = ("model",),
                              count_proactive: bool = False, mttf_hours: float | None = None,
                              progress: Callable[[int, int], None] | None = None
                              ) -> tuple[list[SurvivalReport], Observations]:
    """(one survival report per cohort, in the order given; observations), read once."""
    obs = load_observations(store, by, count_proactive, progress)
    return [survival_report(obs, cohort, mttf_hours=mttf_hours) for cohort in cohorts], obs


def fit_store(store, horizon_days: float = 30, by: Sequence[str] = ("model",), count_proactive: bool = False,
              say: Callable[[str], None] | None = None,
              progress: Callable[[int, int], None] | None = None, engine=None) -> tuple[FleetRiskModel, Path]:
    """Fit the fleet risk model on the whole store and save it under ``<store>/models``.

    ``engine`` (``triage.engine``; None: this process): where the map steps run -- reading and
    boiling down each week of snapshots for the cohort table, and each stretch between landmarks
    for the landmark states. The reduced rows come back here in order; the per-cohort and
    penalised fits run here, and only here is anything written, after every task has returned:
    an engine that fails mid-fit leaves no model behind."""
    store = _store(store)
    _check_not_empty(store)
    model = FleetRiskModel(horizon_days=horizon_days, by=by, count_proactive=count_proactive)
    model._validated()
    if say:
        say("reading snapshots")
    removals = read_removals(store)
    scan = scan_store(store, progress=progress, removals=removals, engine=engine)
    model.fit_history(scan, store_reader(store, engine), removals, progress=say)
    path = model.save(store.models_dir)
    return model, path
