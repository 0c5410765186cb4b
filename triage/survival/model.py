"""The saved fleet risk model: P(a drive fails within H days | its age, cohort, current SMART state).

    P = 1 - exp( -[H0_s(a + 24 H) - H0_s(a)] * exp(beta . (x - centre)) )

with ``a`` the drive's power-on hours, ``s`` its cohort's stratum, ``x`` its covariates now and
``H0_s`` the stratum's baseline cumulative hazard from the stratified Cox fit (``cox.py``). This
is the conditional survival ``S(a + h | x) / S(a | x)`` of the proportional-hazards model with
the covariates held at their current values over the horizon (Klein & Moeschberger, Survival
Analysis, 2nd ed., 8.8, "estimation of the survival function"; Therneau & Grambsch, Modeling
Survival Data, 10.2). Holding x fixed is the usual forecasting assumption for time-varying
covariates; a drive whose pending sectors keep growing is under-predicted.

Baseline between failure ages: the Breslow step function with each jump spread evenly over the
ages since the previous failure (a piecewise-constant hazard), so a 30-day window never falls
"between two steps" and predicts zero. Beyond the stratum's last failure age: a constant hazard,
the baseline mass of the stratum's last fifth of failures spread over the ages from the first of
them to the oldest age observed in the stratum (nothing is extrapolated with a Weibull: the
Weibull is fitted to whole cohorts, the baseline to a drive at the covariate centre).

Strata: each cohort with at least ``min_stratum_failures`` failures has its own baseline; the
rest share one pooled stratum. A cohort never seen in training gets the drive-weighted mean of
all strata's baseline increments.

Saved form (no pickle): ``<store>/models/fleet-risk-v<N>-<UTC stamp>/`` holding ``model.json``
(configuration, coefficients, strata, data window, checks) and Parquet tables ``baseline``,
``cohorts``, ``calibration``, ``exclusions``. ``N`` counts fits in that store; ``latest_model``
takes the highest. ``model.json`` carries ``format_version``; a newer one than this code knows
is refused with a message, never half-read.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from triage import __version__
from triage.survival.cohorts import cohort_table
from triage.survival.cox import CoxFitError, StratifiedCox, concordance_counting
from triage.survival.observations import (
    COHORT_COLUMNS,
    COVARIATE_SOURCES,
    FEATURES,
    Observations,
    Scan,
    check_by,
    cohort_labels,
    covariate_features,
    observations,
    scan_frame,
)

FORMAT = "triage-fleet-risk"
FORMAT_VERSION = 1
POOLED = "(pooled small cohorts)"
MODEL_DIR = re.compile(r"^fleet-risk-v(\d+)-(\d{8}T\d{6}Z)$")
#: A drive counts as in service at the held-out cut when seen within this many days before it.
ACTIVE_DAYS = 7
TAIL_FRACTION = 0.2


class ModelFormatError(ValueError):
    """A saved model this code cannot read (unknown format, newer version, missing files)."""


class FleetRiskModel:
    """Stratified Cox on SMART covariates, per-cohort AFR/Weibull, saved for fast scoring.

    Configuration (``__init__``) is kept as given; ``fit`` learns attributes ending in ``_``:

    ``coef_``, ``se_`` (Series by covariate), ``center_``, ``features_``, ``strata_`` (cohort ->
    stratum), ``baseline_`` (stratum, age_hours, cumulative_hazard), ``tail_`` (per stratum:
    ``after_hours``, ``rate_per_hour``), ``cohort_table_``, ``exclusions_``, ``concordance_``
    (in-sample, time-dependent Harrell), ``holdout_`` and ``calibration_`` (held-out time split;
    ``None`` when the data window is shorter than two horizons), ``data_window_``.
    """

    def __init__(self, horizon_days: float = 30, by: Sequence[str] = ("model",), count_proactive: bool = True,
                 penalizer: float = 0.1, min_stratum_failures: int = 5, ties: str = "efron",
                 holdout: bool = True):
        self.horizon_days = horizon_days
        self.by = by
        self.count_proactive = count_proactive
        self.penalizer = penalizer
        self.min_stratum_failures = min_stratum_failures
        self.ties = ties
        self.holdout = holdout

    # -- configuration --------------------------------------------------------------------
    def _validated(self) -> None:
        self.by = check_by(self.by)
        if not (isinstance(self.horizon_days, (int, float)) and self.horizon_days > 0):
            raise ValueError(f"horizon_days must be a positive number of days, got {self.horizon_days!r}")
        if self.min_stratum_failures < 1:
            raise ValueError("min_stratum_failures must be at least 1")

    def holdout_cut(self, first_taken_at: pd.Timestamp, last_taken_at: pd.Timestamp) -> pd.Timestamp | None:
        """Start of the held-out window: ``horizon_days`` before the end of the data (UTC midnight),
        or None when fewer than ``horizon_days`` would remain for training."""
        if not self.holdout:
            return None
        end = pd.Timestamp(last_taken_at).tz_convert("UTC").normalize() + pd.Timedelta(days=1)
        cut = (end - pd.Timedelta(days=float(self.horizon_days))).normalize()
        if cut - pd.Timestamp(first_taken_at).tz_convert("UTC") < pd.Timedelta(days=float(self.horizon_days)):
            return None
        return cut

    # -- fitting --------------------------------------------------------------------------
    def fit(self, snapshots: pd.DataFrame, removals: pd.DataFrame,
            progress: Callable[[str], None] | None = None) -> "FleetRiskModel":
        """Fit from snapshot and removal frames (store schema columns); returns self."""
        self._validated()
        if snapshots is None or snapshots.empty:
            raise ValueError("no snapshots to fit on")
        taken = pd.to_datetime(snapshots["taken_at"], utc=True)
        cut = self.holdout_cut(taken.min(), taken.max())
        return self.fit_scan(scan_frame(snapshots, cut=cut), removals, cut=cut, progress=progress)

    def fit_scan(self, scan: Scan, removals: pd.DataFrame, cut: pd.Timestamp | None = None,
                 progress: Callable[[str], None] | None = None) -> "FleetRiskModel":
        """Fit from a scan whose chunks break at ``cut`` (``scan_store(..., cut=...)``)."""
        self._validated()
        say = progress or (lambda message: None)
        if scan.empty:
            raise ValueError("no snapshots to fit on")
        say("building the observation table")
        obs = observations(scan, removals, self.by, self.count_proactive)
        say(f"{len(obs.drives)} drives, {int(obs.drives['event'].sum())} failures, "
            f"{len(obs.episodes)} covariate episodes, {len(obs.exclusions)} excluded")
        say("fitting AFR and Weibull per cohort")
        self.cohort_table_ = cohort_table(obs)
        say("fitting the stratified Cox model")
        self._fit_observations(obs)
        self.exclusions_ = obs.exclusions
        self.data_window_ = {
            "first_taken_at": _iso(scan.first_taken_at),
            "last_taken_at": _iso(scan.last_taken_at),
            "snapshots": int(scan.rows_read),
            "drives": int(len(obs.drives)),
            "failures": int(obs.drives["event"].sum()),
            "episodes": int(len(obs.episodes)),
            "excluded_drives": int(len(obs.exclusions)),
        }
        self.holdout_, self.calibration_ = None, None
        if cut is not None:
            say(f"checking calibration on the {self.horizon_days:g} days from {cut:%Y-%m-%d}")
            self._evaluate_holdout(scan, removals, obs, cut)
        self.fitted_at_ = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
        return self

    def _fit_observations(self, obs: Observations) -> None:
        episodes = obs.episodes
        if episodes.empty or not episodes["event"].any():
            raise CoxFitError("no failures among the drives observed: nothing to fit "
                              "(the removal log needs rows with reason 'failed' or 'proactive')")
        failures = obs.drives.groupby("cohort")["event"].sum()
        own = failures.index[failures >= self.min_stratum_failures]
        self.strata_ = {c: (c if c in own else POOLED) for c in failures.index}
        strata = episodes["cohort"].map(self.strata_).to_numpy()
        X_all = episodes[list(FEATURES)].to_numpy(dtype=float)
        # a covariate that never varies cannot be estimated (and would make the fit singular)
        varies = X_all.max(axis=0) > X_all.min(axis=0)
        self.features_ = [f for f, v in zip(FEATURES, varies) if v]
        X = X_all[:, varies]
        cox = StratifiedCox(penalizer=self.penalizer, ties=self.ties).fit(
            episodes["start_hours"], episodes["stop_hours"], episodes["event"], X, strata,
            feature_names=self.features_)
        self.coef_ = pd.Series(cox.coef_, index=self.features_, name="coef", dtype=float)
        self.se_ = pd.Series(cox.se_, index=self.features_, name="se", dtype=float)
        self.center_ = pd.Series(cox.center_, index=self.features_, name="center", dtype=float)
        self.n_iter_ = cox.n_iter_
        self.concordance_ = concordance_counting(episodes["start_hours"], episodes["stop_hours"],
                                                 episodes["event"], X @ cox.coef_, strata)
        self._set_baseline(cox, obs)

    def _set_baseline(self, cox: StratifiedCox, obs: Observations) -> None:
        drives = obs.drives.assign(stratum=obs.drives["cohort"].map(self.strata_).fillna(POOLED))
        frames, tail, sizes = [], {}, {}
        for stratum, group in drives.groupby("stratum"):
            sizes[stratum] = int(len(group))
            if stratum not in cox.baseline_:
                continue
            times, cumhaz = cox.baseline_[stratum]
            youngest = float(group["entry_hours"].min())
            oldest = float(group["exit_hours"].max())
            ages = np.concatenate([[min(youngest, times[0])], times])
            values = np.concatenate([[0.0], cumhaz])
            m = len(times)
            n_tail = max(1, math.ceil(TAIL_FRACTION * m))
            j = m - n_tail  # knot index before the tail's first failure
            span = max(oldest - ages[j], 1.0)
            tail[stratum] = {"after_hours": float(ages[-1]), "rate_per_hour": float((values[-1] - values[j]) / span)}
            frames.append(pd.DataFrame({"stratum": stratum, "age_hours": ages, "cumulative_hazard": values}))
        self.baseline_ = pd.concat(frames, ignore_index=True)
        self.tail_ = tail
        self.stratum_drives_ = {s: n for s, n in sizes.items() if s in tail}

    # -- prediction -----------------------------------------------------------------------
    def _check_fitted(self) -> None:
        if not hasattr(self, "coef_"):
            raise ValueError("this FleetRiskModel is not fitted yet: call fit() or FleetRiskModel.load()")

    def cumulative_baseline(self, stratum: str, age_hours) -> np.ndarray:
        """H0_s(age): interpolated baseline, continued at the tail rate past the last failure age."""
        knots = self.baseline_[self.baseline_["stratum"] == stratum]
        ages = knots["age_hours"].to_numpy(dtype=float)
        values = knots["cumulative_hazard"].to_numpy(dtype=float)
        age = np.asarray(age_hours, dtype=float)
        tail = self.tail_[stratum]
        inside = np.interp(age, ages, values, left=0.0)
        beyond = values[-1] + tail["rate_per_hour"] * (age - tail["after_hours"])
        return np.where(age > tail["after_hours"], beyond, inside)

    def predict_details(self, latest_state: pd.DataFrame, horizon_days: float | None = None) -> pd.DataFrame:
        """Per drive: cohort, stratum, age, relative hazard, baseline increment and probability."""
        self._check_fitted()
        horizon = float(self.horizon_days if horizon_days is None else horizon_days)
        if not horizon > 0:
            raise ValueError("horizon_days must be positive")
        needed = ["serial", "power_on_hours", *self.by]
        missing = [c for c in needed if c not in latest_state.columns]
        if missing:
            raise ValueError(f"latest state lacks column(s) {', '.join(missing)}")
        state = latest_state
        if "taken_at" in state.columns:
            state = state.sort_values("taken_at", kind="stable")
        state = state.drop_duplicates("serial", keep="last").reset_index(drop=True)
        age = pd.to_numeric(state["power_on_hours"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        cohort = cohort_labels(state, self.by).to_numpy()
        stratum = pd.Series(cohort).map(self.strata_).to_numpy(dtype=object)
        X = covariate_features(state)[self.features_].to_numpy(dtype=float)
        relative = np.exp((X - self.center_.to_numpy()) @ self.coef_.to_numpy())
        end = age + 24.0 * horizon
        increment = np.full(len(state), np.nan)
        for s in self.tail_:
            rows = stratum == s
            if rows.any():
                increment[rows] = self.cumulative_baseline(s, end[rows]) - self.cumulative_baseline(s, age[rows])
        unknown = pd.isna(stratum) | ~np.isin(stratum.astype(str), list(self.tail_))
        if unknown.any():
            weights = np.array([self.stratum_drives_[s] for s in self.tail_], dtype=float)
            each = np.vstack([self.cumulative_baseline(s, end[unknown]) - self.cumulative_baseline(s, age[unknown])
                              for s in self.tail_])
            increment[unknown] = weights @ each / weights.sum()
        probability = 1.0 - np.exp(-np.clip(increment, 0, None) * relative)
        return pd.DataFrame({
            "serial": state["serial"].to_numpy(),
            "cohort": cohort,
            "stratum": np.where(unknown, None, stratum),
            "age_hours": age,
            "relative_hazard": relative,
            "baseline_increment": increment,
            "fail_probability": probability,
        })

    def predict_fail_probability(self, latest_state: pd.DataFrame, horizon_days: float | None = None) -> pd.Series:
        """P(fail within ``horizon_days`` | age, cohort, current covariates), indexed by serial.

        ``latest_state``: snapshot rows (store schema columns; the latest per serial is used).
        NaN where the drive's power-on hours are unknown.
        """
        details = self.predict_details(latest_state, horizon_days)
        return pd.Series(details["fail_probability"].to_numpy(), index=pd.Index(details["serial"], name="serial"),
                         name="fail_probability")

    def coefficients(self) -> pd.DataFrame:
        self._check_fitted()
        z = 1.959963984540054
        return pd.DataFrame({"coef": self.coef_, "se": self.se_, "hazard_ratio": np.exp(self.coef_),
                             "hazard_ratio_low": np.exp(self.coef_ - z * self.se_),
                             "hazard_ratio_high": np.exp(self.coef_ + z * self.se_)})

    # -- held-out check -------------------------------------------------------------------
    def _evaluate_holdout(self, scan: Scan, removals: pd.DataFrame, full: Observations, cut: pd.Timestamp) -> None:
        from lifelines.utils import concordance_index

        train = observations(scan, removals, self.by, self.count_proactive, until=cut)
        trial = FleetRiskModel(horizon_days=self.horizon_days, by=self.by, count_proactive=self.count_proactive,
                               penalizer=self.penalizer, min_stratum_failures=self.min_stratum_failures,
                               ties=self.ties, holdout=False)
        trial._validated()
        try:
            trial._fit_observations(train)
        except CoxFitError:
            return
        drives = train.drives
        active = drives["removal_reason"].isna() & (drives["last_taken_at"] >= cut - pd.Timedelta(days=ACTIVE_DAYS))
        at_cut = drives[active.to_numpy()].copy()
        hours_since = (cut - at_cut["last_taken_at"]).dt.total_seconds().to_numpy() / 3600
        at_cut["power_on_hours"] = at_cut["last_hours"].to_numpy(dtype=float) + hours_since
        outcome = full.drives.set_index("serial")[["event", "exit_at"]]
        at_cut = at_cut[at_cut["serial"].isin(outcome.index)]
        if at_cut.empty:
            return
        predicted = trial.predict_fail_probability(at_cut).to_numpy()
        later = outcome.loc[at_cut["serial"]]
        exit_days = ((later["exit_at"] - cut).dt.total_seconds() / 86400).to_numpy()
        failed = later["event"].to_numpy(dtype=bool) & (exit_days < float(self.horizon_days))
        duration = np.clip(np.minimum(exit_days, float(self.horizon_days)), 1e-6, None)
        concordance = (concordance_index(duration, -predicted, failed)
                       if failed.any() and not failed.all() else float("nan"))
        self.holdout_ = {
            "cut": _iso(cut),
            "horizon_days": float(self.horizon_days),
            "drives": int(len(at_cut)),
            "predicted_failures": float(predicted.sum()),
            "observed_failures": int(failed.sum()),
            "concordance": float(concordance),
        }
        self.calibration_ = calibration_table(predicted, failed)

    # -- persistence ----------------------------------------------------------------------
    def save(self, models_dir: Path | str) -> Path:
        """Write the model under ``models_dir`` as ``fleet-risk-v<N>-<stamp>/``; returns that path."""
        self._check_fitted()
        models_dir = Path(models_dir)
        models_dir.mkdir(parents=True, exist_ok=True)
        number = 1 + max((int(m.group(1)) for m in map(MODEL_DIR.match, os.listdir(models_dir)) if m), default=0)
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        final = models_dir / f"fleet-risk-v{number}-{stamp}"
        temp = models_dir / f".{final.name}.tmp"
        if temp.exists():
            shutil.rmtree(temp)
        temp.mkdir()
        meta = {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "triage_version": __version__,
            "fitted_at": self.fitted_at_,
            "config": {"horizon_days": self.horizon_days, "by": list(self.by),
                       "count_proactive": self.count_proactive, "penalizer": self.penalizer,
                       "min_stratum_failures": self.min_stratum_failures, "ties": self.ties,
                       "holdout": self.holdout},
            "features": self.features_,
            "coefficients": {f: {"coef": float(self.coef_[f]), "se": float(self.se_[f]),
                                 "center": float(self.center_[f])} for f in self.features_},
            "strata": self.strata_,
            "stratum_drives": self.stratum_drives_,
            "tail": self.tail_,
            "concordance": _num(self.concordance_),
            "holdout": self.holdout_,
            "data_window": self.data_window_,
            "n_iter": self.n_iter_,
        }
        (temp / "model.json").write_text(json.dumps(meta, indent=2, sort_keys=True, allow_nan=True) + "\n",
                                         encoding="utf-8")
        self.baseline_.to_parquet(temp / "baseline.parquet", index=False)
        self.cohort_table_.to_parquet(temp / "cohorts.parquet", index=False)
        self.exclusions_.to_parquet(temp / "exclusions.parquet", index=False)
        if self.calibration_ is not None:
            self.calibration_.to_parquet(temp / "calibration.parquet", index=False)
        os.replace(temp, final)
        self.path_ = final
        return final

    @classmethod
    def load(cls, path: Path | str) -> "FleetRiskModel":
        path = Path(path)
        meta_path = path / "model.json"
        if not meta_path.is_file():
            raise ModelFormatError(f"{path}: no model.json (not a saved fleet risk model)")
        try:
            meta = json.loads(meta_path.read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise ModelFormatError(f"{meta_path}: not valid JSON ({exc})") from None
        if meta.get("format") != FORMAT:
            raise ModelFormatError(f"{meta_path}: format {meta.get('format')!r} is not {FORMAT!r}")
        version = meta.get("format_version")
        if not isinstance(version, int) or version > FORMAT_VERSION:
            raise ModelFormatError(f"{meta_path}: format_version {version!r} is newer than this triage reads "
                                   f"({FORMAT_VERSION}); refit with 'triage fit' or upgrade triage")
        model = cls(**meta["config"])
        model._validated()
        model.features_ = list(meta["features"])
        coefficients = meta["coefficients"]
        model.coef_ = pd.Series({f: coefficients[f]["coef"] for f in model.features_}, name="coef", dtype=float)
        model.se_ = pd.Series({f: coefficients[f]["se"] for f in model.features_}, name="se", dtype=float)
        model.center_ = pd.Series({f: coefficients[f]["center"] for f in model.features_}, name="center", dtype=float)
        model.strata_ = meta["strata"]
        model.stratum_drives_ = meta["stratum_drives"]
        model.tail_ = meta["tail"]
        model.concordance_ = meta["concordance"]
        model.holdout_ = meta["holdout"]
        model.data_window_ = meta["data_window"]
        model.fitted_at_ = meta["fitted_at"]
        model.n_iter_ = meta.get("n_iter")
        model.baseline_ = pd.read_parquet(path / "baseline.parquet")
        model.cohort_table_ = pd.read_parquet(path / "cohorts.parquet")
        model.exclusions_ = pd.read_parquet(path / "exclusions.parquet")
        calibration = path / "calibration.parquet"
        model.calibration_ = pd.read_parquet(calibration) if calibration.is_file() else None
        model.path_ = path
        return model


def calibration_table(predicted: np.ndarray, failed: np.ndarray, groups: int = 10) -> pd.DataFrame:
    """Predicted against observed failures per decile of predicted probability."""
    predicted = np.asarray(predicted, dtype=float)
    failed = np.asarray(failed, dtype=bool)
    groups = max(1, min(groups, len(predicted)))
    ranks = pd.Series(predicted).rank(method="first").to_numpy()
    decile = np.ceil(ranks / len(predicted) * groups).astype(int)
    frame = pd.DataFrame({"decile": decile, "p": predicted, "failed": failed})
    out = frame.groupby("decile").agg(drives=("p", "size"), mean_predicted=("p", "mean"),
                                       predicted_failures=("p", "sum"), observed_failures=("failed", "sum"))
    out["observed_rate"] = out["observed_failures"] / out["drives"]
    return out.reset_index()


def latest_model(store) -> FleetRiskModel | None:
    """The newest saved model of ``store`` (a ``Store``, or a store root path), or None.

    Newest = highest fit number ``N`` in ``fleet-risk-v<N>-<stamp>``. Raises ModelFormatError
    when that model cannot be read (it does not silently fall back to an older one).
    """
    models_dir = Path(store.models_dir) if hasattr(store, "models_dir") else Path(store) / "models"
    if not models_dir.is_dir():
        return None
    found = []
    for entry in models_dir.iterdir():
        match = MODEL_DIR.match(entry.name)
        if match and entry.is_dir():
            found.append((int(match.group(1)), match.group(2), entry))
    if not found:
        return None
    return FleetRiskModel.load(max(found)[2])


def _iso(moment) -> str | None:
    if moment is None or pd.isna(moment):
        return None
    return pd.Timestamp(moment).tz_convert("UTC").isoformat()


def _num(value) -> float | None:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else float(value)


__all__ = ["FleetRiskModel", "latest_model", "calibration_table", "ModelFormatError", "POOLED",
           "COHORT_COLUMNS", "COVARIATE_SOURCES"]
