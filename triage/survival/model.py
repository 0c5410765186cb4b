"""The saved fleet risk model: P(a drive fails within H days | its state now), and its checks.

The probability comes from a landmark model (``landmark.py``): the drive's age band, cohort and
SMART state at a date -- counters, their growth over the last two weeks, the drive's own
verdict -- give a failure rate for the next H days, fitted on the fleet's own history stacked at
weekly landmarks:

    P(fail within D days) = 1 - exp(-D * exp(eta)),   eta = b0 + age + cohort + cohort x age + beta . x

A warning's coefficient already holds what warnings go on to do over the next H days, so no
covariate is held fixed over the horizon; age bands without failures are smoothed towards their
neighbours and small cohorts pooled towards the fleet (penalties, ``landmark.py``); a cohort never
seen in training gets the fleet's level.

The held-out check refits on the data before ``cut = end - H`` (outcomes cut there too), takes the
drives *in service* at the cut (seen in the week before it, not removed) and compares predicted
with observed failures in the next H days, overall and by decile of predicted risk. A drive pulled
or retired during that window could not be seen to fail after it: its prediction covers only the
days it was watched, ``1 - exp(-rate * watched_days)`` -- the expected count under independent
censoring. ``benchmarks/calibration.py`` runs this check over many demo fleets and a simulated
fleet with known hazards; docs/prediction.md has the figures.

The per-cohort AFR and Weibull table (``cohorts.cohort_table``) is fitted and saved beside it.

Events: removals with reason ``failed``; ``count_proactive=True`` adds the ``proactive`` pulls
(a replacement-rate model). By default a proactive pull ends the drive's window as a censoring.

Saved form (no pickle): ``<store>/models/fleet-risk-v<N>-<UTC stamp>/`` holding ``model.json``
(configuration, the landmark model's coefficients and design, data window, checks) and Parquet
tables ``cohorts``, ``calibration``, ``exclusions``. ``N`` counts fits in that store;
``latest_model`` takes the highest. ``model.json`` carries ``format_version``; any other version
than this code writes is refused with a message, never half-read (versions 1-3 held a stratified
Cox baseline: refit).
"""

from __future__ import annotations

import json
import math
import os
import shutil
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from triage import __version__
from triage.store.models import MODEL_DIR, latest_model_dir
from triage.survival.landmark import (
    ACTIVE_DAYS,
    GROWTH_DAYS,
    LandmarkModel,
    FitError,
    frame_reader,
    landmark_dates,
    landmark_states,
    state_features,
    states_from_history,
    utc,
    window_outcomes,
)
from triage.survival.observations import (
    COHORT_COLUMNS,
    COVARIATE_SOURCES,
    Scan,
    check_by,
    observations,
    scan_frame,
)

FORMAT = "triage-fleet-risk"
FORMAT_VERSION = 4  # 4: landmark Poisson model replaced the stratified Cox baseline


class ModelFormatError(ValueError):
    """A saved model this code cannot read (unknown format, newer version, missing files)."""


def event_reasons(count_proactive: bool) -> tuple[str, ...]:
    return ("failed", "proactive") if count_proactive else ("failed",)


class FleetRiskModel:
    """Landmark P(fail) model plus per-cohort AFR/Weibull, saved for fast scoring.

    Configuration (``__init__``) is kept as given; ``fit`` learns attributes ending in ``_``:
    ``landmark_`` (the fitted ``LandmarkModel``), ``cohort_table_``, ``exclusions_``,
    ``holdout_`` and ``calibration_`` (held-out time split; ``None`` when the data window is
    shorter than two horizons or the training side has no failure), ``data_window_``,
    ``fitted_at_``.
    """

    def __init__(self, horizon_days: float = 30, by: Sequence[str] = ("model",), count_proactive: bool = False,
                 holdout: bool = True, age_sd: float = 0.5, cohort_sd: float = 1.0, shape_sd: float = 0.5,
                 ridge: float = 0.1, slope_sd: float | None = 1.0):
        self.horizon_days = horizon_days
        self.slope_sd = slope_sd
        self.by = by
        self.count_proactive = count_proactive
        self.holdout = holdout
        self.age_sd = age_sd
        self.cohort_sd = cohort_sd
        self.shape_sd = shape_sd
        self.ridge = ridge

    def config(self) -> dict:
        """The ``__init__`` arguments, as saved in ``model.json``."""
        return {"horizon_days": self.horizon_days, "by": list(self.by), "count_proactive": self.count_proactive,
                "holdout": self.holdout, "age_sd": self.age_sd, "cohort_sd": self.cohort_sd,
                "shape_sd": self.shape_sd, "ridge": self.ridge, "slope_sd": self.slope_sd}

    def _landmark_model(self, horizon_days: float | None = None) -> LandmarkModel:
        return LandmarkModel(horizon_days=self.horizon_days if horizon_days is None else horizon_days,
                             by=self.by, age_sd=self.age_sd, cohort_sd=self.cohort_sd, shape_sd=self.shape_sd,
                             ridge=self.ridge, slope_sd=self.slope_sd)

    # -- configuration --------------------------------------------------------------------
    def _validated(self) -> None:
        self.by = check_by(self.by)
        if not (isinstance(self.horizon_days, (int, float)) and self.horizon_days > 0):
            raise ValueError(f"horizon_days must be a positive number of days, got {self.horizon_days!r}")
        for name in ("age_sd", "cohort_sd", "shape_sd"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and value > 0):
                raise ValueError(f"{name} must be a positive number, got {value!r}")
        if not (isinstance(self.ridge, (int, float)) and self.ridge >= 0):
            raise ValueError(f"ridge must be a number >= 0, got {self.ridge!r}")

    def holdout_cut(self, first_taken_at: pd.Timestamp, last_taken_at: pd.Timestamp) -> pd.Timestamp | None:
        """Start of the held-out window: ``horizon_days`` before the end of the data (UTC midnight),
        or None when fewer than ``horizon_days`` would remain for training."""
        if not self.holdout:
            return None
        end = utc(last_taken_at).normalize() + pd.Timedelta(days=1)
        cut = (end - pd.Timedelta(days=float(self.horizon_days))).normalize()
        if cut - utc(first_taken_at) < pd.Timedelta(days=float(self.horizon_days)):
            return None
        return cut

    # -- fitting --------------------------------------------------------------------------
    def fit(self, snapshots: pd.DataFrame, removals: pd.DataFrame,
            progress: Callable[[str], None] | None = None) -> "FleetRiskModel":
        """Fit from snapshot and removal frames (store schema columns); returns self."""
        self._validated()
        if snapshots is None or snapshots.empty:
            raise ValueError("no snapshots to fit on")
        return self.fit_history(scan_frame(snapshots), frame_reader(snapshots), removals, progress=progress)

    def fit_history(self, scan: Scan, read: Callable, removals: pd.DataFrame,
                    progress: Callable[[str], None] | None = None) -> "FleetRiskModel":
        """Fit from a scan (cohort table) and ``read(since, until)`` over the snapshots (landmarks)."""
        self._validated()
        say = progress or (lambda message: None)
        if scan.empty:
            raise ValueError("no snapshots to fit on")
        removals = clean_removals(removals)
        say("building the observation table")
        obs = observations(scan, removals, self.by, self.count_proactive)
        say("fitting AFR and Weibull per cohort")
        from triage.survival.cohorts import cohort_table  # noqa: PLC0415  (the fitting stack: not loaded to score)

        self.cohort_table_ = cohort_table(obs)
        self.exclusions_ = obs.exclusions
        # drives left out for data quality stay out of the landmark rows too
        removals_ok = removals[~removals["serial"].isin(obs.exclusions["serial"])]
        first, last = scan.first_taken_at, scan.last_taken_at
        cut = self.holdout_cut(first, last)
        marks = landmark_dates(first, last)
        if cut is not None and cut not in marks:
            marks = sorted([*marks, cut])
        say(f"reading drive states at {len(marks)} weekly landmarks")
        states = landmark_states(read, marks, removals_ok)
        states = states[~states["serial"].isin(obs.exclusions["serial"])].reset_index(drop=True)
        data_end = utc(last)
        events = event_reasons(self.count_proactive)
        outcomes = window_outcomes(states, removals_ok, float(self.horizon_days), data_end, events)
        say(f"fitting the landmark model on {len(states):,} drive-landmark rows")
        self.landmark_ = self._landmark_model().fit(states, outcomes)
        self.data_window_ = {
            "first_taken_at": _iso(first),
            "last_taken_at": _iso(last),
            "snapshots": int(scan.rows_read),
            "drives": int(obs.drives["serial"].nunique()),  # a drive may have several periods
            "failures": int(obs.drives["event"].sum()),
            "landmarks": len(marks),
            "landmark_rows": int(self.landmark_.n_rows_),
            "excluded_drives": int(len(obs.exclusions)),
        }
        self.holdout_, self.calibration_ = None, None
        if cut is not None:
            say(f"checking calibration on the {self.horizon_days:g} days from {cut:%Y-%m-%d}")
            self._evaluate_holdout(states, removals_ok, cut, data_end)
        self.fitted_at_ = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
        return self

    def _evaluate_holdout(self, states: pd.DataFrame, removals: pd.DataFrame, cut: pd.Timestamp,
                          data_end: pd.Timestamp) -> None:
        from lifelines.utils import concordance_index

        events = event_reasons(self.count_proactive)
        horizon = float(self.horizon_days)
        train = states[states["landmark"] < cut]
        try:
            trial = self._landmark_model().fit(train, window_outcomes(train, removals, horizon, cut, events))
        except FitError:
            return
        test = states[states["landmark"] == cut]
        test = test[np.isfinite(test["age_hours"].to_numpy(dtype=float))]
        if test.empty:
            return
        outcome = window_outcomes(test, removals, horizon, data_end, events)
        failed = outcome["failed"].to_numpy(dtype=bool)
        watched = np.where(failed, horizon, outcome["exposure_days"].to_numpy())
        rate = trial.rate_per_day(test)
        predicted = -np.expm1(-rate * watched)
        concordance = (concordance_index(np.clip(outcome["exposure_days"].to_numpy(), 1e-6, None), -rate, failed)
                       if failed.any() and not failed.all() else float("nan"))
        self.holdout_ = {
            "cut": _iso(cut),
            "horizon_days": horizon,
            "drives": int(len(test)),
            "predicted_failures": float(predicted.sum()),
            "observed_failures": int(failed.sum()),
            "concordance": float(concordance),
        }
        self.calibration_ = calibration_table(predicted, failed)

    # -- prediction -----------------------------------------------------------------------
    def _check_fitted(self) -> None:
        if not hasattr(self, "landmark_"):
            raise ValueError("this FleetRiskModel is not fitted yet: call fit() or FleetRiskModel.load()")

    def states(self, latest_state: pd.DataFrame, history: pd.DataFrame | None = None,
               removals: pd.DataFrame | None = None) -> pd.DataFrame:
        """Each drive's state for scoring: features of its latest row, growth from ``history``."""
        needed = ["serial", "power_on_hours", "taken_at", *self.by]
        missing = [c for c in needed if c not in latest_state.columns]
        if missing:
            raise ValueError(f"latest state lacks column(s) {', '.join(missing)}")
        if history is not None and len(history):
            moment = pd.to_datetime(history["taken_at"], utc=True).max()
            states = states_from_history(history, moment, removals, active_days=None)
            return states[states["serial"].isin(latest_state["serial"])].reset_index(drop=True)
        latest = latest_state.sort_values("taken_at", kind="stable").drop_duplicates("serial", keep="last")
        moment = pd.to_datetime(latest["taken_at"], utc=True).max()
        return state_features(latest, moment)

    def predict_details(self, latest_state: pd.DataFrame, horizon_days: float | None = None,
                        history: pd.DataFrame | None = None) -> pd.DataFrame:
        """Per drive: cohort, age, failure rate per day, probability and each covariate's factor."""
        self._check_fitted()
        horizon = float(self.horizon_days if horizon_days is None else horizon_days)
        if not horizon > 0:
            raise ValueError("horizon_days must be positive")
        states = self.states(latest_state, history)
        rate = self.landmark_.rate_per_day(states)
        from triage.survival.observations import cohort_labels

        details = pd.DataFrame({
            "serial": states["serial"].to_numpy(),
            "cohort": cohort_labels(states, self.by).to_numpy() if len(states) else [],
            "age_hours": states["age_hours"].to_numpy(dtype=float),
            "rate_per_day": rate,
            "fail_probability": -np.expm1(-horizon * rate),
        })
        factors = self.landmark_.contributions(states)
        return pd.concat([details, factors.reset_index(drop=True).add_prefix("factor_")], axis=1)

    def predict_fail_probability(self, latest_state: pd.DataFrame, horizon_days: float | None = None,
                                 history: pd.DataFrame | None = None) -> pd.Series:
        """P(fail within ``horizon_days`` | age, cohort, state now), indexed by serial.

        ``latest_state``: snapshot rows (the latest per serial is used); ``history``: the recent
        snapshot rows (two weeks or more) the counter growth is measured on -- without it growth
        counts as none. NaN where the drive's power-on hours are unknown.
        """
        details = self.predict_details(latest_state, horizon_days, history)
        return pd.Series(details["fail_probability"].to_numpy(), index=pd.Index(details["serial"], name="serial"),
                         name="fail_probability")

    def coefficients(self) -> pd.DataFrame:
        """Rate ratio of each covariate over the next H days, with a 95 % range."""
        self._check_fitted()
        return self.landmark_.rate_ratios()

    # -- persistence ----------------------------------------------------------------------
    def save(self, models_dir: Path | str) -> Path:
        """Write the model under ``models_dir`` as ``fleet-risk-v<N>-<stamp>/``; returns that path.

        Unique and atomic, so two fits at once never collide: the files go to a temporary folder
        named for this process and a random token, which is then renamed to the next free
        ``v<N>`` under a lock on the folder, so two fits never share a number. Temporary folders
        of fits that were killed (their process is gone) are removed here.
        """
        import fcntl  # noqa: PLC0415  (kept local: only this method changes in this module)
        import secrets  # noqa: PLC0415

        from triage.process import process_gone  # noqa: PLC0415

        self._check_fitted()
        models_dir = Path(models_dir)
        models_dir.mkdir(parents=True, exist_ok=True)
        for stale in models_dir.glob(".fleet-risk-*.tmp"):  # .fleet-risk-<token>.<pid>.<token>.tmp
            owner = stale.name.rsplit(".", 3)[-3] if stale.name.count(".") >= 4 else ""
            if owner.isdigit() and process_gone(int(owner)):  # that fit was killed
                shutil.rmtree(stale, ignore_errors=True)
        temp = models_dir / f".fleet-risk-{secrets.token_hex(4)}.{os.getpid()}.{secrets.token_hex(4)}.tmp"
        temp.mkdir()
        try:
            meta = {
                "format": FORMAT,
                "format_version": FORMAT_VERSION,
                "triage_version": __version__,
                "fitted_at": self.fitted_at_,
                "config": self.config(),
                "landmark": self.landmark_.to_dict(),
                "holdout": self.holdout_,
                "data_window": self.data_window_,
            }
            (temp / "model.json").write_text(json.dumps(meta, indent=2, sort_keys=True, allow_nan=True) + "\n",
                                             encoding="utf-8")
            self.cohort_table_.to_parquet(temp / "cohorts.parquet", index=False)
            self.exclusions_.to_parquet(temp / "exclusions.parquet", index=False)
            if self.calibration_ is not None:
                self.calibration_.to_parquet(temp / "calibration.parquet", index=False)
            for written in temp.iterdir():  # on disk before the rename makes the model visible
                with written.open("rb") as fh:
                    os.fsync(fh.fileno())
            # Numbering is serialised by flock(2) on the folder itself: two saves whose clock
            # seconds differ would otherwise both take v<N> under different folder names. flock
            # belongs to the open file, so it also keeps apart threads of one process.
            numbering = os.open(models_dir, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
            try:
                fcntl.flock(numbering, fcntl.LOCK_EX)
                taken = (int(m.group(1)) for m in map(MODEL_DIR.match, os.listdir(models_dir)) if m)
                stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
                final = models_dir / f"fleet-risk-v{1 + max(taken, default=0)}-{stamp}"
                os.rename(temp, final)
            finally:
                os.close(numbering)  # closing releases the lock
        except BaseException:
            shutil.rmtree(temp, ignore_errors=True)
            raise
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
                                   f"(another kind of model; this one reads {FORMAT_VERSION}); "
                                   "refit with 'triage fit'")
        try:
            model = cls(**meta["config"])
            model._validated()
            model.landmark_ = LandmarkModel.from_dict(meta["landmark"])
            model.holdout_ = meta["holdout"]
            model.data_window_ = meta["data_window"]
            model.fitted_at_ = meta["fitted_at"]
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelFormatError(f"{meta_path}: incomplete or inconsistent ({exc}); refit with 'triage fit'") from None
        model.cohort_table_ = pd.read_parquet(path / "cohorts.parquet")
        model.exclusions_ = pd.read_parquet(path / "exclusions.parquet")
        calibration = path / "calibration.parquet"
        model.calibration_ = pd.read_parquet(calibration) if calibration.is_file() else None
        model.path_ = path
        return model


def fit_until(read: Callable, removals: pd.DataFrame, first_taken_at, as_of, horizon_days: float,
              by: Sequence[str] = ("model",), count_proactive: bool = False,
              progress: Callable[[int, int], None] | None = None,
              **priors) -> tuple[LandmarkModel, pd.DataFrame]:
    """The landmark model fitted on what was known at ``as_of``, and the drives' states then.

    Landmarks run weekly up to ``as_of``; their windows and the removal log are cut at ``as_of``,
    so nothing after it is used (a forecast or a backtest night scored as it would have been).
    Raises ``FitError`` when no failure was known by then.
    """
    as_of = utc(as_of)
    removals = clean_removals(removals)
    removals = removals[removals["removed_at"] <= as_of]
    marks = [m for m in landmark_dates(first_taken_at, as_of) if m < as_of] + [as_of]
    states = landmark_states(read, marks, removals, progress=progress)
    train = states[states["landmark"] < as_of]
    outcomes = window_outcomes(train, removals, float(horizon_days), as_of, event_reasons(count_proactive))
    model = LandmarkModel(horizon_days=horizon_days, by=check_by(by), **priors).fit(train, outcomes)
    return model, states[states["landmark"] == as_of].reset_index(drop=True)


def clean_removals(removals: pd.DataFrame | None) -> pd.DataFrame:
    """serial, removed_at (UTC), reason; rows lacking a serial or a time dropped."""
    if removals is None or removals.empty:
        return pd.DataFrame({"serial": pd.Series(dtype=object),
                             "removed_at": pd.Series(dtype="datetime64[ns, UTC]"),
                             "reason": pd.Series(dtype=object)})
    out = removals.loc[:, ["serial", "removed_at", "reason"]].copy()
    out["removed_at"] = pd.to_datetime(out["removed_at"], utc=True)
    return out[out["serial"].notna() & out["removed_at"].notna()].reset_index(drop=True)


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
    """The newest saved model of ``store`` (``latest_model_dir``), or None. Raises
    ModelFormatError when that model cannot be read (it does not silently fall back to an older one).
    """
    folder = latest_model_dir(store)
    return FleetRiskModel.load(folder) if folder is not None else None


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


__all__ = ["FleetRiskModel", "latest_model", "latest_model_dir", "calibration_table", "ModelFormatError", "clean_removals", "fit_until",
           "event_reasons", "COHORT_COLUMNS", "COVARIATE_SOURCES", "ACTIVE_DAYS", "GROWTH_DAYS"]
