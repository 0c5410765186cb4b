"""The landmark model: drive states at a date, window outcomes, and the penalised Poisson fit."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.optimize
import statsmodels.api as sm

from triage.survival import landmark as lm

T0 = pd.Timestamp("2026-03-01T00:00:00Z")


def snapshot(serial, day, poh, **counters):
    row = {"serial": serial, "taken_at": T0 + pd.Timedelta(days=day, hours=2), "power_on_hours": poh,
           "model": "QH-HD8T-A", "firmware": "QA02", "bus": "ata", "user_capacity_bytes": 8_000_000_000_000}
    row.update(counters)
    return row


def removal(serial, day, reason, hours=12):
    return {"serial": serial, "removed_at": T0 + pd.Timedelta(days=day, hours=hours), "reason": reason}


def removals_frame(rows):
    frame = pd.DataFrame(rows, columns=["serial", "removed_at", "reason"])
    frame["removed_at"] = pd.to_datetime(frame["removed_at"], utc=True)
    return frame


# -- states ---------------------------------------------------------------------------------

def test_a_drive_is_in_service_only_when_seen_in_the_week_before_and_not_removed():
    rows = [snapshot("SEEN", d, 1000 + 24 * d) for d in range(10)]
    rows += [snapshot("QUIET", d, 5000 + 24 * d) for d in range(2)]  # last seen day 1
    rows += [snapshot("GONE", d, 9000 + 24 * d) for d in range(8)]
    history = pd.DataFrame(rows)
    moment = T0 + pd.Timedelta(days=10)
    states = lm.states_from_history(history, moment, removals_frame([removal("GONE", 8, "failed")]))
    assert list(states["serial"]) == ["SEEN"]


def test_a_drive_seen_again_after_its_removal_is_back_in_service():
    rows = [snapshot("BACK", d, 100 + 24 * d) for d in (0, 1, 2, 6, 7)]
    history = pd.DataFrame(rows)
    states = lm.states_from_history(history, T0 + pd.Timedelta(days=8), removals_frame([removal("BACK", 3, "failed")]))
    assert list(states["serial"]) == ["BACK"]


def test_age_at_the_landmark_adds_the_hours_since_the_latest_capture():
    history = pd.DataFrame([snapshot("A", 0, 1000)])
    moment = T0 + pd.Timedelta(days=1)  # latest capture at 02:00 on day 0: 22 h before
    states = lm.states_from_history(history, moment)
    assert states["age_hours"].iloc[0] == pytest.approx(1022.0)


def test_growth_is_measured_against_the_capture_two_weeks_back():
    rows = [snapshot("G", d, 24 * d, pending_sectors=p, reallocated_sectors=0)
            for d, p in ((0, 0), (5, 3), (20, 10), (21, 40))]
    states = lm.states_from_history(pd.DataFrame(rows), T0 + pd.Timedelta(days=22))
    # base: the latest capture at or before day 22 - 14 = day 8, i.e. day 5 (3 pending)
    assert states["growth_pending"].iloc[0] == pytest.approx(np.log1p(40 - 3))
    assert states["any_growth"].iloc[0] == 1.0
    assert states["growth_reallocated"].iloc[0] == 0.0


def test_the_tracker_gives_the_same_states_as_the_history_frame():
    rng = np.random.default_rng(3)
    rows = []
    for i in range(30):
        pending = np.cumsum(rng.integers(0, 2, size=40) * rng.integers(0, 5, size=40))
        for d in range(40):
            if rng.uniform() < 0.9:
                rows.append(snapshot(f"S{i:03d}", d, 500 * i + 24 * d, pending_sectors=int(pending[d])))
    history = pd.DataFrame(rows)
    marks = lm.landmark_dates(history["taken_at"].min(), history["taken_at"].max())
    stacked = lm.landmark_states(lm.frame_reader(history), marks)
    for moment in marks[2:]:
        direct = lm.states_from_history(history, moment).set_index("serial").sort_index()
        tracked = stacked[stacked["landmark"] == moment].set_index("serial").sort_index()
        assert list(tracked.index) == list(direct.index)
        for column in ("age_hours", "growth_pending", "any_pending", "log_pending"):
            np.testing.assert_allclose(tracked[column].to_numpy(float), direct[column].to_numpy(float))


def test_the_drives_own_verdict_reads_the_prefail_trip_and_nvme_warning_bits():
    frame = pd.DataFrame({"prefail_tripped": pd.array([True, False, None, False], dtype="boolean"),
                          "nvme_critical_warning": [np.nan, 0, 4, np.nan]})
    assert list(lm.self_assessment(frame)) == [True, False, True, False]


# -- outcomes -------------------------------------------------------------------------------

def test_window_outcomes_count_the_first_removal_after_the_landmark_within_the_horizon():
    landmark = T0 + pd.Timedelta(days=10)
    states = pd.DataFrame({"serial": ["FAIL", "PULL", "LATE", "QUIET", "EARLY"], "landmark": landmark})
    removals = removals_frame([removal("FAIL", 15, "failed", hours=0),      # 5 days in: event
                               removal("PULL", 12, "proactive", hours=0),   # 2 days in: censored
                               removal("LATE", 50, "failed", hours=0),      # after 30 days: not counted
                               removal("EARLY", 9, "retired", hours=0)])    # before the landmark: ignored
    out = lm.window_outcomes(states, removals, horizon_days=30, data_end=T0 + pd.Timedelta(days=100))
    assert list(out["failed"]) == [True, False, False, False, False]
    np.testing.assert_allclose(out["exposure_days"], [5.0, 2.0, 30.0, 30.0, 30.0])


def test_window_outcomes_stop_at_the_end_of_the_data_and_ignore_later_removals():
    landmark = T0 + pd.Timedelta(days=10)
    states = pd.DataFrame({"serial": ["A"], "landmark": landmark})
    removals = removals_frame([removal("A", 25, "failed", hours=0)])
    out = lm.window_outcomes(states, removals, horizon_days=30, data_end=T0 + pd.Timedelta(days=20))
    assert not out["failed"].iloc[0]
    assert out["exposure_days"].iloc[0] == pytest.approx(10.0)


def test_proactive_pulls_are_events_when_asked():
    states = pd.DataFrame({"serial": ["PULL"], "landmark": T0})
    removals = removals_frame([removal("PULL", 2, "proactive", hours=0)])
    out = lm.window_outcomes(states, removals, 30, T0 + pd.Timedelta(days=60), events=("failed", "proactive"))
    assert out["failed"].iloc[0]


# -- the fit --------------------------------------------------------------------------------

def poisson_data(seed=0, n=4000):
    rng = np.random.default_rng(seed)
    x1 = rng.uniform(size=n) < 0.2
    x2 = rng.normal(size=n)
    exposure = rng.uniform(1, 30, size=n)
    rate = np.exp(-6 + 1.5 * x1 + 0.3 * x2)
    events = rng.poisson(rate * exposure)
    X = np.column_stack([np.ones(n), x1, x2])
    return X, events, exposure


def test_unpenalised_fit_matches_statsmodels_poisson_glm_with_an_offset():
    X, d, e = poisson_data()
    theta, covariance, _ = lm.penalised_poisson(X, d, e, np.zeros((3, 3)))
    # independent reference: statsmodels GLM, Poisson family, log link, offset log(exposure)
    reference = sm.GLM(d, X, family=sm.families.Poisson(), offset=np.log(e)).fit()
    np.testing.assert_allclose(theta, reference.params, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(np.sqrt(np.diag(covariance)), reference.bse, rtol=1e-5)


def test_penalised_fit_is_the_maximum_a_general_optimiser_finds():
    X, d, e = poisson_data(seed=1, n=500)
    P = np.diag([0.0, 4.0, 1.0])
    theta, _, _ = lm.penalised_poisson(X, d, e, P, weight=0.25)

    def negative(t):
        eta = X @ t
        return -(0.25 * (d @ eta - e @ np.exp(eta)) - 0.5 * t @ P @ t)

    # independent reference: scipy's BFGS on the same objective
    reference = scipy.optimize.minimize(negative, np.zeros(3), method="BFGS", options={"gtol": 1e-10})
    np.testing.assert_allclose(theta, reference.x, atol=1e-4)


def landmark_rows(rng, n, band_ages, rate_per_day, window=30.0, shares=None):
    """Stacked rows with a known rate per age band and no covariates."""
    age = rng.choice(band_ages, size=n, p=shares)
    rate = np.array([rate_per_day[a] for a in age])
    time = rng.exponential(1 / rate)
    failed = time < window
    states = pd.DataFrame({"serial": [f"D{i}" for i in range(n)], "age_hours": age.astype(float),
                           "model": "QH-HD8T-A", "firmware": "QA02", "bus": "ata",
                           "user_capacity_bytes": 8_000_000_000_000})
    for name in lm.LANDMARK_FEATURES:
        states[name] = 0.0
    outcomes = pd.DataFrame({"failed": failed, "exposure_days": np.where(failed, time, window)})
    return states, outcomes


def test_an_age_band_without_failures_is_pulled_to_its_neighbours_not_to_zero():
    rng = np.random.default_rng(5)
    # bands '1-2 years' and '3-5 years' have failures; '2-3 years' has few drives (about 1.5
    # failures expected) and, by chance, none
    ages = {1.5 * 8766: 2e-4, 2.5 * 8766: 2e-4, 4 * 8766: 2e-4}
    states, outcomes = landmark_rows(rng, 6000, np.array(list(ages)), ages, shares=[0.46, 0.04, 0.5])
    middle = states["age_hours"] == 2.5 * 8766
    outcomes.loc[middle, "failed"] = False
    outcomes.loc[middle, "exposure_days"] = 30.0
    model = lm.LandmarkModel(horizon_days=30, step_days=30).fit(states, outcomes)
    rates = {a: model.rate_per_day(states[states["age_hours"] == a].head(1))[0] for a in ages}
    # the maximum-likelihood rate of the empty band is 0; the smoothed one stays within 3x of its neighbours
    assert rates[2.5 * 8766] > rates[1.5 * 8766] / 3
    assert rates[2.5 * 8766] > rates[4 * 8766] / 3


def test_with_plenty_of_failures_the_fit_recovers_the_band_rates():
    rng = np.random.default_rng(8)
    ages = {0.1 * 8766: 4e-4, 1.5 * 8766: 1e-4, 6 * 8766: 3e-4}
    states, outcomes = landmark_rows(rng, 60_000, np.array(list(ages)), ages)
    model = lm.LandmarkModel(horizon_days=30, step_days=30).fit(states, outcomes)
    for age, truth in ages.items():
        rate = model.rate_per_day(states[states["age_hours"] == age].head(1))[0]
        # failures per band are in the hundreds: ~10 % standard error, 25 % is > 2.5 se
        assert rate == pytest.approx(truth, rel=0.25)


def test_probability_over_d_days_is_one_minus_exp_of_rate_times_d():
    rng = np.random.default_rng(2)
    ages = {2 * 8766: 1e-3}
    states, outcomes = landmark_rows(rng, 3000, np.array(list(ages)), ages)
    model = lm.LandmarkModel(horizon_days=30, step_days=30).fit(states, outcomes)
    rate = model.rate_per_day(states.head(1))[0]
    assert model.predict_proba(states.head(1), days=90)[0] == pytest.approx(1 - np.exp(-90 * rate))


def test_saved_and_restored_landmark_model_predicts_the_same():
    rng = np.random.default_rng(4)
    ages = {1.5 * 8766: 5e-4, 4 * 8766: 2e-4}
    states, outcomes = landmark_rows(rng, 4000, np.array(list(ages)), ages)
    model = lm.LandmarkModel(horizon_days=30).fit(states, outcomes)
    again = lm.LandmarkModel.from_dict(model.to_dict())
    np.testing.assert_allclose(again.predict_proba(states), model.predict_proba(states))


def test_no_failure_at_all_cannot_be_fitted():
    rng = np.random.default_rng(4)
    states, outcomes = landmark_rows(rng, 100, np.array([8766.0]), {8766.0: 1e-9})
    outcomes["failed"] = False
    with pytest.raises(lm.FitError, match="no failures"):
        lm.LandmarkModel().fit(states, outcomes)
