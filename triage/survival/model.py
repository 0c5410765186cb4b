"""The saved fleet risk model: P(a drive fails within H days | its age, cohort, current SMART state).

    P = 1 - exp( -[H0_s(a + 24 H) - H0_s(a)] * exp(beta . (x - centre)) )

with ``a`` the drive's power-on hours, ``s`` its cohort's stratum, ``x`` its covariates now and
``H0_s`` the stratum's baseline cumulative hazard at the covariate centre. This is the
conditional survival ``S(a + h | x) / S(a | x)`` of the proportional-hazards model with the
covariates held at their current values over the horizon (Klein & Moeschberger, Survival
Analysis, 2nd ed., 8.8, "estimation of the survival function"; Therneau & Grambsch, Modeling
Survival Data, 10.2). Holding x fixed is the usual forecasting assumption for time-varying
covariates; a drive whose pending sectors keep growing is under-predicted.

Baseline: piecewise-constant hazard per stratum (``banded_baseline``). ``beta`` and ``centre``
come from the stratified Cox fit (``cox.py``); the baseline hazard is then constant on age pieces
``(a_j, a_j+1]`` and estimated on each piece from failures over relative-hazard-weighted
drive-hours:

    D_j = failures of the stratum at ages in (a_j, a_j+1]
    E_j = sum over covariate episodes i of w_i * |(start_i, stop_i] n (a_j, a_j+1]|,
          w_i = exp(beta . (x_i - centre))
    h_j = (D_j + s_j) / (E_j + s_j * E / D)   E = sum_j E_j,  D = sum_j D_j,
                                              s_j = 1 / (number of pieces in piece j's band)
    H0_s(a) = sum_j h_j * |(a_j, a_j+1] n (0, a]|

Without the ``s_j`` terms, ``h_j = D_j / E_j`` is the maximum-likelihood baseline of the
piecewise-exponential proportional-hazards model with beta held at the Cox estimate: the
log-likelihood in ``h_j`` is ``D_j log h_j - h_j E_j`` (Holford, Biometrics 36, 1980; Laird &
Olivier, JASA 76, 1981; Friedman, Annals of Statistics 10, 1982; Brostrom, Event History
Analysis with R, 2nd ed., 4.3). Breslow's estimator is this same MLE with one piece between
each pair of consecutive failure ages and censorings moved to the start of their piece (Breslow,
discussion of Cox 1972, JRSS B 34; from memory) -- the "jump spread over the ages since the
previous failure" this module used before. With only tens of failures per stratum those
one-failure pieces make a 30-day increment swing by orders of magnitude between neighbouring
ages; pieces holding ~``failures_per_piece`` failures remove that at the cost of some age
resolution, and agree with Breslow at piece edges once failures are many (tests: against
statsmodels' Breslow baseline and lifelines' Nelson-Aalen).

``s_j`` and ``E / D``: each age band carries one pseudo-failure at the stratum's overall rate
``D / E`` (shared evenly by the band's pieces): a gamma prior with that mean, and ``h_j`` is the
posterior mean for a Poisson count ``D_j`` with exposure ``E_j`` (Gelman et al., Bayesian Data
Analysis, 3rd ed., 2.6, Poisson model with exposure; from memory). A band with exposure but no
failure gets ``1 / (E_b + E / D)``: small, honest, never zero; a band with ``D_b`` failures is
moved by about ``1 / D_b`` of its rate, which vanishes as failures grow (one pseudo-failure per
*piece* would not: pieces hold a fixed ``failures_per_piece``); with one band it is exactly the
constant-hazard MLE ``D / E``. Shrinking was chosen over merging empty bands with a neighbour
because merging moves band edges with the data, and a drive's prediction would jump when one
failure more or less changed which bands merge.

Pieces: the age bands of ``curves.AGE_BANDS`` (``age_bands``), cut at the stratum's youngest
entry and oldest exit age; a band holding ``D_b >= 2 * failures_per_piece`` failures is split
into ``floor(D_b / failures_per_piece)`` equal-width pieces (25 failures: about 20 % relative
standard error per piece, our choice, no source). The first piece reaches down to age 0 and the
last one up to any age: a drive older than any the stratum has seen continues at the rate of its
oldest piece (nothing is extrapolated with a Weibull: the Weibull is fitted to whole cohorts,
the baseline to a drive at the covariate centre).

Strata: each cohort with at least ``min_stratum_failures`` failures has its own baseline; the
rest share one pooled stratum. A cohort never seen in training, or whose stratum had no failure,
gets the drive-weighted mean of all strata's baseline increments.

Saved form (no pickle): ``<store>/models/fleet-risk-v<N>-<UTC stamp>/`` holding ``model.json``
(configuration, coefficients, strata, data window, checks) and Parquet tables ``baseline`` (one
row per stratum and piece: ``age_from_hours``, ``age_to_hours``, ``failures``,
``exposure_hours``, ``hazard_per_hour``, ``cumulative_hazard`` at ``age_from_hours``),
``cohorts``, ``calibration``, ``exclusions``. ``N`` counts fits in that store; ``latest_model``
takes the highest. ``model.json`` carries ``format_version``; any other version than this code
writes is refused with a message, never half-read (version 1 held the interpolated Breslow steps
and a tail rate: refit).
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
from triage.survival.curves import AGE_BANDS
from triage.survival.observations import (
    COHORT_COLUMNS,
    COVARIATE_SOURCES,
    FEATURES,
    Observations,
    RENAMED_COHORT_KEYS,
    Scan,
    check_by,
    cohort_labels,
    covariate_features,
    observations,
    scan_frame,
)

FORMAT = "triage-fleet-risk"
FORMAT_VERSION = 3  # 3: temperature_band replaced temperature_step
POOLED = "(pooled small cohorts)"
MODEL_DIR = re.compile(r"^fleet-risk-v(\d+)-(\d{8}T\d{6}Z)$")
#: A drive counts as in service at the held-out cut when seen within this many days before it.
ACTIVE_DAYS = 7
#: Failures per baseline piece once an age band has plenty (module docstring).
FAILURES_PER_PIECE = 25
BASELINE_COLUMNS = ("stratum", "age_from_hours", "age_to_hours", "failures", "exposure_hours",
                    "hazard_per_hour", "cumulative_hazard")


class ModelFormatError(ValueError):
    """A saved model this code cannot read (unknown format, newer version, missing files)."""


class FleetRiskModel:
    """Stratified Cox on SMART covariates, per-cohort AFR/Weibull, saved for fast scoring.

    Configuration (``__init__``) is kept as given; ``fit`` learns attributes ending in ``_``:

    ``coef_``, ``se_`` (Series by covariate), ``center_``, ``features_``, ``strata_`` (cohort ->
    stratum), ``baseline_`` (the piecewise-constant baseline, ``BASELINE_COLUMNS``, one row per
    stratum and age piece), ``stratum_drives_``, ``cohort_table_``, ``exclusions_``,
    ``concordance_`` (in-sample, time-dependent Harrell), ``holdout_`` and ``calibration_``
    (held-out time split; ``None`` when the data window is shorter than two horizons),
    ``data_window_``.

    ``age_bands`` ((label, from_hours, to_hours), contiguous) and ``failures_per_piece`` (None:
    never split a band) set the baseline's age pieces (module docstring).
    """

    def __init__(self, horizon_days: float = 30, by: Sequence[str] = ("model",), count_proactive: bool = True,
                 penalizer: float = 0.1, min_stratum_failures: int = 5, ties: str = "efron",
                 holdout: bool = True, age_bands: Sequence[Sequence] = AGE_BANDS,
                 failures_per_piece: int | None = FAILURES_PER_PIECE):
        self.horizon_days = horizon_days
        self.by = by
        self.count_proactive = count_proactive
        self.penalizer = penalizer
        self.min_stratum_failures = min_stratum_failures
        self.ties = ties
        self.holdout = holdout
        self.age_bands = age_bands
        self.failures_per_piece = failures_per_piece

    def config(self) -> dict:
        """The ``__init__`` arguments, as saved in ``model.json``."""
        return {"horizon_days": self.horizon_days, "by": list(self.by), "count_proactive": self.count_proactive,
                "penalizer": self.penalizer, "min_stratum_failures": self.min_stratum_failures,
                "ties": self.ties, "holdout": self.holdout,
                "age_bands": [[str(label), float(lo), float(hi)] for label, lo, hi in self.age_bands],
                "failures_per_piece": self.failures_per_piece}

    # -- configuration --------------------------------------------------------------------
    def _validated(self) -> None:
        self.by = check_by(self.by)
        if not (isinstance(self.horizon_days, (int, float)) and self.horizon_days > 0):
            raise ValueError(f"horizon_days must be a positive number of days, got {self.horizon_days!r}")
        if self.min_stratum_failures < 1:
            raise ValueError("min_stratum_failures must be at least 1")
        self.age_bands = _check_bands(self.age_bands)
        if self.failures_per_piece is not None and not (
                isinstance(self.failures_per_piece, int) and self.failures_per_piece >= 1):
            raise ValueError(f"failures_per_piece must be a whole number >= 1 (or None: bands stay whole), "
                             f"got {self.failures_per_piece!r}")

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
        relative = np.exp((X - cox.center_) @ cox.coef_)
        self.baseline_ = banded_baseline(episodes["start_hours"], episodes["stop_hours"], episodes["event"],
                                         relative, strata, self.age_bands, self.failures_per_piece)
        sizes = obs.drives["cohort"].map(self.strata_).fillna(POOLED).value_counts()
        self.stratum_drives_ = {str(s): int(sizes.get(s, 0)) for s in self._baseline_strata()}

    def _baseline_strata(self) -> list[str]:
        return list(pd.unique(self.baseline_["stratum"]))

    # -- prediction -----------------------------------------------------------------------
    def _check_fitted(self) -> None:
        if not hasattr(self, "coef_"):
            raise ValueError("this FleetRiskModel is not fitted yet: call fit() or FleetRiskModel.load()")

    def cumulative_baseline(self, stratum: str, age_hours) -> np.ndarray:
        """H0_s(age) = sum_j h_j |(a_j, a_j+1] n (0, age]| (module docstring); NaN stays NaN."""
        pieces = self.baseline_[self.baseline_["stratum"] == stratum]
        age_from = pieces["age_from_hours"].to_numpy(dtype=float)
        hazard = pieces["hazard_per_hour"].to_numpy(dtype=float)
        at_from = pieces["cumulative_hazard"].to_numpy(dtype=float)
        age = np.clip(np.asarray(age_hours, dtype=float), 0.0, None)
        j = np.clip(np.searchsorted(age_from, age, side="right") - 1, 0, len(age_from) - 1)
        return at_from[j] + hazard[j] * (age - age_from[j])

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
        known = self._baseline_strata()
        for s in known:
            rows = stratum == s
            if rows.any():
                increment[rows] = self.cumulative_baseline(s, end[rows]) - self.cumulative_baseline(s, age[rows])
        unknown = pd.isna(stratum) | ~np.isin(stratum.astype(str), known)
        if unknown.any():
            weights = np.array([self.stratum_drives_[s] for s in known], dtype=float)
            each = np.vstack([self.cumulative_baseline(s, end[unknown]) - self.cumulative_baseline(s, age[unknown])
                              for s in known])
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
        trial = FleetRiskModel(**{**self.config(), "holdout": False})
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
        scored = np.isfinite(predicted)  # a drive without power-on hours cannot be scored
        at_cut, predicted = at_cut[scored], predicted[scored]
        if at_cut.empty:
            return
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
            "config": self.config(),
            "features": self.features_,
            "coefficients": {f: {"coef": float(self.coef_[f]), "se": float(self.se_[f]),
                                 "center": float(self.center_[f])} for f in self.features_},
            "strata": self.strata_,
            "stratum_drives": self.stratum_drives_,
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
        if version < FORMAT_VERSION:
            raise ModelFormatError(f"{meta_path}: format_version {version} was written by an older triage "
                                   f"(other baseline or covariates; this one reads {FORMAT_VERSION}); "
                                   "refit with 'triage fit'")
        config = dict(meta["config"])
        # a model fitted before the cohort key's rename groups by the same column
        config["by"] = [RENAMED_COHORT_KEYS.get(key, key) for key in config["by"]]
        model = cls(**config)
        model._validated()
        model.features_ = list(meta["features"])
        coefficients = meta["coefficients"]
        model.coef_ = pd.Series({f: coefficients[f]["coef"] for f in model.features_}, name="coef", dtype=float)
        model.se_ = pd.Series({f: coefficients[f]["se"] for f in model.features_}, name="se", dtype=float)
        model.center_ = pd.Series({f: coefficients[f]["center"] for f in model.features_}, name="center", dtype=float)
        model.strata_ = meta["strata"]
        model.stratum_drives_ = meta["stratum_drives"]
        model.concordance_ = meta["concordance"]
        model.holdout_ = meta["holdout"]
        model.data_window_ = meta["data_window"]
        model.fitted_at_ = meta["fitted_at"]
        model.n_iter_ = meta.get("n_iter")
        model.baseline_ = pd.read_parquet(path / "baseline.parquet")
        missing = [c for c in BASELINE_COLUMNS if c not in model.baseline_.columns]
        if missing:
            raise ModelFormatError(f"{path / 'baseline.parquet'}: lacks column(s) {', '.join(missing)}")
        model.cohort_table_ = pd.read_parquet(path / "cohorts.parquet")
        model.exclusions_ = pd.read_parquet(path / "exclusions.parquet")
        calibration = path / "calibration.parquet"
        model.calibration_ = pd.read_parquet(calibration) if calibration.is_file() else None
        model.path_ = path
        return model


def banded_baseline(start_hours, stop_hours, event, relative_hazard, strata=None,
                    age_bands: Sequence[Sequence] = AGE_BANDS,
                    failures_per_piece: int | None = FAILURES_PER_PIECE) -> pd.DataFrame:
    """Piecewise-constant baseline hazard per stratum from (start, stop] rows (module docstring).

    ``relative_hazard``: ``exp(beta . (x - centre))`` of each row (all ones without covariates).
    ``failures_per_piece=None`` keeps the bands whole. Returns ``BASELINE_COLUMNS``, one row per
    stratum and piece, pieces contiguous from age 0 to infinity; strata without a failure are left
    out (there is no rate to shrink towards).
    """
    start = np.asarray(start_hours, dtype=float)
    stop = np.asarray(stop_hours, dtype=float)
    event = np.asarray(event, dtype=bool)
    weight = np.asarray(relative_hazard, dtype=float)
    strata = np.zeros(len(start), dtype=np.int64) if strata is None else np.asarray(strata, dtype=object)
    inner_edges = np.array([band[1] for band in _check_bands(age_bands)[1:]], dtype=float)
    frames = []
    for stratum in pd.unique(strata):
        rows = strata == stratum
        failure_ages = np.sort(stop[rows & event])
        if len(failure_ages) == 0:
            continue
        youngest, oldest = float(start[rows].min()), float(stop[rows].max())
        edges = np.concatenate([[youngest], inner_edges[(inner_edges > youngest) & (inner_edges < oldest)], [oldest]])
        # share_j: the piece's part of its band's one pseudo-failure (1 / pieces in the band)
        edges, share_j = _split_crowded_bands(edges, failure_ages, failures_per_piece)
        # D_j: a failure at age t belongs to the piece (a_j, a_j+1] holding it
        piece = np.clip(np.searchsorted(edges, failure_ages, side="left") - 1, 0, len(edges) - 2)
        D_j = np.bincount(piece, minlength=len(edges) - 1).astype(float)
        at_edges = _weighted_hours_before(edges, start[rows], stop[rows], weight[rows])
        E_j = np.clip(np.diff(at_edges), 0.0, None)  # no negative rounding residue in an empty piece
        D, E = D_j.sum(), E_j.sum()
        h_j = (D_j + share_j) / (E_j + share_j * E / D)
        age_from = np.concatenate([[0.0], edges[1:-1]])
        age_to = np.concatenate([edges[1:-1], [np.inf]])
        # H0 at each piece's start; the last piece is open-ended
        cumulative = np.concatenate([[0.0], np.cumsum(h_j[:-1] * (age_to[:-1] - age_from[:-1]))])
        frames.append(pd.DataFrame({
            "stratum": stratum, "age_from_hours": age_from, "age_to_hours": age_to,
            "failures": D_j.astype(np.int64), "exposure_hours": E_j, "hazard_per_hour": h_j,
            "cumulative_hazard": cumulative,
        }))
    if not frames:
        return pd.DataFrame(columns=list(BASELINE_COLUMNS))
    return pd.concat(frames, ignore_index=True)[list(BASELINE_COLUMNS)]


def _split_crowded_bands(edges: np.ndarray, failure_ages: np.ndarray,
                         failures_per_piece: int | None) -> tuple[np.ndarray, np.ndarray]:
    """Cut each band holding D_b >= 2K failures into n_b = floor(D_b / K) equal-width pieces.

    Returns the piece edges and each piece's 1 / n_b (its share of the band's pseudo-failure).
    """
    band = np.clip(np.searchsorted(edges, failure_ages, side="left") - 1, 0, len(edges) - 2)
    D_b = np.bincount(band, minlength=len(edges) - 1)
    pieces, shares = [edges[:1]], []
    for lo, hi, d in zip(edges[:-1], edges[1:], D_b):
        n = 1 if failures_per_piece is None else max(1, int(d) // failures_per_piece)
        pieces.append(np.linspace(lo, hi, n + 1)[1:])
        shares.append(np.full(n, 1.0 / n))
    return np.concatenate(pieces), np.concatenate(shares)


def _weighted_hours_before(ages: np.ndarray, start: np.ndarray, stop: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """W(t) = sum_i w_i |(start_i, stop_i] n (-inf, t]| = sum_i w_i [(t - start_i)+ - (t - stop_i)+], at each t."""
    return _ramp_sum(ages, start, weight) - _ramp_sum(ages, stop, weight)


def _ramp_sum(ages: np.ndarray, points: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """sum_i w_i (t - p_i)+ at each t in ``ages``: t * sum(w, p < t) - sum(w p, p < t)."""
    order = np.argsort(points, kind="stable")
    p, w = points[order], weight[order]
    w_below = np.concatenate([[0.0], np.cumsum(w)])
    wp_below = np.concatenate([[0.0], np.cumsum(w * p)])
    k = np.searchsorted(p, ages, side="left")
    return ages * w_below[k] - wp_below[k]


def _check_bands(age_bands) -> tuple[tuple[str, float, float], ...]:
    """(label, from_hours, to_hours) bands, each starting where the previous one ends."""
    try:
        bands = tuple((str(label), float(lo), float(hi)) for label, lo, hi in age_bands)
    except (TypeError, ValueError):
        raise ValueError("age_bands must be (label, from_hours, to_hours) triples") from None
    if not bands:
        raise ValueError("age_bands needs at least one band")
    for (label, lo, hi), following in zip(bands, bands[1:] + (None,)):
        if not lo < hi:
            raise ValueError(f"age band {label!r}: from_hours must be below to_hours")
        if following is not None and following[1] != hi:
            raise ValueError(f"age band {following[0]!r} must start where {label!r} ends ({hi:g} h)")
    return bands


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


def readable_latest_model(store) -> tuple[FleetRiskModel | None, str | None]:
    """``latest_model``, with an unreadable newest model given back as the reason instead of
    raised: (model, None), (None, None) when none is saved, or (None, why it cannot be read)."""
    try:
        return latest_model(store), None
    except ModelFormatError as exc:
        return None, str(exc)


def _iso(moment) -> str | None:
    if moment is None or pd.isna(moment):
        return None
    return pd.Timestamp(moment).tz_convert("UTC").isoformat()


def _num(value) -> float | None:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else float(value)


__all__ = ["FleetRiskModel", "latest_model", "banded_baseline", "calibration_table", "ModelFormatError", "POOLED",
           "COHORT_COLUMNS", "COVARIATE_SOURCES"]
