"""FleetRiskModel: fitting, the P(fail within H days) formula, held-out calibration, save/load."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.survival import FleetRiskModel, ModelFormatError, latest_model
from triage.survival.cox import CoxFitError
from triage.survival.observations import FEATURES, observations, scan_frame


@pytest.fixture(scope="module")
def fleet():
    return simulate_fleet(n_drives=1500, days=75, seed=21, scale_hours=30_000)


@pytest.fixture(scope="module")
def fitted(fleet):
    snapshots, removals, _ = fleet
    return FleetRiskModel(horizon_days=30).fit(snapshots, removals)


def latest_rows(snapshots):
    return snapshots.sort_values("taken_at").groupby("serial", as_index=False).last()


def test_fit_returns_the_model_with_learned_attributes(fitted):
    for name in ("coef_", "se_", "baseline_", "tail_", "strata_", "cohort_table_", "concordance_",
                 "calibration_", "holdout_", "data_window_", "exclusions_"):
        assert hasattr(fitted, name), name
    assert set(fitted.features_) <= set(FEATURES)
    assert fitted.data_window_["drives"] == 1500


def test_pending_sectors_raise_the_predicted_probability(fitted, fleet):
    snapshots, _, truth = fleet
    details = fitted.predict_details(latest_rows(snapshots)).merge(truth, on="serial")
    # simulated hazard ratio for pending sectors is 4 (fleetsim); the fitted relative hazard of
    # pending drives against clean ones should land near it
    ratio = (details.loc[details["pending"], "relative_hazard"].median()
             / details.loc[~details["pending"], "relative_hazard"].median())
    assert 2.0 < ratio < 8.0


def test_probability_matches_lifelines_baseline_and_coefficients():
    from lifelines import CoxTimeVaryingFitter

    snapshots, removals, _ = simulate_fleet(n_drives=800, days=60, seed=8, scale_hours=30_000)
    # one stratum (every drive is ATA) and no penalty, so lifelines fits the same model
    model = FleetRiskModel(by=("bus",), penalizer=0.0, holdout=False).fit(snapshots, removals)
    episodes = observations(scan_frame(snapshots), removals, by=("bus",)).episodes
    data = episodes[["serial", "start_hours", "stop_hours", "event", *model.features_]]
    reference = CoxTimeVaryingFitter().fit(data, id_col="serial", event_col="event",
                                           start_col="start_hours", stop_col="stop_hours")
    np.testing.assert_allclose(model.coef_.to_numpy(), reference.params_.to_numpy(), rtol=1e-5)
    baseline = reference.baseline_cumulative_hazard_.iloc[:, 0]
    # a drive sitting at one failure age, horizon ending exactly at a later one: the
    # interpolated baseline equals lifelines' Breslow steps at both ends
    age, later = baseline.index[10], baseline.index[40]
    state = latest_rows(snapshots).iloc[[0]].assign(power_on_hours=age, pending_sectors=5.0)
    horizon = (later - age) / 24
    ours = model.predict_fail_probability(state, horizon_days=horizon).iloc[0]
    assert model.features_ == ["any_pending", "log_pending"]  # the only covariates that vary in fleetsim
    x = np.array([1.0, np.log1p(5.0)])
    centre = data[model.features_].mean().to_numpy()
    # P = 1 - exp(-(H0(a + h) - H0(a)) exp(beta (x - centre))) (Klein & Moeschberger 8.8)
    expected = 1 - np.exp(-(baseline[later] - baseline[age]) * np.exp(reference.params_.to_numpy() @ (x - centre)))
    assert ours == pytest.approx(expected, rel=1e-4)


def test_probability_grows_with_the_horizon(fitted, fleet):
    state = latest_rows(fleet[0]).head(50)
    short = fitted.predict_fail_probability(state, horizon_days=7)
    long = fitted.predict_fail_probability(state, horizon_days=90)
    assert (long >= short).all() and (long > short).any()


def test_ages_beyond_the_last_failure_continue_at_the_tail_rate(fitted, fleet):
    state = latest_rows(fleet[0]).head(1)
    cohort_stratum = fitted.strata_[state["model"].iloc[0]]
    last = fitted.tail_[cohort_stratum]["after_hours"]
    old = state.assign(power_on_hours=last + 20_000)
    details = fitted.predict_details(old, horizon_days=30).iloc[0]
    # constant hazard past the last failure age: increment = rate x 720 h (docstring of model.py)
    assert details["baseline_increment"] == pytest.approx(fitted.tail_[cohort_stratum]["rate_per_hour"] * 720)
    assert details["fail_probability"] > 0


def test_a_cohort_never_seen_in_training_gets_the_fleet_average(fitted, fleet):
    state = latest_rows(fleet[0]).head(3).assign(model="Corvid NV1920")
    details = fitted.predict_details(state)
    assert details["stratum"].isna().all()
    assert details["fail_probability"].between(0, 1).all()


def test_missing_state_columns_are_named(fitted):
    with pytest.raises(ValueError, match="power_on_hours"):
        fitted.predict_fail_probability(pd.DataFrame({"serial": ["QHA1"], "model": ["QH-HD8T-A"]}))


def test_held_out_calibration_compares_predicted_and_observed_per_decile(fitted):
    calibration = fitted.calibration_
    assert calibration["decile"].tolist() == list(range(1, 11))
    assert calibration["drives"].sum() == fitted.holdout_["drives"]
    assert calibration["predicted_failures"].sum() == pytest.approx(fitted.holdout_["predicted_failures"])
    assert calibration["observed_failures"].sum() == fitted.holdout_["observed_failures"]
    # the simulated hazard is what the model assumes: totals agree within Poisson noise
    observed, predicted = fitted.holdout_["observed_failures"], fitted.holdout_["predicted_failures"]
    assert abs(observed - predicted) < 4 * np.sqrt(predicted)


def test_held_out_check_is_skipped_when_the_window_is_too_short():
    snapshots, removals, _ = simulate_fleet(n_drives=300, days=40, seed=5, scale_hours=20_000)
    model = FleetRiskModel(horizon_days=30).fit(snapshots, removals)
    assert model.holdout_ is None and model.calibration_ is None


def test_saved_model_loads_and_predicts_the_same(fitted, fleet, tmp_path):
    path = fitted.save(tmp_path / "models")
    assert path.name.startswith("fleet-risk-v1-")
    loaded = FleetRiskModel.load(path)
    state = latest_rows(fleet[0])
    pd.testing.assert_series_equal(loaded.predict_fail_probability(state), fitted.predict_fail_probability(state))
    assert loaded.data_window_ == fitted.data_window_
    assert not list(path.glob("*.pkl"))  # our own format, no pickle


def test_latest_model_takes_the_highest_fit_number(fitted, tmp_path):
    from triage.store.dataset import Store

    store = Store(tmp_path)
    assert latest_model(store) is None
    fitted.save(store.models_dir)
    second = fitted.save(store.models_dir)
    assert second.name.startswith("fleet-risk-v2-")
    assert latest_model(store).path_ == second


def test_a_newer_format_version_is_refused(fitted, tmp_path):
    path = fitted.save(tmp_path)
    meta = json.loads((path / "model.json").read_text())
    meta["format_version"] = 99
    (path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelFormatError, match="newer than this triage reads"):
        FleetRiskModel.load(path)


def test_an_unfitted_model_says_so():
    with pytest.raises(ValueError, match="not fitted"):
        FleetRiskModel().predict_fail_probability(pd.DataFrame({"serial": [], "power_on_hours": []}))


def test_a_fleet_without_failures_cannot_be_fitted(fleet):
    snapshots, removals, _ = fleet
    with pytest.raises(CoxFitError, match="no failures"):
        FleetRiskModel().fit(snapshots, removals[removals["reason"] == "retired"])


def test_bad_configuration_is_refused_at_fit(fleet):
    with pytest.raises(ValueError, match="cohort keys"):
        FleetRiskModel(by=("slot",)).fit(*fleet[:2])
    with pytest.raises(ValueError, match="horizon_days"):
        FleetRiskModel(horizon_days=0).fit(*fleet[:2])
