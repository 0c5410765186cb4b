"""Landmark prediction of P(a drive fails within H days | its state at a date).

Landmarking (van Houwelingen, "Dynamic prediction by landmarking in event history analysis",
Scand. J. Stat. 34, 2007): pick landmark dates ``L`` (every ``step_days`` through the history).
At each one, every drive *in service* -- seen within ``ACTIVE_DAYS`` before ``L`` and not
removed since -- gives one row: its state at ``L`` (age, cohort, SMART covariates, counter growth
over the last ``GROWTH_DAYS``) and what happened in the window ``(L, L + H]``: failed or not, and
how many days it was watched there. Rows of all landmarks are stacked and one model is fitted to
them. Because every row starts from the state *then*, the fitted effect of a warning already
contains what warnings go on to do over the next H days -- nothing is held fixed over the horizon,
which is what made the previous forecast too low for quiet drives and too high for noisy ones.

The model is a Poisson rate model for the failure rate in the window (piecewise-exponential
regression; Holford, Biometrics 36, 1980; Laird & Olivier, JASA 76, 1981):

    d_i ~ Poisson(e_i * exp(eta_i)),   eta_i = b0 + age_{band(i)} + cohort_{c(i)}
                                            + age_cohort_{c(i), band(i)} + slope_{c(i)} log_age_i
                                            + beta . x_i

``d_i`` is 1 when row ``i``'s drive failed in its window, ``e_i`` the days it was watched there
(the window, cut short by a proactive pull, retirement or the end of the data). A window cut
short is exposure lost, not a survival: that is how censoring enters a Poisson likelihood.

The baseline must not collapse where failures are few. Each group of coefficients carries a
Gaussian penalty (a prior), and the fit maximises the penalised log-likelihood

    l(theta) = sum_i [d_i eta_i - e_i exp(eta_i)] - 1/2 theta' P theta

* age bands (``curves.AGE_BANDS``): a random walk, ``sum_j (age_j+1 - age_j)^2 / s_age^2`` with the
  youngest band the reference -- a band without failures is pulled to its neighbours' level
  instead of to zero (smoothing; Eilers & Marx, Statistical Science 11, 1996, for the
  difference penalty; Fahrmeir & Tutz, Multivariate Statistical Modelling, 2nd ed., 9.1, for
  random-walk smoothness priors; from memory);
* cohorts: ``cohort_c^2 / s_cohort^2`` -- a cohort with few failures is pooled towards the fleet
  (the shrinkage of a Gaussian random effect);
* cohort x age band: ``age_cohort^2 / s_shape^2`` -- each cohort may bend the fleet's age curve
  (wear-out, early life), pulled to the fleet's shape when its own failures are few;
* cohort x log age: ``slope_c^2 / s_slope^2`` -- a trend *within* the bands, log(1 + age in
  months): a Weibull hazard is linear in log age with slope ``shape - 1``, and a wear-out cohort's
  hazard can triple inside the open-ended "5 years+" band (the demo's shape-3.5 cohort from 5 to
  8 years). On 24 demo fleets it moved the decile check from 9 to 10 of 10 inside the Poisson
  range (benchmarks/calibration.py);
* covariates: ``beta^2 * ridge`` (ridge 0.1: a prior standard deviation of about 3 on each log
  rate ratio, wide enough for the rate ratios of ten and more that pending sectors show --
  Pinheiro, Weber & Barroso, FAST 2007, figure from memory -- yet a warning seen on a handful
  of failing drives cannot send its coefficient, and the top decile's forecast, to infinity).
  A prior of 1 was tried: on a simulated fleet it pulled a true rate ratio of 4 down to 2.

Windows of H days started every ``step_days`` overlap, so each drive-day sits in about
``H / step`` rows; each row is weighted ``step / H`` so that the data count once against the
penalties (and the standard errors are not H / step times too small).

The prior widths are our choice (common practice, no source); ``benchmarks/calibration.py``
measures the calibration they give.

P(fail within D days) for a row = ``1 - exp(-D * exp(eta))``. Newton-Raphson with step halving
maximises ``l`` (gradient ``X'(d - mu) - P theta``, information ``X' diag(mu) X + P``,
``mu_i = e_i exp(eta_i)``); the inverse information gives the standard errors.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterator, Sequence

import numpy as np
import pandas as pd

from triage.survival.curves import AGE_BANDS
from triage.survival.observations import (
    COHORT_COLUMNS,
    FEATURES,
    cohort_labels,
    covariate_features,
)

#: A drive is in service at a landmark when seen within this many days before it.
ACTIVE_DAYS = 7
#: Counter growth is measured over this many days before the landmark.
GROWTH_DAYS = 14
#: Landmarks every this many days.
STEP_DAYS = 7
#: Counters whose growth enters the model (their sum for the uncorrectable family).
GROWTH_FEATURES = ("growth_reallocated", "growth_pending", "growth_uncorrectable", "any_growth")
#: The drive's own verdict: a pre-failure attribute at or below its threshold (SFF-8035i 3.3,
#: attribute status flags bit 0), or any NVMe critical-warning bit (NVMe Base 2.0, log 02h byte 0).
SELF_ASSESSMENT = "self_assessment"
LANDMARK_FEATURES = (*FEATURES, *GROWTH_FEATURES, SELF_ASSESSMENT)
#: Snapshot columns the landmark states are built from.
PLACE_COLUMNS = ("host", "slot", "group")
STATE_SOURCES = (
    "serial", "taken_at", "power_on_hours", *COHORT_COLUMNS, *PLACE_COLUMNS,
    "temperature_c", "reallocated_sectors", "reallocation_events", "pending_sectors",
    "offline_uncorrectable", "reported_uncorrectable", "command_timeouts",
    "nvme_critical_warning", "nvme_spare_pct", "nvme_spare_threshold_pct", "nvme_media_errors",
    "prefail_tripped",
)
_UNCORRECTABLE = ("offline_uncorrectable", "reported_uncorrectable", "nvme_media_errors")
#: Removals before this much ahead of a drive's latest capture do not take it out of service
#: (a log stamped at the start of the day of the drive's last capture).
REMOVAL_SLACK = pd.Timedelta(hours=24)

_NS_PER_DAY = 86_400_000_000_000


def utc_times(values) -> pd.Series:
    """A column of times as tz-aware UTC; a column that already is one is only converted (the
    general parser looks at every value, which the nightly replay cannot afford)."""
    if isinstance(getattr(values, "dtype", None), pd.DatetimeTZDtype):
        return values.dt.tz_convert("UTC")
    return pd.to_datetime(values, utc=True)


def utc(moment) -> pd.Timestamp:
    stamp = pd.Timestamp(moment)
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


# -- drive states ---------------------------------------------------------------------------

def _last_per_serial(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame[frame["serial"].notna()]
    return frame.sort_values("taken_at", kind="stable").drop_duplicates("serial", keep="last")


def _first_per_serial(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame[frame["serial"].notna()]
    return frame.sort_values("taken_at", kind="stable").drop_duplicates("serial", keep="first")


class StateTracker:
    """Each drive's latest capture and the captures ``GROWTH_DAYS`` back, fed in time order.

    ``add(chunk)`` takes snapshot rows newer than every row added before; ``state_at(moment)``
    gives the drives in service at ``moment`` with their features. Memory: a few rows per drive,
    whatever the history's length -- the replay of ``backtest`` and the landmark pass of ``fit``
    both run on it, one chunk of days at a time.
    """

    def __init__(self) -> None:
        self.latest: pd.DataFrame | None = None
        self.first: pd.DataFrame | None = None
        self._marks: list[tuple[pd.Timestamp, pd.DataFrame]] = []  # (moment, latest then) for growth

    def add(self, chunk: pd.DataFrame) -> None:
        self.add_ends(chunk_ends(chunk))

    def add_ends(self, ends: "tuple[pd.DataFrame, pd.DataFrame] | None") -> None:
        """``add`` for a chunk already boiled down by ``chunk_ends`` (where it was read)."""
        if ends is None:
            return
        last, head = ends
        if self.latest is None:
            self.latest = last.reset_index(drop=True)
        else:
            merged = pd.concat([self.latest, last], ignore_index=True)
            self.latest = merged.drop_duplicates("serial", keep="last").reset_index(drop=True)
        if self.first is None:
            self.first = head.reset_index(drop=True)
        else:
            new = head[~head["serial"].isin(self.first["serial"])]
            self.first = pd.concat([self.first, new], ignore_index=True)

    def snapshot(self) -> "StateTracker":
        """A copy to carry on from elsewhere (a backtest stretch): the frames are shared, never
        changed in place (``add`` replaces them)."""
        copy = StateTracker()
        copy.latest, copy.first, copy._marks = self.latest, self.first, list(self._marks)
        return copy

    def mark(self, moment: pd.Timestamp) -> None:
        """Remember the latest captures as of ``moment`` (the growth base of later states)."""
        if self.latest is not None:
            self._marks.append((utc(moment), self.latest))
            horizon = utc(moment) - pd.Timedelta(days=GROWTH_DAYS + STEP_DAYS)
            self._marks = [(m, f) for m, f in self._marks if m >= horizon]

    def state_at(self, moment, removals: pd.DataFrame | None = None) -> pd.DataFrame:
        """Drives in service at ``moment``: one row each, with ``age_hours`` and the features."""
        moment = utc(moment)
        if self.latest is None:
            return _empty_state()
        latest = self.latest[(self.latest["taken_at"] <= moment)
                             & (self.latest["taken_at"] > moment - pd.Timedelta(days=ACTIVE_DAYS))]
        latest = _drop_removed(latest, removals, moment)
        base_moment = moment - pd.Timedelta(days=GROWTH_DAYS)
        base = None
        for mark, frame in self._marks:  # the newest mark at or before moment - GROWTH_DAYS
            if mark <= base_moment:
                base = frame
        return state_features(latest, moment, base, self.first)


def chunk_ends(chunk: pd.DataFrame | None) -> tuple[pd.DataFrame, pd.DataFrame] | None:
    """What ``StateTracker`` keeps of a chunk of snapshot rows: each drive's last and first row in
    it (the state columns, times in UTC); None for an empty chunk. Runs where the chunk was read,
    so only these rows travel."""
    if chunk is None or chunk.empty:
        return None
    chunk = chunk.loc[:, [c for c in STATE_SOURCES if c in chunk.columns]]
    chunk = chunk.assign(taken_at=utc_times(chunk["taken_at"]))
    return _last_per_serial(chunk), _first_per_serial(chunk)


def read_ends(read) -> tuple[pd.DataFrame, pd.DataFrame] | None:
    """The map step of the landmark pass (``tasks.SnapshotRead`` in, ``chunk_ends`` out)."""
    return chunk_ends(read.read())


def states_from_history(history: pd.DataFrame, moment, removals: pd.DataFrame | None = None,
                        active_days: float | None = ACTIVE_DAYS) -> pd.DataFrame:
    """The state of each drive at ``moment`` from a frame of recent snapshot rows (at least
    ``GROWTH_DAYS`` of them for the growth features): the same definition as the landmark
    states of ``StateTracker``. ``active_days=None`` keeps every drive in ``history``."""
    moment = utc(moment)
    taken = utc_times(history["taken_at"])
    history = history[(taken <= moment).to_numpy()]
    taken = taken[taken <= moment]
    recent = history if active_days is None else history[(taken > moment - pd.Timedelta(days=active_days)).to_numpy()]
    latest = _drop_removed(_last_per_serial(recent), removals, moment)
    base = _last_per_serial(history[(taken <= moment - pd.Timedelta(days=GROWTH_DAYS)).to_numpy()])
    return state_features(latest, moment, base, _first_per_serial(history))


def _drop_removed(latest: pd.DataFrame, removals: pd.DataFrame | None, moment: pd.Timestamp) -> pd.DataFrame:
    """Leave out drives whose last removal before ``moment`` came after (or about at) their latest
    capture: they are out of service. A drive seen again after its removal is back in service."""
    if removals is None or removals.empty or latest.empty:
        return latest
    before = removals[removals["removed_at"] <= moment]
    if before.empty:
        return latest
    last_removal = before.groupby("serial")["removed_at"].max()
    removed_at = latest["serial"].map(last_removal)
    out = removed_at.notna() & (removed_at + REMOVAL_SLACK >= latest["taken_at"])
    return latest[~out.to_numpy()]


def _empty_state() -> pd.DataFrame:
    columns = ["serial", "taken_at", "age_hours", *COHORT_COLUMNS, *PLACE_COLUMNS, *LANDMARK_FEATURES]
    return pd.DataFrame({c: pd.Series(dtype=float if c in (*LANDMARK_FEATURES, "age_hours") else object)
                         for c in columns})


def _num(frame: pd.DataFrame, column: str) -> np.ndarray:
    if column not in frame:
        return np.zeros(len(frame))
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    return np.clip(np.nan_to_num(values, nan=0.0), 0.0, None)


def state_features(latest: pd.DataFrame, moment: pd.Timestamp, base: pd.DataFrame | None = None,
                   first: pd.DataFrame | None = None) -> pd.DataFrame:
    """Features of each drive's latest capture at ``moment``, growth against ``base`` (the
    captures ``GROWTH_DAYS`` earlier) or, for a drive not there, its first capture ever."""
    latest = latest.reset_index(drop=True)
    if latest.empty:
        return _empty_state()
    poh = pd.to_numeric(latest["power_on_hours"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    since = (moment - utc_times(latest["taken_at"])).dt.total_seconds().to_numpy() / 3600
    out = latest[["serial", "taken_at", *[c for c in (*COHORT_COLUMNS, *PLACE_COLUMNS) if c in latest.columns]]].copy()
    for column in (*COHORT_COLUMNS, *PLACE_COLUMNS):
        if column not in out:
            out[column] = None
    out["age_hours"] = poh + since  # fleet drives run around the clock
    features = covariate_features(latest)
    for name in FEATURES:
        out[name] = features[name].to_numpy(dtype=float)

    reference = None
    if base is not None and len(base):
        reference = base
    if first is not None and len(first):
        reference = first if reference is None else pd.concat(
            [reference, first[~first["serial"].isin(reference["serial"])]], ignore_index=True)
    if reference is not None:
        ref = reference.drop_duplicates("serial").set_index("serial").reindex(latest["serial"])
    else:
        ref = latest.set_index("serial")
    now_realloc, ref_realloc = _num(latest, "reallocated_sectors"), _num(ref, "reallocated_sectors")
    now_pending, ref_pending = _num(latest, "pending_sectors"), _num(ref, "pending_sectors")
    now_unc = sum(_num(latest, c) for c in _UNCORRECTABLE)
    ref_unc = sum(_num(ref, c) for c in _UNCORRECTABLE)
    growth = {
        "growth_reallocated": np.log1p(np.clip(now_realloc - ref_realloc, 0, None)),
        "growth_pending": np.log1p(np.clip(now_pending - ref_pending, 0, None)),
        "growth_uncorrectable": np.log1p(np.clip(now_unc - ref_unc, 0, None)),
    }
    growth["any_growth"] = ((growth["growth_reallocated"] > 0) | (growth["growth_pending"] > 0)
                            | (growth["growth_uncorrectable"] > 0)).astype(float)
    for name, values in growth.items():
        out[name] = values
    out[SELF_ASSESSMENT] = self_assessment(latest).astype(float)
    return out


def self_assessment(frame: pd.DataFrame) -> np.ndarray:
    """The drive's own verdict: a pre-failure attribute at or below its threshold (ATA), or any
    critical-warning bit set (NVMe log 02h byte 0). Unknown counts as no warning."""
    tripped = np.zeros(len(frame), dtype=bool)
    if "prefail_tripped" in frame:
        tripped |= frame["prefail_tripped"].astype("boolean").fillna(False).to_numpy(dtype=bool)
    if "nvme_critical_warning" in frame:
        tripped |= _num(frame, "nvme_critical_warning") > 0
    return tripped


# -- landmark rows --------------------------------------------------------------------------

def landmark_dates(first_taken_at, last_taken_at, step_days: float = STEP_DAYS) -> list[pd.Timestamp]:
    """UTC midnights every ``step_days`` from one week after the first capture to the last."""
    start = utc(first_taken_at).normalize() + pd.Timedelta(days=ACTIVE_DAYS)
    end = utc(last_taken_at)
    dates = []
    moment = start
    while moment <= end:
        dates.append(moment)
        moment = moment + pd.Timedelta(days=step_days)
    return dates


def landmark_states(read: Callable[[pd.Timestamp | None, pd.Timestamp | None], pd.DataFrame],
                    landmarks: Sequence[pd.Timestamp], removals: pd.DataFrame | None = None,
                    progress: Callable[[int, int], None] | None = None) -> pd.DataFrame:
    """One pass over the history: the in-service drives' states at each landmark, stacked.

    ``read(since, until)`` returns snapshot rows with ``since <= taken_at < until`` (None: open).
    """
    tracker = StateTracker()
    frames = []
    landmarks = list(landmarks)
    windows = list(zip([None, *landmarks[:-1]], landmarks))
    if hasattr(read, "ends"):  # a store reader reads and boils down each window on its engine
        ends = read.ends(windows)
    else:
        ends = (chunk_ends(read(since, until)) for since, until in windows)
    for k, (moment, chunk) in enumerate(zip(landmarks, ends)):
        if progress:
            progress(k, len(landmarks))
        tracker.add_ends(chunk)
        state = tracker.state_at(moment, removals)
        tracker.mark(moment)
        if len(state):
            frames.append(state.assign(landmark=moment))
    if progress:
        progress(len(landmarks), len(landmarks))
    if not frames:
        return _empty_state().assign(landmark=pd.Series(dtype="datetime64[ns, UTC]"))
    return pd.concat(frames, ignore_index=True)


def frame_reader(snapshots: pd.DataFrame) -> Callable:
    """``read(since, until)`` over an in-memory snapshot frame."""
    taken = pd.to_datetime(snapshots["taken_at"], utc=True)
    order = np.argsort(taken.to_numpy(), kind="stable")
    frame = snapshots.iloc[order].reset_index(drop=True)
    stamps = taken.iloc[order].reset_index(drop=True)

    def read(since, until):
        keep = np.ones(len(frame), dtype=bool)
        if since is not None:
            keep &= (stamps >= utc(since)).to_numpy()
        if until is not None:
            keep &= (stamps < utc(until)).to_numpy()
        return frame[keep]

    return read


class StoreReader:
    """``read(since, until)`` over a store's snapshots (only the columns the states need), and
    ``ends(windows)``: each window read and boiled down by ``chunk_ends`` on ``engine`` (None:
    here), in the order of the windows."""

    def __init__(self, store, engine=None):
        from triage.store.schema import SNAPSHOTS  # noqa: PLC0415  (store layer, to our left)
        from triage.survival.tasks import task_store  # noqa: PLC0415

        self.store, self.engine = store, engine
        self.columns = tuple(c for c in STATE_SOURCES if c in SNAPSHOTS.names)
        self._source = task_store(store, engine)

    def __call__(self, since, until) -> pd.DataFrame:
        return self._task(since, until).read()

    def _task(self, since, until):
        from triage.survival.tasks import SnapshotRead  # noqa: PLC0415

        return SnapshotRead(self._source, self.columns, None if since is None else utc(since),
                            None if until is None else utc(until))

    def ends(self, windows) -> Iterator:
        items = (self._task(since, until) for since, until in windows)
        if self.engine is None:
            return (read_ends(item) for item in items)
        return self.engine.map(read_ends, items)


def store_reader(store, engine=None) -> StoreReader:
    """``StoreReader`` of ``store``: ``read(since, until)``, and ``ends`` on ``engine``."""
    return StoreReader(store, engine)


def stored_span(store) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """(first stored day at UTC midnight, newest capture time) of a store's snapshots; None when
    none are stored. Only the newest day is read."""
    days = store.days("snapshots")
    if not days:
        return None
    newest = store.read("snapshots", columns=["taken_at"], since=pd.Timestamp(days[-1], tz="UTC").to_pydatetime())
    return pd.Timestamp(days[0], tz="UTC"), utc_times(newest["taken_at"]).max()


def window_outcomes(states: pd.DataFrame, removals: pd.DataFrame, horizon_days: float,
                    data_end, events: Sequence[str] = ("failed",)) -> pd.DataFrame:
    """For each state row (serial, landmark): ``failed`` in ``(L, L + H]`` and ``exposure_days``.

    Only what is known by ``data_end`` counts: a window reaching past it is cut there. The first
    removal after ``L`` ends the window; it is an event when its reason is among ``events``.
    """
    data_end = utc(data_end)
    n = len(states)
    landmark_ns = utc_times(states["landmark"]).dt.tz_convert(None).to_numpy("datetime64[ns]").view(np.int64)
    end_ns = np.minimum(landmark_ns + int(horizon_days * _NS_PER_DAY), data_end.value)
    failed = np.zeros(n, dtype=bool)
    if removals is not None and len(removals):
        rem = removals[removals["removed_at"] < data_end]
        rem = rem.assign(removed_ns=utc_times(rem["removed_at"]).dt.tz_convert(None)
                         .to_numpy("datetime64[ns]").view(np.int64))
        rows = pd.DataFrame({"row": np.arange(n), "serial": states["serial"].to_numpy(), "landmark_ns": landmark_ns})
        merged = rows.merge(rem[["serial", "removed_ns", "reason"]], on="serial", how="inner")
        merged = merged[merged["removed_ns"] > merged["landmark_ns"]]
        first = merged.sort_values("removed_ns", kind="stable").drop_duplicates("row")
        row = first["row"].to_numpy()
        removed_ns = first["removed_ns"].to_numpy()
        inside = removed_ns <= end_ns[row]
        row, removed_ns, reason = row[inside], removed_ns[inside], first["reason"].to_numpy()[inside]
        end_ns[row] = removed_ns
        failed[row] = np.isin(reason, list(events))
    exposure = np.clip((end_ns - landmark_ns) / _NS_PER_DAY, 0.0, None)
    return pd.DataFrame({"failed": failed, "exposure_days": exposure}, index=states.index)


# -- the penalised Poisson fit --------------------------------------------------------------

class FitError(ValueError):
    """The landmark model cannot be fitted (no rows, no failure)."""


def penalised_poisson(X: np.ndarray, events: np.ndarray, exposure: np.ndarray, penalty: np.ndarray,
                      weight: np.ndarray | float = 1.0, max_iter: int = 60,
                      tol: float = 1e-9) -> tuple[np.ndarray, np.ndarray, int]:
    """Maximise ``sum_i w_i [d_i eta_i - e_i exp(eta_i)] - theta' P theta / 2``, ``eta = X theta``.

    Returns (theta, covariance = inverse of ``X' diag(w mu) X + P`` at the optimum, iterations).
    The first column of X is the intercept, started at log(sum d / sum e).
    """
    X = np.asarray(X, dtype=float)
    w = np.broadcast_to(np.asarray(weight, dtype=float), (X.shape[0],))
    d = w * np.asarray(events, dtype=float)
    e = w * np.asarray(exposure, dtype=float)
    P = np.asarray(penalty, dtype=float)
    theta = np.zeros(X.shape[1])
    theta[0] = np.log(max(d.sum(), 0.5) / e.sum())

    def objective(t: np.ndarray) -> float:
        eta = X @ t
        with np.errstate(over="ignore"):  # a wild trial step gives -inf and is halved
            return float(d @ eta - e @ np.exp(eta) - 0.5 * t @ P @ t)

    current = objective(theta)
    for iteration in range(1, max_iter + 1):
        mu = e * np.exp(X @ theta)
        gradient = X.T @ (d - mu) - P @ theta
        information = (X * mu[:, None]).T @ X + P
        step = np.linalg.solve(information, gradient)
        scale = 1.0
        while True:
            candidate = theta + scale * step
            value = objective(candidate)
            if np.isfinite(value) and value >= current - 1e-12 * abs(current):
                break
            scale /= 2
            if scale < 1e-10:
                raise FitError("the landmark model did not converge (no step improves the likelihood)")
        theta, previous, current = candidate, current, value
        if np.max(np.abs(scale * step)) < tol or abs(current - previous) < tol * (1 + abs(current)):
            break
    mu = e * np.exp(X @ theta)
    information = (X * mu[:, None]).T @ X + P
    return theta, np.linalg.inv(information), iteration


@dataclass
class Design:
    """Column names and the penalty matrix of the landmark model for a given set of cohorts."""

    names: list[str]
    cohorts: list[str]
    bands: list[str]
    features: list[str]
    penalty: np.ndarray


def log_age(age_hours: np.ndarray) -> np.ndarray:
    """log(1 + age in whole months): the within-cohort age trend's covariate (a Weibull hazard is
    linear in log age, slope shape - 1). Whole months, so that rows group (``LandmarkModel.fit``)."""
    months = np.floor(np.nan_to_num(np.asarray(age_hours, dtype=float), nan=0.0).clip(0) / 730.5)
    return np.log1p(months)


def age_band_index(age_hours: np.ndarray, bands=AGE_BANDS) -> np.ndarray:
    edges = np.array([b[1] for b in bands[1:]], dtype=float)
    return np.searchsorted(edges, np.nan_to_num(np.asarray(age_hours, dtype=float), nan=0.0), side="right")


class LandmarkModel:
    """P(fail within ``horizon_days`` | state at a landmark), fitted on stacked landmark rows.

    Configuration in ``__init__``; ``fit`` learns ``coef_`` (Series by design column),
    ``covariance_``, ``design_`` (Design), ``n_rows_``, ``n_failures_``, ``exposure_days_``.
    """

    def __init__(self, horizon_days: float = 30, by: Sequence[str] = ("model",), age_sd: float = 0.5,
                 cohort_sd: float = 1.0, shape_sd: float = 0.5, ridge: float = 0.1, step_days: float = STEP_DAYS,
                 slope_sd: float | None = 1.0):
        self.horizon_days = horizon_days
        self.slope_sd = slope_sd
        self.step_days = step_days
        self.by = tuple(by)
        self.age_sd = age_sd
        self.cohort_sd = cohort_sd
        self.shape_sd = shape_sd
        self.ridge = ridge

    def config(self) -> dict:
        return {"horizon_days": self.horizon_days, "by": list(self.by), "age_sd": self.age_sd,
                "cohort_sd": self.cohort_sd, "shape_sd": self.shape_sd, "ridge": self.ridge,
                "step_days": self.step_days, "slope_sd": self.slope_sd}

    # -- design ---------------------------------------------------------------------------
    def _design(self, cohorts: Sequence[str], features: Sequence[str]) -> Design:
        bands = [label for label, _, _ in AGE_BANDS]
        names = ["intercept", *[f"age:{b}" for b in bands[1:]], *[f"cohort:{c}" for c in cohorts],
                 *[f"shape:{c}:{b}" for c in cohorts for b in bands[1:]],
                 *([f"slope:{c}" for c in cohorts] if self.slope_sd else []), *features]
        p = len(names)
        P = np.zeros((p, p))
        nb = len(bands) - 1
        # random walk over the age bands, the youngest band (coefficient 0) first
        D = np.zeros((nb, nb))
        for j in range(nb):
            D[j, j] = 1.0
            if j:
                D[j, j - 1] = -1.0
        P[1:1 + nb, 1:1 + nb] = D.T @ D / self.age_sd ** 2
        at = 1 + nb
        P[at:at + len(cohorts), at:at + len(cohorts)] = np.eye(len(cohorts)) / self.cohort_sd ** 2
        at += len(cohorts)
        k = len(cohorts) * nb
        P[at:at + k, at:at + k] = np.eye(k) / self.shape_sd ** 2
        at += k
        if self.slope_sd:
            P[at:at + len(cohorts), at:at + len(cohorts)] = np.eye(len(cohorts)) / self.slope_sd ** 2
            at += len(cohorts)
        P[at:, at:] = np.eye(len(features)) * self.ridge
        return Design(names=names, cohorts=list(cohorts), bands=bands, features=list(features), penalty=P)

    def _matrix(self, states: pd.DataFrame, design: Design) -> np.ndarray:
        n = len(states)
        nb = len(design.bands) - 1
        X = np.zeros((n, len(design.names)))
        X[:, 0] = 1.0
        band = age_band_index(states["age_hours"].to_numpy(dtype=float))
        rows = np.arange(n)
        has_band = band > 0
        X[rows[has_band], band[has_band]] = 1.0
        cohort = cohort_labels(states, self.by).to_numpy() if n else np.array([], dtype=object)
        code = pd.Index(design.cohorts).get_indexer(cohort)
        known = code >= 0
        at = 1 + nb
        X[rows[known], at + code[known]] = 1.0
        at += len(design.cohorts)
        shaped = known & has_band
        X[rows[shaped], at + code[shaped] * nb + band[shaped] - 1] = 1.0
        at += len(design.cohorts) * nb
        if self.slope_sd:
            X[rows[known], at + code[known]] = log_age(states["age_hours"].to_numpy(dtype=float))[known]
            at += len(design.cohorts)
        for j, name in enumerate(design.features):
            X[:, at + j] = states[name].to_numpy(dtype=float)
        return X

    # -- fit / predict --------------------------------------------------------------------
    def fit(self, states: pd.DataFrame, outcomes: pd.DataFrame) -> "LandmarkModel":
        """Fit on landmark ``states`` and their ``window_outcomes``; returns self."""
        keep = (outcomes["exposure_days"].to_numpy() > 0) & np.isfinite(states["age_hours"].to_numpy(dtype=float))
        states, outcomes = states[keep], outcomes[keep]
        if not len(states):
            raise FitError("no drive was in service at any landmark with a window to watch")
        failed = outcomes["failed"].to_numpy(dtype=bool)
        if not failed.any():
            raise FitError("no failures among the drives watched: nothing to fit "
                           "(the removal log needs rows with reason 'failed')")
        cohorts = sorted(pd.unique(cohort_labels(states, self.by)))
        values = states[list(LANDMARK_FEATURES)].to_numpy(dtype=float)
        varies = values.max(axis=0) > values.min(axis=0)
        features = [f for f, v in zip(LANDMARK_FEATURES, varies) if v]
        design = self._design(cohorts, features)
        # Rows with the same design (cohort, age band, covariates: most healthy drives) add their
        # failures and days: the likelihood is a sum over rows, so the fit is the same on a
        # fraction of the rows (and memory does not grow with drives x landmarks).
        keys = pd.DataFrame({"cohort": pd.Index(cohorts).get_indexer(cohort_labels(states, self.by)),
                             "band": age_band_index(states["age_hours"].to_numpy(dtype=float))})
        if self.slope_sd:
            keys["age"] = log_age(states["age_hours"].to_numpy(dtype=float))
        for name in features:
            keys[name] = states[name].to_numpy()
        group = keys.groupby(list(keys.columns), sort=False).ngroup().to_numpy()
        first = np.unique(group, return_index=True)[1]
        events = np.bincount(group, weights=failed.astype(float))
        exposure = np.bincount(group, weights=outcomes["exposure_days"].to_numpy(dtype=float))
        X = self._matrix(states.iloc[first], design)
        # Windows of H days started every ``step_days`` overlap: each drive-day sits in about
        # H / step rows. Weighting rows by step / H counts it once, so the penalties weigh
        # against one history's worth of evidence, not H / step copies of it.
        weight = min(1.0, self.step_days / float(self.horizon_days))
        theta, covariance, n_iter = penalised_poisson(X, events, exposure, design.penalty, weight=weight)
        self.design_ = design
        self.coef_ = pd.Series(theta, index=design.names, name="coef")
        self.covariance_ = covariance
        self.n_iter_ = n_iter
        self.n_rows_ = int(len(states))
        self.n_failures_ = int(failed.sum())
        self.exposure_days_ = float(outcomes["exposure_days"].sum())
        return self

    def rate_per_day(self, states: pd.DataFrame) -> np.ndarray:
        """exp(eta) of each state row: failures per drive-day in its window; NaN without an age."""
        X = self._matrix(states, self.design_)
        rate = np.exp(X @ self.coef_.to_numpy())
        rate[~np.isfinite(states["age_hours"].to_numpy(dtype=float))] = np.nan
        return rate

    def predict_proba(self, states: pd.DataFrame, days: float | None = None) -> np.ndarray:
        """P(fail within ``days`` (default: the horizon)) = 1 - exp(-days * rate)."""
        days = float(self.horizon_days if days is None else days)
        return -np.expm1(-days * self.rate_per_day(states))

    def contributions(self, states: pd.DataFrame) -> pd.DataFrame:
        """Each covariate's factor on the rate (exp(beta_j x_j)) for each row: 'why this drive'."""
        out = {}
        for name in self.design_.features:
            out[name] = np.exp(self.coef_[name] * states[name].to_numpy(dtype=float))
        return pd.DataFrame(out, index=states.index)

    def rate_ratios(self) -> pd.DataFrame:
        """exp(coef) with a 95 % range from the penalised information, covariates only."""
        z = 1.959963984540054
        names = self.design_.features
        idx = [self.design_.names.index(n) for n in names]
        coef = self.coef_.to_numpy()[idx]
        se = np.sqrt(np.diag(self.covariance_)[idx])
        return pd.DataFrame({"coef": coef, "se": se, "rate_ratio": np.exp(coef),
                             "rate_ratio_low": np.exp(coef - z * se), "rate_ratio_high": np.exp(coef + z * se)},
                            index=pd.Index(names, name="covariate"))

    # -- persistence (plain JSON; no pickle) ----------------------------------------------
    def to_dict(self) -> dict:
        return {"config": self.config(), "names": self.design_.names, "cohorts": self.design_.cohorts,
                "bands": self.design_.bands, "features": self.design_.features,
                "coef": [float(v) for v in self.coef_.to_numpy()],
                "covariance": [[float(v) for v in row] for row in self.covariance_],
                "n_rows": self.n_rows_, "n_failures": self.n_failures_, "exposure_days": self.exposure_days_,
                "n_iter": self.n_iter_}

    @classmethod
    def from_dict(cls, data: dict) -> "LandmarkModel":
        model = cls(**data["config"])
        model.design_ = model._design(data["cohorts"], data["features"])
        if model.design_.names != data["names"]:
            raise ValueError("saved landmark model: its columns do not match this version's design")
        model.coef_ = pd.Series(data["coef"], index=data["names"], name="coef", dtype=float)
        model.covariance_ = np.asarray(data["covariance"], dtype=float)
        model.n_rows_, model.n_failures_ = int(data["n_rows"]), int(data["n_failures"])
        model.exposure_days_, model.n_iter_ = float(data["exposure_days"]), data.get("n_iter")
        return model


def iter_nights(first_day, last_day) -> Iterator[pd.Timestamp]:
    day = utc(first_day).normalize()
    last = utc(last_day).normalize()
    while day <= last:
        yield day
        day += pd.Timedelta(days=1)
