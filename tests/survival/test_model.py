"""FleetRiskModel: fitting, the P(fail within H days) formula, the banded baseline, held-out
calibration, save/load."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.survival import FleetRiskModel, ModelFormatError, latest_model
from triage.survival.cox import CoxFitError, StratifiedCox
from triage.survival.curves import AGE_BANDS
from triage.survival.model import banded_baseline
from triage.survival.observations import FEATURES, observations, scan_frame

HORIZON_HOURS = 30 * 24.0


@pytest.fixture(scope="module")
def fleet():
    return simulate_fleet(n_drives=1500, days=75, seed=21, scale_hours=30_000)


@pytest.fixture(scope="module")
def fitted(fleet):
    snapshots, removals, _ = fleet
    return FleetRiskModel(horizon_days=30).fit(snapshots, removals)


@pytest.fixture(scope="module")
def clean_fleet():
    """No drive has pending sectors: no covariate varies, so the model has none."""
    return simulate_fleet(n_drives=1500, days=75, seed=21, scale_hours=30_000, pending_fraction=0.0)


@pytest.fixture(scope="module")
def large_fleet():
    """(stratum, x, entry, exit, event) of 40,000 drives, ~10,000 failures: Weibull(1.5) ages with
    hazard ratio 3 for x = 1, two strata, 30 % bought new (entry at 0 h), the rest second-hand,
    each watched for a year."""
    rng = np.random.default_rng(1)
    n = 40_000
    stratum = rng.choice(["QH-HD8T-A", "Tallow 14T"], size=n)
    scale = np.where(stratum == "QH-HD8T-A", 30_000.0, 45_000.0)
    x = (rng.uniform(size=n) < 0.2).astype(float)
    entry = np.where(rng.uniform(size=n) < 0.3, 0.0, rng.uniform(0, 4 * 8766, size=n))
    # H(T | x) = H(entry | x) - log U, as in fleetsim
    failure = scale * ((entry / scale) ** 1.5 - np.log(rng.uniform(size=n)) / 3.0 ** x) ** (1 / 1.5)
    end = entry + 8766.0
    event = failure < end
    return stratum, x, entry, np.where(event, failure, end), event


def latest_rows(snapshots):
    return snapshots.sort_values("taken_at").groupby("serial", as_index=False).last()


def cumulative_at(table, stratum, age):
    """H0 of a ``banded_baseline`` table at one age."""
    pieces = table[table["stratum"] == stratum]
    age_from = pieces["age_from_hours"].to_numpy()
    j = np.searchsorted(age_from, age, side="right") - 1
    return pieces["cumulative_hazard"].iloc[j] + pieces["hazard_per_hour"].iloc[j] * (age - age_from[j])


def band_edges_inside(exit_hours):
    return [hi for _, _, hi in AGE_BANDS[:-1] if hi < np.max(exit_hours)]


def test_fit_returns_the_model_with_learned_attributes(fitted):
    for name in ("coef_", "se_", "baseline_", "stratum_drives_", "strata_", "cohort_table_", "concordance_",
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


def test_probability_combines_lifelines_coefficients_with_the_baseline_increment():
    from lifelines import CoxTimeVaryingFitter

    snapshots, removals, _ = simulate_fleet(n_drives=800, days=60, seed=8, scale_hours=30_000)
    # one stratum (every drive is ATA) and no penalty, so lifelines fits the same model
    model = FleetRiskModel(by=("bus",), penalizer=0.0, holdout=False).fit(snapshots, removals)
    episodes = observations(scan_frame(snapshots), removals, by=("bus",)).episodes
    data = episodes[["serial", "start_hours", "stop_hours", "event", *model.features_]]
    reference = CoxTimeVaryingFitter().fit(data, id_col="serial", event_col="event",
                                           start_col="start_hours", stop_col="stop_hours")
    np.testing.assert_allclose(model.coef_.to_numpy(), reference.params_.to_numpy(), rtol=1e-5)
    age = 12_000.0
    state = latest_rows(snapshots).iloc[[0]].assign(power_on_hours=age, pending_sectors=5.0)
    ours = model.predict_details(state, horizon_days=30).iloc[0]
    assert model.features_ == ["any_pending", "log_pending"]  # the only covariates that vary in fleetsim
    x = np.array([1.0, np.log1p(5.0)])
    centre = data[model.features_].mean().to_numpy()
    stratum = ours["stratum"]
    increment = model.cumulative_baseline(stratum, age + HORIZON_HOURS) - model.cumulative_baseline(stratum, age)
    # P = 1 - exp(-(H0(a + h) - H0(a)) exp(beta (x - centre))) (Klein & Moeschberger 8.8),
    # beta from lifelines' CoxTimeVaryingFitter
    expected = 1 - np.exp(-increment * np.exp(reference.params_.to_numpy() @ (x - centre)))
    assert ours["fail_probability"] == pytest.approx(expected, rel=1e-4)


def test_banded_baseline_agrees_with_the_breslow_estimate_when_failures_are_many(large_fleet):
    from statsmodels.duration.hazard_regression import PHReg

    stratum, x, entry, exit_, event = large_fleet
    cox = StratifiedCox().fit(entry, exit_, event, x[:, None], stratum)
    table = banded_baseline(entry, exit_, event, np.exp((x[:, None] - cox.center_) @ cox.coef_), stratum)
    codes, names = pd.factorize(stratum)
    # independent Breslow baseline per stratum with delayed entry: statsmodels PHReg (lifelines'
    # CoxPHFitter baseline ignores entry_col, lifelines issue #1416). statsmodels gives it at
    # x = 0; ours is at the covariate centre c: H0_c = H0_0 exp(beta c).
    reference = PHReg(exit_, x[:, None], status=event.astype(float), entry=entry, strata=codes,
                      ties="breslow").fit()
    np.testing.assert_allclose(reference.params, cox.coef_, rtol=1e-6)
    for k, name in enumerate(names):
        times, cumulative, _ = reference.baseline_cumulative_hazard[k]
        cumulative = cumulative * np.exp(reference.params @ cox.center_)
        rows = stratum == name
        for edge in band_edges_inside(exit_[rows]):
            breslow = cumulative[times <= edge][-1]
            below = int((event & rows & (exit_ <= edge)).sum())
            # the two weigh ages inside a piece differently, and ours adds one pseudo-failure per
            # band: both effects fade as failures grow (measured: < 0.3 % with ~900 failures below
            # the edge, ~2 % with ~100 at the first edge)
            tolerance = 0.01 if below >= 500 else 0.05
            assert cumulative_at(table, name, edge) == pytest.approx(breslow, rel=tolerance), (name, edge, below)


def test_banded_baseline_without_covariates_agrees_with_nelson_aalen(large_fleet):
    from lifelines import NelsonAalenFitter

    stratum, _, entry, exit_, event = large_fleet
    table = banded_baseline(entry, exit_, event, np.ones(len(entry)), stratum)
    for name in np.unique(stratum):
        rows = stratum == name
        # with no covariates Breslow's estimator is Nelson-Aalen: sum d_i / Y_i (Klein &
        # Moeschberger 4.2; delayed entry 4.6), here from lifelines, no tie smoothing
        reference = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(exit_[rows], event[rows], entry=entry[rows])
        curve = reference.cumulative_hazard_.iloc[:, 0]
        for edge in band_edges_inside(exit_[rows]):
            below = int((event & rows & (exit_ <= edge)).sum())
            tolerance = 0.01 if below >= 500 else 0.05  # as above
            assert cumulative_at(table, name, edge) == pytest.approx(curve[curve.index <= edge].iloc[-1], rel=tolerance)


def test_drives_in_one_band_share_a_nonzero_increment_with_no_failure_in_their_window(clean_fleet):
    from lifelines import ExponentialFitter, PiecewiseExponentialFitter

    snapshots, removals, _ = clean_fleet
    model = FleetRiskModel(holdout=False).fit(snapshots, removals)
    assert model.features_ == []
    drives = observations(scan_frame(snapshots), removals, by=("model",)).drives
    cohort = "Tallow 14T"
    mine = drives[drives["cohort"] == cohort]
    pieces = model.baseline_[model.baseline_["stratum"] == cohort]
    band = pieces[pieces["age_from_hours"] == 8766.0].iloc[0]  # "1-2 years", 14 failures: one piece
    lo, hi = band["age_from_hours"], band["age_to_hours"]
    failures = np.sort(mine.loc[mine["event"].astype(bool), "exit_hours"].to_numpy())
    inside = failures[(failures > lo) & (failures <= hi)]
    # two windows in different gaps between failures, neither holding a failure: Breslow's
    # steps give both zero, interpolating them gives each its own gap's slope
    gaps = [(a, b) for a, b in zip(inside[:-1], inside[1:]) if b - a > HORIZON_HOURS + 20]
    assert len(gaps) >= 2
    ages = np.array([gaps[0][0] + 10, gaps[-1][0] + 10])
    state = latest_rows(snapshots)
    state = state[state["model"] == cohort].head(2).assign(power_on_hours=ages)
    details = model.predict_details(state, horizon_days=30)
    increments = details["baseline_increment"].to_numpy()
    assert increments[0] == pytest.approx(increments[1], rel=1e-12)
    assert increments[0] > 0
    # the band's MLE D_j / E_j from lifelines' PiecewiseExponentialFitter (hazard 1 / lambda_1 on
    # (lo, hi]) and the stratum's D / E from its ExponentialFitter (lambda = E / D), both with
    # delayed entry; ours adds one failure at the stratum rate (model.py: h = (D_j + 1) / (E_j + E / D))
    entry, exit_, event = mine["entry_hours"], mine["exit_hours"], mine["event"]
    piecewise = PiecewiseExponentialFitter(breakpoints=[lo, hi]).fit(exit_, event, entry=entry)
    overall = ExponentialFitter().fit(exit_, event, entry=entry)
    D_j = len(inside)
    E_j = D_j * piecewise.params_["lambda_1_"]
    assert increments[0] == pytest.approx(HORIZON_HOURS * (D_j + 1) / (E_j + overall.lambda_), rel=1e-4)


def test_one_band_without_covariates_is_the_constant_hazard_mle(clean_fleet):
    from lifelines import ExponentialFitter

    snapshots, removals, _ = clean_fleet
    model = FleetRiskModel(by=("bus",), holdout=False, age_bands=(("any age", 0.0, np.inf),),
                           failures_per_piece=None).fit(snapshots, removals)
    assert model.features_ == [] and len(model.baseline_) == 1
    drives = observations(scan_frame(snapshots), removals, by=("bus",)).drives
    # constant hazard with censoring and delayed entry: MLE = failures / total time at risk
    # (exponential distribution, Lawless, Statistical Models and Methods for Lifetime Data; from
    # memory), here lifelines' ExponentialFitter with entry: hazard 1 / lambda_
    reference = ExponentialFitter().fit(drives["exit_hours"], drives["event"], entry=drives["entry_hours"])
    state = latest_rows(snapshots).head(5).assign(power_on_hours=[10.0, 5_000.0, 20_000.0, 30_000.0, 90_000.0])
    details = model.predict_details(state, horizon_days=30)
    np.testing.assert_allclose(details["baseline_increment"], HORIZON_HOURS / reference.lambda_, rtol=1e-6)
    np.testing.assert_allclose(details["fail_probability"], 1 - np.exp(-HORIZON_HOURS / reference.lambda_), rtol=1e-6)


def test_probability_grows_with_the_horizon(fitted, fleet):
    state = latest_rows(fleet[0]).head(50)
    short = fitted.predict_fail_probability(state, horizon_days=7)
    long = fitted.predict_fail_probability(state, horizon_days=90)
    assert (long >= short).all() and (long > short).any()


def test_ages_beyond_the_oldest_seen_continue_at_the_last_pieces_rate(fitted, fleet):
    snapshots, removals, _ = fleet
    state = latest_rows(snapshots).head(1)
    cohort_stratum = fitted.strata_[state["model"].iloc[0]]
    oldest = observations(scan_frame(snapshots), removals).drives.query("cohort == @cohort_stratum")["exit_hours"].max()
    last = fitted.baseline_[fitted.baseline_["stratum"] == cohort_stratum].iloc[-1]
    assert last["age_from_hours"] < oldest and last["age_to_hours"] == np.inf
    details = fitted.predict_details(state.assign(power_on_hours=oldest + 20_000), horizon_days=30).iloc[0]
    # constant hazard past the oldest age: increment = rate x 720 h (docstring of model.py)
    assert details["baseline_increment"] == pytest.approx(last["hazard_per_hour"] * HORIZON_HOURS)
    assert details["fail_probability"] > 0


def test_neighbouring_bands_stay_within_a_small_factor_when_failures_are_few(fitted):
    # the point of the banded baseline: no 30-day increment of a stratum is orders of magnitude
    # off its neighbours' (a few-fold, as the fleetsim hazard t^0.5 and Poisson noise allow)
    for _, pieces in fitted.baseline_.groupby("stratum"):
        rates = pieces["hazard_per_hour"].to_numpy()
        assert (rates > 0).all()
        assert (rates[1:] / rates[:-1]).max() < 10 and (rates[:-1] / rates[1:]).max() < 10


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
    assert loaded.age_bands == fitted.age_bands and loaded.failures_per_piece == fitted.failures_per_piece
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


def test_a_model_saved_with_the_old_capacity_cohort_key_reads_it_by_its_new_name(fitted, tmp_path):
    path = fitted.save(tmp_path)
    meta = json.loads((path / "model.json").read_text())
    meta["config"]["by"] = ["model", "capacity_bytes"]  # as a fit before store format 2 saved it
    (path / "model.json").write_text(json.dumps(meta))
    assert FleetRiskModel.load(path).by == ("model", "user_capacity_bytes")


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
    with pytest.raises(ValueError, match="must start where"):
        FleetRiskModel(age_bands=(("young", 0, 1000), ("old", 2000, np.inf))).fit(*fleet[:2])
    with pytest.raises(ValueError, match="failures_per_piece"):
        FleetRiskModel(failures_per_piece=0).fit(*fleet[:2])
