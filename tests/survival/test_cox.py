"""The stratified counting-process Cox fitter against published values and independent libraries."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from triage.survival.cox import CoxFitError, StratifiedCox, concordance_counting

ROSSI_COVARIATES = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]


@pytest.fixture(scope="module")
def rossi():
    from lifelines.datasets import load_rossi

    return load_rossi()


def test_rossi_coefficients_match_the_published_fit(rossi):
    model = StratifiedCox().fit(np.zeros(len(rossi)), rossi["week"], rossi["arrest"] == 1,
                                rossi[ROSSI_COVARIATES], feature_names=ROSSI_COVARIATES)
    # Fox, "Cox Proportional-Hazards Regression for Survival Data", appendix to An R and S-PLUS
    # Companion to Applied Regression (2002), coxph output for the Rossi recidivism data (Efron ties)
    published_coef = [-0.379, -0.0574, 0.314, -0.150, -0.434, -0.0849, 0.0915]
    published_se = [0.191, 0.0220, 0.308, 0.212, 0.382, 0.196, 0.0286]  # same table, from memory
    for ours, published in zip(model.coef_, published_coef):
        assert ours == pytest.approx(published, abs=6e-4 if abs(published) > 0.1 else 6e-5)
    for ours, published in zip(model.se_, published_se):
        assert ours == pytest.approx(published, abs=6e-4 if published > 0.1 else 6e-5)


def _episodes(seed=1, n=400):
    """Small counting-process data: delayed entry, a covariate that steps up, two strata."""
    rng = np.random.default_rng(seed)
    rows = []
    for drive in range(n):
        start, x1, x2, stratum = rng.uniform(0, 5), rng.normal(), 0, int(rng.integers(2))
        for _ in range(3):
            stop = start + rng.uniform(0.5, 3)
            failed = rng.uniform() < 0.15 * np.exp(0.5 * x1 + 0.7 * x2)
            rows.append((drive, start, stop, failed, x1, x2, stratum))
            if failed:
                break
            start, x2 = stop, x2 + int(rng.uniform() < 0.3)
    return pd.DataFrame(rows, columns=["id", "start", "stop", "event", "x1", "x2", "stratum"])


def test_stratified_episode_fit_matches_lifelines_time_varying_fitter():
    from lifelines import CoxTimeVaryingFitter

    data = _episodes()
    ours = StratifiedCox().fit(data["start"], data["stop"], data["event"], data[["x1", "x2"]], data["stratum"])
    # independent implementation: lifelines CoxTimeVaryingFitter (Efron ties, strata)
    theirs = CoxTimeVaryingFitter().fit(data, id_col="id", event_col="event", start_col="start",
                                         stop_col="stop", strata=["stratum"])
    np.testing.assert_allclose(ours.coef_, theirs.params_.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.se_, theirs.standard_errors_.to_numpy(), rtol=1e-6)


def test_baseline_cumulative_hazard_matches_lifelines():
    from lifelines import CoxTimeVaryingFitter

    data = _episodes(seed=4).drop(columns="stratum")
    ours = StratifiedCox().fit(data["start"], data["stop"], data["event"], data[["x1", "x2"]])
    theirs = CoxTimeVaryingFitter().fit(data, id_col="id", event_col="event", start_col="start", stop_col="stop")
    times, cumulative = ours.baseline_[0]
    # lifelines' Breslow baseline at the covariate means (no tied failure ages in this data)
    reference = theirs.baseline_cumulative_hazard_.iloc[:, 0]
    np.testing.assert_allclose(cumulative, reference.reindex(times).to_numpy(), rtol=1e-6)


def test_breslow_ties_with_entry_and_strata_match_statsmodels():
    from statsmodels.duration.hazard_regression import PHReg

    data = _episodes(seed=7)
    data["stop"] = np.ceil(data["stop"])  # whole units: plenty of tied failure ages
    data = data[data["stop"] > data["start"]]
    ours = StratifiedCox(ties="breslow").fit(data["start"], data["stop"], data["event"],
                                             data[["x1", "x2"]], data["stratum"])
    # independent implementation: statsmodels PHReg with entry=, strata=, ties="breslow"
    theirs = PHReg(data["stop"].to_numpy(), data[["x1", "x2"]].to_numpy(), status=data["event"].to_numpy(int),
                   entry=data["start"].to_numpy(), strata=data["stratum"].to_numpy(), ties="breslow").fit()
    np.testing.assert_allclose(ours.coef_, theirs.params, rtol=1e-5)
    np.testing.assert_allclose(ours.se_, theirs.bse, rtol=1e-4)


def test_known_hazard_ratios_are_recovered_from_simulated_time_varying_data():
    rng = np.random.default_rng(2024)
    n, base_rate, b1, b2 = 3000, 0.02, 0.5, 1.0
    x1 = rng.normal(size=n)
    entry = rng.uniform(0, 50, n)
    switch = entry + rng.exponential(40, n)  # x2 steps from 0 to 1 here
    end = entry + 60
    # piecewise exponential: rate exp(b1 x1) before the switch, exp(b1 x1 + b2) after
    first = entry + rng.exponential(1 / (base_rate * np.exp(b1 * x1)))
    second = switch + rng.exponential(1 / (base_rate * np.exp(b1 * x1 + b2)))
    failure = np.where(first < switch, first, second)
    exit_ = np.minimum(failure, end)
    event = failure <= end
    before = np.minimum(exit_, switch)
    rows = pd.DataFrame({"start": entry, "stop": before, "event": event & (exit_ <= switch), "x1": x1, "x2": 0.0})
    after = exit_ > switch
    rows = pd.concat([rows, pd.DataFrame({"start": switch[after], "stop": exit_[after], "event": event[after],
                                          "x1": x1[after], "x2": 1.0})], ignore_index=True)
    model = StratifiedCox().fit(rows["start"], rows["stop"], rows["event"], rows[["x1", "x2"]])
    for coef, se, truth in zip(model.coef_, model.se_, (b1, b2)):
        assert abs(coef - truth) < 3 * se  # simulated truth within three standard errors


def test_concordance_matches_lifelines_for_right_censored_data(rossi):
    from lifelines.utils import concordance_index

    model = StratifiedCox().fit(np.zeros(len(rossi)), rossi["week"], rossi["arrest"] == 1, rossi[ROSSI_COVARIATES])
    score = np.asarray(rossi[ROSSI_COVARIATES], dtype=float) @ model.coef_
    ours = concordance_counting(np.zeros(len(rossi)), rossi["week"], rossi["arrest"] == 1, score)
    # independent implementation: lifelines' Harrell C (higher predicted score = longer survival)
    theirs = concordance_index(rossi["week"], -score, rossi["arrest"])
    assert ours == pytest.approx(theirs, abs=1e-12)


def test_concordance_only_compares_drives_already_at_risk():
    # the second drive joins after the first one fails: no comparable pair, whatever the scores
    assert np.isnan(concordance_counting([0.0, 12.0], [10.0, 20.0], [True, False], [1.0, 2.0]))


def test_ridge_penalty_keeps_a_never_failing_flag_finite():
    rng = np.random.default_rng(9)
    n = 500
    flag = (rng.uniform(size=n) < 0.05).astype(float)
    stop = rng.exponential(10, n)
    event = (rng.uniform(size=n) < 0.5) & (flag == 0)  # no flagged drive ever fails
    model = StratifiedCox(penalizer=0.1).fit(np.zeros(n), stop, event, flag[:, None])
    assert np.isfinite(model.coef_[0]) and model.coef_[0] < -1


def test_data_without_failures_is_refused_with_a_reason():
    with pytest.raises(CoxFitError, match="no failures"):
        StratifiedCox().fit([0.0, 0.0], [1.0, 2.0], [False, False], [[0.0], [1.0]])


def test_empty_intervals_are_refused():
    with pytest.raises(CoxFitError, match="stop > start"):
        StratifiedCox().fit([5.0], [5.0], [True], [[1.0]])


def test_risk_set_sums_keep_small_hazards_beside_a_huge_one():
    from math import fsum

    from triage.survival.cox import _prepare, _RiskSets

    # Row 0 has exp(eta) = e^60 and leaves early; the rows at risk after it have exp(eta) near 1.
    # A single running sum would leave only rounding noise for them.
    rng = np.random.default_rng(3)
    n = 300
    start = rng.uniform(0, 5, n)
    stop = start + rng.uniform(1, 10, n)
    start[0], stop[0] = 0.0, 1.5
    event = rng.uniform(size=n) < 0.3
    event[0] = True
    eta = rng.normal(0, 1, n)
    eta[0] = 60.0
    (st,) = _prepare(start, stop, event, np.zeros((n, 0)), np.zeros(n))
    at_risk = np.searchsorted(st.times, start, "right") < np.searchsorted(st.times, stop, "right")
    sums = _RiskSets(st, eta[at_risk])
    ours = sums.total() * np.exp(sums.level)
    # the definition, summed exactly (math.fsum): rows with start < t_k <= stop
    expected = [fsum(np.exp(eta[(start < t) & (t <= stop)])) for t in st.times]
    np.testing.assert_allclose(ours, expected, rtol=1e-12)


def test_a_covariate_only_failing_drives_carry_still_fits_to_finite_values():
    # quasi-separation: every drive with x = 1 fails early; the ridge penalty keeps beta finite,
    # and the Newton steps never accept a non-finite likelihood on the way there
    rng = np.random.default_rng(11)
    n = 2000
    x = (rng.uniform(size=n) < 0.004).astype(float)
    stop = np.where(x == 1, rng.uniform(1, 2, n), rng.uniform(1, 100, n))
    event = (x == 1) | (rng.uniform(size=n) < 0.01)
    X = np.column_stack([x, 8 * x])  # large values of a collinear pair push exp(beta.x) to extremes
    model = StratifiedCox(penalizer=0.1).fit(np.zeros(n), stop, event, X)
    assert np.all(np.isfinite(model.coef_)) and np.isfinite(model.log_likelihood_)
    assert model.coef_ @ [1, 8] > 2  # x = 1 clearly raises the hazard
