"""Would these flags have caught the failures? Replay the stored history night by night.

Each scored night uses only what was known by its end (UTC midnight after the night's date):
the rules see the captures of their window up to then; the model is refitted on the landmark
rows before then (every ``refit_days``) with windows and removals cut there; the drives scored
are those in service then (seen in the week before, not removed). The replay reads one day of
captures at a time and keeps only a rule window of them plus a few rows per drive
(``landmark.StateTracker``): the work per night does not grow with the history.

The nights are replayed in stretches (``replay_stretch``, up to ``STRETCH_NIGHTS`` scored nights
of one refit block), each from the drive states at its warm-up night, so an engine can replay
them side by side (docs/scale.md); a stretch sees exactly the window, growth base and model the
night-by-night replay would, and the tallies merge in night order.

Definitions (drive level, as in the disk-failure prediction literature: Hughes, Murray,
Kreutz-Delgado & Elkan, "Improved disk-drive failure warnings", IEEE Trans. Reliability 51(3),
2002; Murray, Hughes & Kreutz-Delgado, JMLR 6, 2005):

* a failure (a removal with an event reason) is in the recall denominator when at least one
  scored night lies within the H days before it; it is *caught* by a method when the method
  flags its drive on such a night; ``recall = caught / failures``; lead time = failure time
  minus the first such flagged night (end of day);
* a *false-alarm drive* is one flagged on a scored night after which it did not fail within H
  days; ``false_alarm_rate = false_alarm_drives / scored_drives`` (drives in service on a scored
  night). A night whose H days reach past the stored data cannot yet say "did not fail": the last
  scored night by default is the last one with H days of data after it.

Methods: ``rule:<id>`` (that rule fired), ``severity:<name>`` (a rule of that severity or a
worse one fired), ``drive-self-assessment`` (the drive's own verdict: an ATA pre-failure
attribute at or below its threshold, or any NVMe critical-warning bit), and ``combined``: the
ranking score ``1 - (1 - w_severity) * (1 - p_fail)`` (docs/ranking.md, without the group term)
at the operating point -- the lowest threshold, i.e. the highest recall, whose false-alarm rate
stays within ``max_false_alarm``. The whole recall / false-alarm curve of the score comes along.

Forecast check: at each refit the model also forecasts the failures of the next H days among the
drives in service, fleet-wide and per cohort, with the 90 % Poisson-binomial interval of
``forecast``; the share of intervals holding the observed count is the coverage.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from triage.risk.forecast import INTERVAL, pmf_quantile, poisson_binomial_pmf
from triage.risk.score import SEVERITIES, SEVERITY_WEIGHT

METHOD_COLUMNS = ("method", "failures", "caught", "recall", "false_alarm_drives", "scored_drives",
                  "false_alarm_rate", "lead_days_median")
SELF_ASSESSMENT_METHOD = "drive-self-assessment"
COMBINED_METHOD = "combined"
#: Days of captures read from the store at a time.
READ_DAYS = 7
#: Points kept of the recall / false-alarm curve.
CURVE_POINTS = 200
#: Scored nights per replay task (``replay_stretch``): each also replays its warm-up days (the
#: rule window or the growth base, the longer), so shorter stretches mean more tasks to share
#: out but more days read twice.
STRETCH_NIGHTS = 10

_NS_PER_DAY = 86_400_000_000_000


class BacktestError(ValueError):
    """The backtest cannot run on this store (no captures, history too short, no failure)."""


class BacktestOptionError(BacktestError):
    """An option is out of range (a rate outside (0, 1), a night outside the stored history)."""


@dataclass
class BacktestResult:
    horizon_days: float
    first_night: pd.Timestamp
    last_night: pd.Timestamp
    training_days: int
    refit_days: int
    max_false_alarm: float
    methods: pd.DataFrame  # METHOD_COLUMNS
    operating_point: dict
    curve: pd.DataFrame  # score_threshold, recall, false_alarm_rate
    forecasts: pd.DataFrame  # origin, scope, name, drives, expected, interval_low, interval_high, observed, inside
    refits: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def forecast_coverage(self) -> float | None:
        return float(self.forecasts["inside"].mean()) if len(self.forecasts) else None


class _Method:
    """Per-method drive-level tallies: the first flagged night before each failure, false alarms."""

    def __init__(self) -> None:
        self.first_caught: dict[int, int] = {}  # failure index -> first flagged night (ns)
        self.false_alarm: set = set()  # drive codes (serials inside a stretch)

    def update(self, flagged: np.ndarray, positive_failure: np.ndarray, negative: np.ndarray,
               codes: np.ndarray, moment_ns: int) -> None:
        for failure in positive_failure[flagged & (positive_failure >= 0)]:
            self.first_caught.setdefault(int(failure), moment_ns)
        self.false_alarm.update(codes[flagged & negative].tolist())


def backtest_store(store, ruleset, horizon_days: float = 30, max_false_alarm: float = 0.01,
                   first_night=None, last_night=None, refit_days: int = 30, by: Sequence[str] = ("model",),
                   count_proactive: bool = False, evaluate: Callable | None = None,
                   progress: Callable[[int, int], None] | None = None, engine=None) -> BacktestResult:
    """Replay ``store`` night by night and score every method (module docstring).

    ``engine`` (``triage.engine``; None: this process): where the stretches of nights are
    replayed. One pass here replays the history for the landmark rows and fits the model at
    each refit; each stretch (up to ``STRETCH_NIGHTS`` nights of one refit block) then replays
    on its own from ``max(GROWTH_DAYS, rule window)`` days before it, starting from the drive
    states this pass had there. The stretches' tallies are merged here in night order: every
    engine gives the same result. ``evaluate`` must then be a module-level function.
    """
    from triage.survival.landmark import (  # noqa: PLC0415  (survival layer, to our left)
        GROWTH_DAYS, STATE_SOURCES, FitError, LandmarkModel, landmark_dates, stored_span, utc, window_outcomes)
    from triage.survival.model import clean_removals, event_reasons  # noqa: PLC0415

    if evaluate is None:
        from triage.rules import evaluate  # noqa: PLC0415  (rules layer, to our left)
    if not 0 < max_false_alarm < 1:
        raise BacktestOptionError(f"--max-false-alarm must lie strictly between 0 and 1, got {max_false_alarm}")
    if not horizon_days > 0:
        raise BacktestOptionError(f"--horizon-days must be positive, got {horizon_days}")
    if refit_days < 1:
        raise BacktestOptionError(f"--refit-days must be at least 1, got {refit_days}")
    H = float(horizon_days)
    span = stored_span(store)
    if span is None:
        raise BacktestError(f"{store.root}: no snapshots stored (run 'triage ingest' first, or check --store)")
    data_first, data_end = span
    last_day = data_end.normalize()
    # the tool's training period: one horizon and never less than four weeks -- the first fit
    # has weekly landmarks over that time, their windows cut at the night (partial windows count
    # as exposure: section 1 of docs/prediction.md)
    training_days = int(max(np.ceil(H), 28))
    default_first = data_first + pd.Timedelta(days=training_days)
    default_last = (data_end - pd.Timedelta(days=H)).normalize() - pd.Timedelta(days=1)
    first = default_first if first_night is None else utc(first_night).normalize()
    last = min(default_last, last_day) if last_night is None else utc(last_night).normalize()
    stored = f"{data_first:%Y-%m-%d} to {last_day:%Y-%m-%d}"
    for name, night in (("--from", first_night), ("--to", last_night)):
        if night is not None and not data_first <= utc(night).normalize() <= last_day:
            raise BacktestOptionError(f"{name} {utc(night):%Y-%m-%d} is outside the stored history ({stored})")
    if first_night is not None and first < data_first + pd.Timedelta(days=14):
        raise BacktestOptionError(f"--from {first:%Y-%m-%d} leaves under two weeks to train on (history starts {data_first:%Y-%m-%d})")
    if last < first:
        raise BacktestError(
            f"the history ({stored}) is too short to backtest a {H:g}-day horizon: it needs {training_days} "
            f"days to train, then nights with {H:g} days of data after them")

    removals = clean_removals(store.read("removals", columns=["serial", "removed_at", "reason"]))
    events = event_reasons(count_proactive)
    fail_rows = removals[removals["reason"].isin(events)].reset_index(drop=True)
    fail_serial = fail_rows["serial"].to_numpy(dtype=object)
    fail_ns = _ns(fail_rows["removed_at"])
    first_moment_ns = (first + pd.Timedelta(days=1)).value
    last_moment_ns = (last + pd.Timedelta(days=1)).value
    # in the denominator: some scored night (moment m) with f - H <= m < f
    in_denominator = (fail_ns > first_moment_ns) & (fail_ns - int(H * _NS_PER_DAY) <= last_moment_ns)
    if not in_denominator.any():
        raise BacktestError(f"no failure ({' or '.join(events)} removal) falls within {H:g} days after a scored "
                            f"night ({first:%Y-%m-%d} to {last:%Y-%m-%d}): nothing to catch")

    rules = list(ruleset.rules)
    methods = _new_methods(rules)
    codes_of: dict[str, int] = {}
    scored_drives: set[int] = set()
    pos_max = np.full(len(fail_rows), -1.0)  # best combined score on a night before each failure
    pos_nights: list[tuple[np.ndarray, int, np.ndarray]] = []  # (failure idx, moment, score) for lead times
    neg_max: dict[int, float] = {}
    forecasts: list[dict] = []
    refits: list[str] = []
    notes: list[str] = []

    lookback = max(int(getattr(ruleset, "window_days", 1) or 1), 1)
    columns = sorted(set(STATE_SOURCES) | set(ruleset.fields) | {"serial", "taken_at"})
    from triage.store.schema import SNAPSHOTS  # noqa: PLC0415  (store layer, to our left)
    from triage.survival.tasks import task_store  # noqa: PLC0415

    columns = tuple(c for c in columns if c in SNAPSHOTS.names)
    nights = pd.date_range(data_first, last, freq="D")
    landmarks = set(landmark_dates(data_first, last + pd.Timedelta(days=1)))
    scored_nights = [day for day in nights if day >= first]
    # the model is refitted on the first scored night and every refit_days after it; each refit
    # block of nights is cut into stretches, each replayed on its own (an engine task) from its
    # warm-up night on: the rule window and the growth base need that many days before it
    stretches: list[tuple[pd.Timestamp, pd.Timestamp, bool]] = []  # (first, last night, starts a block)
    for b in range(0, len(scored_nights), refit_days):
        block = scored_nights[b:b + refit_days]
        for s in range(0, len(block), STRETCH_NIGHTS):
            stretch = block[s:s + STRETCH_NIGHTS]
            stretches.append((stretch[0], stretch[-1], s == 0))
    warm_days = max(GROWTH_DAYS, lookback)
    warm_from = {start: max(data_first, start - pd.Timedelta(days=warm_days)) for start, _, _ in stretches}
    source = task_store(store, engine)
    history_pass = _HistoryPass(store, columns, data_first, landmarks, removals, set(warm_from.values()))

    def refit(day: pd.Timestamp, landmark_frames: list[pd.DataFrame]):
        """(model, whether its forecast can be checked) fitted on the landmark rows before the night."""
        moment = day + pd.Timedelta(days=1)
        known_removals = removals[removals["removed_at"] <= moment]
        train = pd.concat(landmark_frames, ignore_index=True) if landmark_frames else None
        try:
            if train is None:
                raise FitError("no landmark yet")
            train = train[train["landmark"] < moment]
            outcomes = window_outcomes(train, known_removals, H, moment, events)
            model = LandmarkModel(horizon_days=H, by=by).fit(train, outcomes)
            refits.append(f"{day:%Y-%m-%d}")
        except FitError as exc:
            model = None
            notes.append(f"{day:%Y-%m-%d}: no model ({exc}); the combined score is the rules' alone until the next refit")
        return model, model is not None and moment + pd.Timedelta(days=H) <= data_end

    def stretch_items():
        model, forecast_origin = None, False
        for start, end, starts_block in stretches:
            if starts_block:  # the landmark rows before tonight are known once the pass has replayed to here
                history_pass.run_until(start)
                model, forecast_origin = refit(start, history_pass.landmark_frames)
            history_pass.run_until(warm_from[start])
            latest, known_first = history_pass.taken[warm_from[start]]
            for night in [n for n in history_pass.taken if n < warm_from[start]]:  # stretches come in order
                del history_pass.taken[night]
            yield _Stretch(store=source, columns=columns, data_first=data_first, warm_from=warm_from[start],
                           first_night=start, last_night=end, latest=latest, first=known_first, model=model,
                           forecast_origin=forecast_origin and starts_block, removals=removals,
                           fail_serial=fail_serial, fail_ns=fail_ns, horizon_days=H, data_end=data_end,
                           lookback=lookback, ruleset=ruleset, evaluate=evaluate)

    if engine is None:  # one loop here: each night read once, as the stretches' warm-ups would repeat it
        parts = [_replay_in_order(store, columns, data_first, nights, first, landmarks, removals,
                                  {start for start, _, starts_block in stretches if starts_block}, refit,
                                  _NightScorer(ruleset, evaluate, fail_serial, fail_ns, H, data_end), lookback,
                                  progress)]
        ends = [last]
    else:
        parts = engine.map(replay_stretch, stretch_items())
        ends = [end for _, end, _ in stretches]
    for end, part in zip(ends, parts):
        if progress:
            progress(int((end - data_first) / pd.Timedelta(days=1)), len(nights))
        codes = {serial: codes_of.setdefault(serial, len(codes_of)) for serial in part.serials}
        scored_drives.update(codes.values())
        for name, (first_caught, false_alarm) in part.methods.items():
            for failure, moment_ns in first_caught.items():
                methods[name].first_caught.setdefault(failure, moment_ns)
            methods[name].false_alarm.update(codes[serial] for serial in false_alarm)
        np.maximum(pos_max, part.pos_max, out=pos_max)
        pos_nights.extend(part.pos_nights)
        for serial, value in part.neg_max.items():
            code = codes[serial]
            if value > neg_max.get(code, -1.0):
                neg_max[code] = value
        forecasts.extend(part.forecasts)
    if progress:
        progress(len(nights), len(nights))

    denominator = np.flatnonzero(in_denominator)
    n_scored = len(scored_drives)
    rows = [_method_row(name, m, denominator, fail_ns, n_scored) for name, m in methods.items()]
    negative_scores = np.array(list(neg_max.values()))
    curve, point = _curve(pos_max[denominator], negative_scores, n_scored, max_false_alarm)
    combined = _Method()
    threshold = point["score_threshold"]
    for failures, moment_ns, scores in pos_nights:
        for failure in failures[scores >= threshold]:
            combined.first_caught.setdefault(int(failure), moment_ns)
    combined.false_alarm = {c for c, v in neg_max.items() if v >= threshold}
    rows.insert(0, _method_row(COMBINED_METHOD, combined, denominator, fail_ns, n_scored))
    if not refits:
        notes.append("the model could not be fitted on any scored night: the combined score is the rules' alone")
    return BacktestResult(
        horizon_days=H, first_night=first, last_night=last, training_days=training_days, refit_days=refit_days,
        max_false_alarm=max_false_alarm, methods=pd.DataFrame(rows, columns=list(METHOD_COLUMNS)),
        operating_point=point, curve=curve, forecasts=pd.DataFrame(forecasts), refits=refits, notes=notes)


class _Nights:
    """Each night's captures, read a week (``READ_DAYS``) at a time on weeks counted from the
    first stored day -- the same weeks wherever a night is read, so it is the same frame (a read
    types an integer column holding nulls as float) in the pass here and in every stretch."""

    def __init__(self, store, columns, data_first: pd.Timestamp):
        self.store, self.columns, self.data_first = store, list(columns), data_first
        self._start = self._week = self._week_day = None

    def night(self, day: pd.Timestamp) -> pd.DataFrame:
        from triage.survival.landmark import utc_times  # noqa: PLC0415  (survival layer, to our left)

        start = self.data_first + pd.Timedelta(days=READ_DAYS * ((day - self.data_first).days // READ_DAYS))
        if start != self._start:
            self._start = start
            self._week = self.store.read("snapshots", columns=self.columns, since=start.to_pydatetime(),
                                         until=(start + pd.Timedelta(days=READ_DAYS)).to_pydatetime())
            self._week_day = utc_times(self._week["taken_at"]).dt.floor("D")
        return self._week[(self._week_day == day).to_numpy()]


class _HistoryPass:
    """The backtest's one pass over the history in the command's process: the in-service drive
    states at each landmark night (the training rows of every refit) and, for each stretch, the
    drive states as they stood when its warm-up night began."""

    def __init__(self, store, columns, data_first, landmarks, removals, keep_at):
        from triage.survival.landmark import StateTracker  # noqa: PLC0415  (survival layer, to our left)

        self.nights = _Nights(store, columns, data_first)
        self.landmarks, self.removals, self.keep_at = landmarks, removals, keep_at
        self.tracker = StateTracker()
        self.landmark_frames: list[pd.DataFrame] = []
        self.taken: dict[pd.Timestamp, tuple] = {}  # night -> (latest, first) before its captures
        self.next_night = data_first

    def run_until(self, night: pd.Timestamp) -> None:
        """Replay every night before ``night``."""
        while True:
            day = self.next_night
            if day in self.keep_at and day not in self.taken:
                self.taken[day] = (self.tracker.latest, self.tracker.first)
            if day >= night:
                return
            moment = day + pd.Timedelta(days=1)
            self.tracker.add(self.nights.night(day))
            if moment in self.landmarks:
                state = self.tracker.state_at(moment, self.removals[self.removals["removed_at"] <= moment])
                if len(state):
                    self.landmark_frames.append(state.assign(landmark=moment))
            self.tracker.mark(moment)
            self.next_night = moment


@dataclass
class _Stretch:
    """A replay task: score ``first_night`` to ``last_night`` with ``model``, replaying from
    ``warm_from`` on with the drive states (``latest``, ``first``) known when that night began."""

    store: object  # tasks.task_store
    columns: tuple
    data_first: pd.Timestamp
    warm_from: pd.Timestamp
    first_night: pd.Timestamp
    last_night: pd.Timestamp
    latest: pd.DataFrame | None
    first: pd.DataFrame | None
    model: object  # LandmarkModel or None
    forecast_origin: bool  # the first night is a refit whose forecast can be checked
    removals: pd.DataFrame
    fail_serial: np.ndarray
    fail_ns: np.ndarray
    horizon_days: float
    data_end: pd.Timestamp
    lookback: int
    ruleset: object
    evaluate: Callable


@dataclass
class _StretchTally:
    """What a stretch found, by serial: merged in night order by ``backtest_store``."""

    serials: list  # scored serials, in the order first seen
    methods: dict  # method -> (failure -> first flagged moment, false-alarm serials)
    pos_max: np.ndarray
    pos_nights: list
    neg_max: dict  # serial -> best combined score on a night it did not go on to fail
    forecasts: list


def _new_methods(rules) -> dict[str, _Method]:
    methods = {SELF_ASSESSMENT_METHOD: _Method()}
    methods.update({f"severity:{s}": _Method() for s in SEVERITIES})
    methods.update({f"rule:{r.id}": _Method() for r in rules})
    return methods


class _NightScorer:
    """Scores nights one after another and keeps the drive-level tallies, by serial."""

    def __init__(self, ruleset, evaluate: Callable, fail_serial: np.ndarray, fail_ns: np.ndarray,
                 horizon_days: float, data_end: pd.Timestamp):
        self.ruleset, self.evaluate, self.rules = ruleset, evaluate, list(ruleset.rules)
        self.fail_serial, self.fail_ns, self.H, self.data_end = fail_serial, fail_ns, horizon_days, data_end
        self.methods = _new_methods(self.rules)
        self.severity_rank = {s: i for i, s in enumerate(SEVERITIES)}  # 0 = worst
        self.seen: dict = {}
        self.pos_max = np.full(len(fail_ns), -1.0)
        self.pos_nights: list[tuple[np.ndarray, int, np.ndarray]] = []
        self.neg_max: dict = {}
        self.forecasts: list[dict] = []

    def score(self, day: pd.Timestamp, state: pd.DataFrame, window, model, forecast_origin: bool) -> None:
        """Tonight's flags and combined score of the in-service drives ``state``."""
        from triage.survival.observations import cohort_labels  # noqa: PLC0415  (survival layer, to our left)

        H, methods, severity_rank = self.H, self.methods, self.severity_rank
        moment = day + pd.Timedelta(days=1)
        serials = state["serial"].to_numpy(dtype=object)
        self.seen.update(dict.fromkeys(serials.tolist()))
        p = np.zeros(len(state)) if model is None else np.nan_to_num(model.predict_proba(state, H), nan=0.0)
        history = pd.concat([f for _, f in window], ignore_index=True)
        flags = self.evaluate(self.ruleset, history, now=moment.to_pydatetime())
        flags = flags[flags["serial"].isin(serials)]
        position = pd.Index(serials).get_indexer(flags["serial"])
        worst = np.full(len(state), len(SEVERITIES))
        np.minimum.at(worst, position, flags["severity"].map(severity_rank).to_numpy(dtype=np.int64))
        weight = np.array([SEVERITY_WEIGHT[SEVERITIES[w]] if w < len(SEVERITIES) else 0.0 for w in worst])
        score = 1 - (1 - weight) * (1 - p)

        # which failure (if any) lies within H days after this night, per scored drive
        moment_ns = moment.value
        upcoming = (self.fail_ns > moment_ns) & (self.fail_ns <= moment_ns + int(H * _NS_PER_DAY))
        positive_failure = np.full(len(state), -1)
        if upcoming.any():
            where = pd.Index(serials).get_indexer(self.fail_serial[upcoming])
            hit = where >= 0
            positive_failure[where[hit]] = np.flatnonzero(upcoming)[hit]
        positive = positive_failure >= 0
        negative = ~positive & (moment_ns + int(H * _NS_PER_DAY) <= self.data_end.value)

        methods[SELF_ASSESSMENT_METHOD].update(state["self_assessment"].to_numpy() > 0, positive_failure,
                                               negative, serials, moment_ns)
        for s in SEVERITIES:
            methods[f"severity:{s}"].update(worst <= severity_rank[s], positive_failure, negative, serials, moment_ns)
        fired_by_rule = flags.groupby("rule_id")
        for rule in self.rules:
            flagged = np.zeros(len(state), dtype=bool)
            if rule.id in fired_by_rule.groups:
                flagged[pd.Index(serials).get_indexer(fired_by_rule.get_group(rule.id)["serial"])] = True
            methods[f"rule:{rule.id}"].update(flagged, positive_failure, negative, serials, moment_ns)
        if positive.any():
            np.maximum.at(self.pos_max, positive_failure[positive], score[positive])
            self.pos_nights.append((positive_failure[positive], moment_ns, score[positive]))
        for serial, value in zip(serials[negative].tolist(), score[negative].tolist()):
            if value > self.neg_max.get(serial, -1.0):
                self.neg_max[serial] = value
        if forecast_origin:
            self.forecasts.extend(_forecast_rows(day, state, model.predict_proba(state, H), positive_failure >= 0,
                                                 cohort_labels(state, model.by).to_numpy()))

    def tally(self) -> _StretchTally:
        return _StretchTally(serials=list(self.seen),
                             methods={name: (m.first_caught, m.false_alarm) for name, m in self.methods.items()},
                             pos_max=self.pos_max, pos_nights=self.pos_nights, neg_max=self.neg_max,
                             forecasts=self.forecasts)


def _slide(window: deque, day: pd.Timestamp, frame: pd.DataFrame, lookback: int) -> None:
    """Keep the captures of the rule window (``lookback`` days) up to the end of ``day``."""
    window.append((day, frame))
    while window and window[0][0] < day + pd.Timedelta(days=1) - pd.Timedelta(days=lookback + 1):
        window.popleft()


def replay_stretch(item: _Stretch) -> _StretchTally:
    """The map step of ``backtest_store`` (runs on an engine's worker): one stretch of nights."""
    from triage.survival.landmark import StateTracker  # noqa: PLC0415  (survival layer, to our left)
    from triage.survival.tasks import opened  # noqa: PLC0415

    removals = item.removals
    tracker = StateTracker()
    tracker.latest, tracker.first = item.latest, item.first
    nights = _Nights(opened(item.store), item.columns, item.data_first)
    scorer = _NightScorer(item.ruleset, item.evaluate, item.fail_serial, item.fail_ns, item.horizon_days,
                          item.data_end)
    window: deque[tuple[pd.Timestamp, pd.DataFrame]] = deque()
    for day in pd.date_range(item.warm_from, item.last_night, freq="D"):
        frame = nights.night(day)
        moment = day + pd.Timedelta(days=1)
        tracker.add(frame)
        _slide(window, day, frame, item.lookback)
        if day < item.first_night:  # warm-up: the rule window and the growth base
            tracker.mark(moment)
            continue
        state = tracker.state_at(moment, removals[removals["removed_at"] <= moment])
        tracker.mark(moment)
        if not state.empty:
            scorer.score(day, state, window, item.model, item.forecast_origin and day == item.first_night)
    return scorer.tally()


def _replay_in_order(store, columns, data_first: pd.Timestamp, nights, first: pd.Timestamp, landmarks,
                     removals: pd.DataFrame, refit_nights: set, refit: Callable, scorer: _NightScorer,
                     lookback: int, progress: Callable | None) -> _StretchTally:
    """The whole replay in one loop, night after night (no engine): the landmark rows, the refits
    and the scores share each night's reading and drive states."""
    from triage.survival.landmark import StateTracker  # noqa: PLC0415  (survival layer, to our left)

    reader = _Nights(store, columns, data_first)
    tracker = StateTracker()
    window: deque[tuple[pd.Timestamp, pd.DataFrame]] = deque()
    landmark_frames: list[pd.DataFrame] = []
    model = None
    for k, day in enumerate(nights):
        if progress:
            progress(k, len(nights))
        frame = reader.night(day)
        moment = day + pd.Timedelta(days=1)
        tracker.add(frame)
        _slide(window, day, frame, lookback)
        scored = day >= first
        # the drives in service tonight: a landmark row for later fits and/or tonight's scores
        state = (tracker.state_at(moment, removals[removals["removed_at"] <= moment])
                 if scored or moment in landmarks else None)
        if moment in landmarks and len(state):
            landmark_frames.append(state.assign(landmark=moment))
        tracker.mark(moment)
        if not scored:
            continue
        forecast_origin = False
        if day in refit_nights:
            model, forecast_origin = refit(day, landmark_frames)
        if not state.empty:
            scorer.score(day, state, window, model, forecast_origin)
    return scorer.tally()


def _ns(stamps: pd.Series) -> np.ndarray:
    from triage.survival.landmark import utc_times  # noqa: PLC0415  (survival layer, to our left)

    return utc_times(stamps).dt.tz_convert(None).to_numpy("datetime64[ns]").view(np.int64)


def _method_row(name: str, method: _Method, denominator: np.ndarray, fail_ns: np.ndarray, scored: int) -> dict:
    caught = [i for i in denominator if i in method.first_caught]
    leads = [(fail_ns[i] - method.first_caught[i]) / _NS_PER_DAY for i in caught]
    failures = len(denominator)
    return {"method": name, "failures": failures, "caught": len(caught),
            "recall": len(caught) / failures if failures else float("nan"),
            "false_alarm_drives": len(method.false_alarm), "scored_drives": scored,
            "false_alarm_rate": len(method.false_alarm) / scored if scored else float("nan"),
            "lead_days_median": float(np.median(leads)) if leads else None}


def _curve(positive_max: np.ndarray, negative_max: np.ndarray, scored: int,
           max_false_alarm: float) -> tuple[pd.DataFrame, dict]:
    """Recall and false-alarm rate at every distinct score threshold; the operating point is the
    lowest threshold (highest recall) whose false-alarm rate is within ``max_false_alarm``."""
    candidates = np.unique(np.concatenate([positive_max[positive_max >= 0], negative_max, [np.inf]]))
    pos = np.sort(positive_max)
    neg = np.sort(negative_max)
    recall = (len(pos) - np.searchsorted(pos, candidates, side="left")) / max(len(pos), 1)
    false_alarm = (len(neg) - np.searchsorted(neg, candidates, side="left")) / max(scored, 1)
    allowed = np.flatnonzero(false_alarm <= max_false_alarm)
    best = allowed[0]  # candidates ascend: the first allowed threshold has the highest recall
    point = {"max_false_alarm": max_false_alarm, "score_threshold": float(candidates[best]),
             "recall": float(recall[best]), "false_alarm_rate": float(false_alarm[best])}
    keep = np.unique(np.concatenate([np.linspace(0, len(candidates) - 1, min(CURVE_POINTS, len(candidates)))
                                     .round().astype(int), [best]]))
    finite = np.isfinite(candidates[keep])
    curve = pd.DataFrame({"score_threshold": candidates[keep][finite], "recall": recall[keep][finite],
                          "false_alarm_rate": false_alarm[keep][finite]})
    return curve, point


def _forecast_rows(day: pd.Timestamp, state: pd.DataFrame, p: np.ndarray, failed: np.ndarray,
                   cohort: np.ndarray) -> list[dict]:
    p = np.nan_to_num(p, nan=0.0)
    rows = []
    groups = [("fleet", "fleet", np.ones(len(state), dtype=bool))]
    groups += [("cohort", str(c), cohort == c) for c in sorted(pd.unique(cohort))]
    for scope, name, members in groups:
        pmf = poisson_binomial_pmf(p[members])
        low, high = pmf_quantile(pmf, INTERVAL[0]), pmf_quantile(pmf, INTERVAL[1])
        observed = int(failed[members].sum())
        rows.append({"origin": f"{day:%Y-%m-%d}", "scope": scope, "name": name, "drives": int(members.sum()),
                     "expected": float(p[members].sum()), "interval_low": low, "interval_high": high,
                     "observed": observed, "inside": bool(low <= observed <= high)})
    return rows


__all__ = ["BacktestError", "BacktestOptionError", "BacktestResult", "METHOD_COLUMNS", "backtest_store"]
