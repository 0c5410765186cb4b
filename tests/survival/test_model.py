"""FleetRiskModel: fitting on landmarks, P(fail within H days) against a fleet with known hazards,
held-out calibration, save/load."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.survival import FleetRiskModel, ModelFormatError, latest_model
from triage.survival.landmark import FitError

SHAPE, SCALE, PENDING_HR = 1.5, 30_000.0, 4.0


@pytest.fixture(scope="module")
def fleet():
    return simulate_fleet(n_drives=1500, days=75, seed=21, shape=SHAPE, scale_hours=SCALE,
                          pending_log_hr=np.log(PENDING_HR))


@pytest.fixture(scope="module")
def fitted(fleet):
    snapshots, removals, _ = fleet
    # the simulation logs a fifth of its failures as 'proactive' pulls at the failure age itself
    return FleetRiskModel(horizon_days=30, count_proactive=True).fit(snapshots, removals)


def latest_rows(snapshots):
    return snapshots.sort_values("taken_at").groupby("serial", as_index=False).last()


def true_probability(age_hours, pending, days=30):
    """The simulation's own P(fail within ``days`` | alive at ``age``): Weibull proportional hazards,
    H(t | x) = (t / scale) ** shape * HR ** x (tests/survival/fleetsim.py)."""
    hr = np.where(pending, PENDING_HR, 1.0)
    increment = ((age_hours + 24 * days) / SCALE) ** SHAPE - (age_hours / SCALE) ** SHAPE
    return 1 - np.exp(-increment * hr)


def test_fit_returns_the_model_with_learned_attributes(fitted):
    assert fitted.landmark_.n_failures_ > 0
    assert {"any_pending", "log_pending"} <= set(fitted.coefficients().index)
    assert fitted.data_window_["landmarks"] >= 8
    assert not fitted.cohort_table_.empty


def test_predictions_agree_with_the_known_hazards_of_the_simulated_fleet(fitted, fleet):
    snapshots, _, truth = fleet
    state = latest_rows(snapshots)
    state = state[state["serial"].isin(truth.loc[~truth["failed"], "serial"])]
    predicted = fitted.predict_fail_probability(state).reindex(state["serial"]).to_numpy()
    pending = state["pending_sectors"].to_numpy() > 0
    expected = true_probability(state["power_on_hours"].to_numpy(float), pending)
    # the model never sees the Weibull: its age bands and pending effect must add up to it
    # (a few hundred failures in training: 20 % on a sum over 1,000+ drives is about 2 se)
    assert predicted.sum() == pytest.approx(expected.sum(), rel=0.2)
    assert predicted[pending].mean() / predicted[~pending].mean() == pytest.approx(PENDING_HR, rel=0.35)


def test_pending_sectors_raise_the_predicted_probability(fitted, fleet):
    state = latest_rows(fleet[0]).head(1).copy()
    quiet = fitted.predict_fail_probability(state.assign(pending_sectors=0.0)).iloc[0]
    pending = fitted.predict_fail_probability(state.assign(pending_sectors=20.0)).iloc[0]
    assert pending > 2 * quiet


def test_probability_grows_with_the_horizon(fitted, fleet):
    state = latest_rows(fleet[0]).head(50)
    short = fitted.predict_fail_probability(state, horizon_days=10)
    long = fitted.predict_fail_probability(state, horizon_days=90)
    assert (long > short).all()


def test_a_cohort_never_seen_in_training_gets_the_fleet_level(fitted, fleet):
    state = latest_rows(fleet[0]).head(20)
    unseen = state.assign(model="Wren S960")
    p_unseen = fitted.predict_fail_probability(unseen).to_numpy()
    assert np.isfinite(p_unseen).all() and (p_unseen > 0).all()


def test_growth_features_come_from_the_history_when_given(fitted, fleet):
    snapshots = fleet[0]
    serial = snapshots["serial"].iloc[0]
    history = snapshots[snapshots["serial"] == serial].copy()
    last = history["taken_at"].max()
    history.loc[history["taken_at"] == last, "pending_sectors"] = 50.0
    history.loc[history["taken_at"] < last, "pending_sectors"] = 0.0
    latest = latest_rows(history)
    with_history = fitted.states(latest, history=history)
    without = fitted.states(latest)
    assert with_history["growth_pending"].iloc[0] == pytest.approx(np.log1p(50))
    assert without["growth_pending"].iloc[0] == 0.0


def test_missing_state_columns_are_named(fitted):
    with pytest.raises(ValueError, match="power_on_hours"):
        fitted.predict_fail_probability(pd.DataFrame({"serial": ["QHA1"], "model": ["QH-HD8T-A"]}))


def test_held_out_calibration_compares_predicted_and_observed_per_decile(fitted):
    calibration = fitted.calibration_
    assert calibration["decile"].tolist() == list(range(1, 11))
    assert calibration["drives"].sum() == fitted.holdout_["drives"]
    assert calibration["predicted_failures"].sum() == pytest.approx(fitted.holdout_["predicted_failures"])
    assert calibration["observed_failures"].sum() == fitted.holdout_["observed_failures"]
    # totals agree within Poisson noise (4 standard deviations)
    observed, predicted = fitted.holdout_["observed_failures"], fitted.holdout_["predicted_failures"]
    assert abs(observed - predicted) < 4 * np.sqrt(predicted)
    assert 0.5 < fitted.holdout_["concordance"] <= 1


def test_held_out_check_is_skipped_when_the_window_is_too_short():
    snapshots, removals, _ = simulate_fleet(n_drives=300, days=40, seed=5, scale_hours=8_000)
    model = FleetRiskModel(horizon_days=30).fit(snapshots, removals)
    assert model.holdout_ is None and model.calibration_ is None


def test_saved_model_loads_and_predicts_the_same(fitted, fleet, tmp_path):
    path = fitted.save(tmp_path / "models")
    assert path.name.startswith("fleet-risk-v1-")
    loaded = FleetRiskModel.load(path)
    state = latest_rows(fleet[0])
    pd.testing.assert_series_equal(loaded.predict_fail_probability(state), fitted.predict_fail_probability(state))
    assert loaded.data_window_ == fitted.data_window_
    assert loaded.config() == fitted.config()
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


def test_a_model_saved_in_the_previous_format_asks_for_a_refit(fitted, tmp_path):
    path = fitted.save(tmp_path)
    meta = json.loads((path / "model.json").read_text())
    meta["format_version"] = 1
    (path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelFormatError, match="refit with 'triage fit'"):
        FleetRiskModel.load(path)


def test_an_unfitted_model_says_so():
    with pytest.raises(ValueError, match="not fitted"):
        FleetRiskModel().predict_fail_probability(pd.DataFrame({"serial": [], "power_on_hours": []}))


def test_a_fleet_without_failures_cannot_be_fitted(fleet):
    snapshots, removals, _ = fleet
    with pytest.raises(FitError, match="no failures"):
        FleetRiskModel().fit(snapshots, removals[removals["reason"] == "retired"])


def test_bad_configuration_is_refused_at_fit(fleet):
    with pytest.raises(ValueError, match="cohort keys"):
        FleetRiskModel(by=("slot",)).fit(*fleet[:2])
    with pytest.raises(ValueError, match="horizon_days"):
        FleetRiskModel(horizon_days=0).fit(*fleet[:2])
    with pytest.raises(ValueError, match="cohort_sd"):
        FleetRiskModel(cohort_sd=0).fit(*fleet[:2])
