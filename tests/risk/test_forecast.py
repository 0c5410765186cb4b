"""Failure and spares forecast: the Poisson-binomial sum, its quantiles, and the whole forecast."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tests.survival.fleetsim import simulate_fleet
from triage.risk.forecast import (
    ForecastError,
    forecast_store,
    forecast_table,
    pmf_quantile,
    poisson_binomial_pmf,
)
from triage.store.dataset import Store


def test_two_drives_by_hand():
    # p = (0.1, 0.5): P(0) = 0.9 * 0.5, P(1) = 0.1 * 0.5 + 0.9 * 0.5, P(2) = 0.1 * 0.5
    np.testing.assert_allclose(poisson_binomial_pmf([0.1, 0.5]), [0.45, 0.5, 0.05], atol=1e-15)


@pytest.mark.parametrize("n, p", [(40, 0.1), (3000, 0.02)])  # the second goes through the FFT products
def test_equal_probabilities_give_the_binomial(n, p):
    pmf = poisson_binomial_pmf(np.full(n, p))
    # independent reference: scipy.stats.binom
    np.testing.assert_allclose(pmf, stats.binom.pmf(np.arange(n + 1), n, p), atol=1e-12)
    for q in (0.05, 0.5, 0.95, 0.99):
        assert pmf_quantile(pmf, q) == stats.binom.ppf(q, n, p)


def test_unequal_probabilities_match_a_monte_carlo_sum():
    rng = np.random.default_rng(0)
    p = rng.uniform(0, 0.2, size=300)
    pmf = poisson_binomial_pmf(p)
    assert pmf.sum() == pytest.approx(1.0)
    assert (np.arange(len(pmf)) * pmf).sum() == pytest.approx(p.sum())
    # variance of a sum of independent Bernoulli: sum p (1 - p)
    mean = p.sum()
    assert ((np.arange(len(pmf)) - mean) ** 2 * pmf).sum() == pytest.approx((p * (1 - p)).sum())


def test_probabilities_outside_zero_one_are_refused():
    with pytest.raises(ValueError, match="within"):
        poisson_binomial_pmf([0.2, 1.5])


def test_cohort_rows_add_up_to_the_fleet_row():
    drives = pd.DataFrame({"cohort": ["A", "A", "B", "C"], "host": ["ash-1", "cedar-2", "ash-3", "ash-1"],
                           "p_fail": [0.1, 0.2, 0.3, 0.05]})
    table = forecast_table(drives, service_level=0.95)
    fleet = table[table["scope"] == "fleet"].iloc[0]
    cohorts = table[table["scope"] == "cohort"]
    assert cohorts["drives"].sum() == fleet["drives"] == 4
    assert cohorts["expected"].sum() == pytest.approx(fleet["expected"])
    sites = table[table["scope"] == "site"].set_index("name")
    assert sites.loc["ash", "drives"] == 3 and sites.loc["cedar", "drives"] == 1
    assert (table["interval_low"] <= table["interval_high"]).all()
    assert (table["spares"] <= table["interval_high"]).all()  # the 95 % quantile is the same point here


@pytest.fixture(scope="module")
def sim_store(tmp_path_factory):
    root = tmp_path_factory.mktemp("forecast-store")
    snapshots, removals, truth = simulate_fleet(n_drives=2000, days=120, seed=31, shape=1.0, scale_hours=40_000.0,
                                                pending_fraction=0.0, proactive_share=0.0, retire_share=0.0)
    store = Store(root)
    store.append("snapshots", snapshots)
    store.append("removals", removals)
    return store, snapshots, removals


def test_forecast_of_a_constant_hazard_fleet_matches_the_known_rate(sim_store):
    store, snapshots, _ = sim_store
    # shape 1: every drive fails at 1 / 40,000 per hour whatever its age
    as_of = pd.Timestamp(snapshots["taken_at"].min()).normalize() + pd.Timedelta(days=60)
    forecast = forecast_store(store, days=30, as_of=as_of - pd.Timedelta(days=1))
    fleet = forecast.rows[forecast.rows["scope"] == "fleet"].iloc[0]
    true_p = 1 - np.exp(-30 * 24 / 40_000.0)
    # a few hundred failures in training: the fitted rate is within about 10 % (2 se)
    assert fleet["expected"] == pytest.approx(fleet["drives"] * true_p, rel=0.15)
    # every drive has about the same p here, so the interval is about a binomial's with the mean p
    # (scipy.stats.binom as the reference; a Poisson-binomial is a little narrower, never wider)
    n, mean_p = int(fleet["drives"]), fleet["expected"] / fleet["drives"]
    assert stats.binom.ppf(0.05, n, mean_p) <= fleet["interval_low"] <= stats.binom.ppf(0.05, n, mean_p) + 1
    assert stats.binom.ppf(0.95, n, mean_p) - 1 <= fleet["interval_high"] <= stats.binom.ppf(0.95, n, mean_p)


def test_forecast_uses_only_data_known_at_the_date(sim_store):
    store, snapshots, removals = sim_store
    as_of = pd.Timestamp(snapshots["taken_at"].min()).normalize() + pd.Timedelta(days=50)
    early = forecast_store(store, days=30, as_of=as_of)
    # removing everything after the date changes nothing
    cut = Store(store.root.parent / "forecast-cut")
    cut.append("snapshots", snapshots[snapshots["taken_at"] < as_of])
    cut.append("removals", removals[pd.to_datetime(removals["removed_at"], utc=True) <= as_of])
    again = forecast_store(cut, days=30, as_of=as_of)
    pd.testing.assert_frame_equal(early.rows, again.rows)


def test_a_date_outside_the_history_is_refused(sim_store):
    store, snapshots, _ = sim_store
    with pytest.raises(ForecastError, match="outside the stored history"):
        forecast_store(store, as_of=pd.Timestamp("2031-01-01", tz="UTC"))


def test_a_bad_service_level_is_refused(sim_store):
    with pytest.raises(ForecastError, match="service-level"):
        forecast_store(sim_store[0], service_level=1.0)
