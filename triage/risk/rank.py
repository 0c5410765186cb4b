"""Rank drives for proactive replacement: rule flags + model probability + group awareness.

``rank_drives`` is pure (frames in, frame out); ``rank_store`` reads only what it needs from the
store: the last ``window_days`` (+ a short look-back for degraded groups) of snapshot partitions,
the removal log and the saved model. It never scans the whole history.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from triage.risk.groups import (
    GroupConfig,
    group_risk,
    in_time_order,
    last_known,
    lost_members,
    member_probabilities,
)
from triage.risk.score import (
    SEVERITY_WEIGHT,
    action_text,
    degraded_caution,
    drive_actions,
    risk_scores,
    severity_name,
    tier_index,
)
from triage.risk.view import STALE_HOURS, RowFilter, silence_lines, site_of
from triage.store.current import RECENT_DAYS, window_start
from triage.store.dataset import EARLIEST_DAY

#: Days of captures looked at to notice a member that went missing (at least this many).
GROUP_LOOKBACK_DAYS = 7

RANK_COLUMNS = [
    "rank", "serial", "model", "host", "slot", "group", "power_on_hours", "age_days", "severity",
    "score", "p_fail", "category", "categories", "action", "actions", "rules", "evidence",
    "p_group_loss", "degraded", "group_importance", "p_member", "group_first", "state", "first_raised",
    "taken_at",
]
SILENT_COLUMNS = ["serial", "model", "host", "slot", "group", "last_seen"]
#: Silent drives as reported: with ``state`` not-reporting and, given a ticket export, the flag
#: each had open (``severity``, ``first_raised``).
SILENT_REPORT_COLUMNS = SILENT_COLUMNS + ["state", "severity", "first_raised"]
NOT_REPORTING_COLUMNS = ["scope", "name", "hosts", "drives", "last_seen"]
_FLAG_COLUMNS = ["serial", "severity", "category", "categories", "actions", "rules", "evidence"]


@dataclass
class RankResult:
    drives: pd.DataFrame  # RANK_COLUMNS, most urgent first
    groups: pd.DataFrame  # groups.group_risk's table, plus who was lost and when
    model_used: bool
    horizon_days: float | None
    as_of: datetime | None  # the newest capture used
    notes: list[str] = field(default_factory=list)
    silent: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=SILENT_REPORT_COLUMNS))
    not_reporting: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=NOT_REPORTING_COLUMNS))
    removed: frozenset = frozenset()  # serials in the removal log
    flags: pd.DataFrame = field(default_factory=pd.DataFrame)  # every rule firing (rules.evaluate's rows)
    lost: pd.DataFrame = field(default_factory=pd.DataFrame)  # groups.lost_members' table


def summarise_flags(flags: pd.DataFrame) -> pd.DataFrame:
    """One row per serial: most urgent severity and its category, every category that fired, the
    actions they ask for (score.drive_actions), rule ids and evidence (most urgent first)."""
    if flags is None or flags.empty:
        return pd.DataFrame(columns=_FLAG_COLUMNS)
    flags = flags.assign(severity=flags["severity"].map(severity_name))
    if "category" not in flags:
        flags = flags.assign(category=None)
    flags = flags.assign(category=flags["category"].map(severity_name))
    flags = flags.assign(_order=flags["severity"].map(tier_index))
    flags = flags.sort_values(["serial", "_order", "rule_id"], kind="stable")
    titles = flags["title"] if "title" in flags else flags["rule_id"]
    rows, current = [], None
    # one pass over the firings, already in (serial, urgency, rule) order: plain Python per firing
    for serial, severity, category, rule_id, evidence, title in zip(
            flags["serial"].tolist(), flags["severity"].tolist(), flags["category"].tolist(),
            flags["rule_id"].tolist(), flags["evidence"].tolist(), titles.tolist()):
        if current is None or serial != current[0]:
            current = (serial, severity, category, {}, [], {}, [])
            rows.append(current)
        _, _, _, categories, findings, rules, texts = current
        if category:
            categories[category] = None
        findings.append((severity, category))
        rules[str(rule_id)] = None
        texts.append(str(evidence) if isinstance(evidence, str) and evidence else str(title))
    rows = [{"serial": serial, "severity": severity, "category": category, "categories": list(categories),
             "actions": drive_actions(findings), "rules": list(rules), "evidence": texts}
            for serial, severity, category, categories, findings, rules, texts in rows]
    return pd.DataFrame(rows, columns=_FLAG_COLUMNS)


def rank_drives(
    latest: pd.DataFrame,
    flags: pd.DataFrame,
    p_fail: pd.Series | None,
    *,
    horizon_days: float | None = None,
    lost: pd.DataFrame | None = None,
    config: GroupConfig | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Order drives by action tier, then score (see triage.risk.score); returns (drives, groups).

    ``latest``: one row per serial (snapshot columns). ``flags``: rule firings (serial, rule_id,
    severity, category, title, evidence). ``p_fail``: P(fail within ``horizon_days``) by serial, or
    None when there is no model. ``lost``: groups.lost_members (group, serial, host, slot, last_seen).
    """
    config = config or GroupConfig()
    lost = lost if lost is not None else pd.DataFrame(columns=["group", "serial", "host", "slot", "last_seen"])
    drives = latest.reset_index(drop=True).copy()
    for column in ("model", "host", "slot", "group", "taken_at"):
        if column not in drives:
            drives[column] = None
    drives = drives.merge(summarise_flags(flags), on="serial", how="left")
    unflagged = np.flatnonzero(drives["rules"].isna().to_numpy())
    for column in ("categories", "actions", "rules", "evidence"):  # a fresh empty list per unflagged drive
        values = drives[column].to_numpy(dtype=object).copy()
        for i in unflagged.tolist():
            values[i] = []
        drives[column] = values
    for column in ("severity", "category"):
        drives[column] = drives[column].astype(object).where(drives[column].notna(), None)
    if p_fail is not None:
        drives["p_fail"] = drives["serial"].map(p_fail).astype(float)
    else:
        drives["p_fail"] = float("nan")

    # each member's probability over its group's rebuild window
    drives["p_member"] = member_probabilities(drives["p_fail"], drives["severity"], drives["group"],
                                              horizon_days if p_fail is not None else None, config)
    groups, importance = group_risk(drives[["serial", "group", "p_member"]], lost, config)
    groups = _with_lost_members(groups, lost)

    by_group = groups.set_index("group")
    drives["group_importance"] = drives["serial"].map(importance).fillna(0.0)
    drives["p_group_loss"] = drives["group"].map(by_group["p_group_loss"]).astype(float)
    drives["degraded"] = drives["group"].map(by_group["degraded"]).eq(True)
    drives["score"] = risk_scores(np.array([SEVERITY_WEIGHT.get(s, 0.0) for s in drives["severity"].tolist()]),
                                  drives["p_fail"].to_numpy(dtype=float), drives["group_importance"].to_numpy(dtype=float))
    drives["group_first"], group_notes = _first_in_degraded_group(drives, groups)
    drives["action"] = [
        action_text(actions, _caution_for(degraded, group, note, by_group))
        for actions, degraded, group, note in zip(drives["actions"], drives["degraded"], drives["group"], group_notes)
    ]
    hours = drives["power_on_hours"] if "power_on_hours" in drives else pd.Series(float("nan"), index=drives.index)
    drives["power_on_hours"] = hours
    drives["age_days"] = hours / 24.0
    drives["state"] = None
    drives["first_raised"] = None
    order = drives.assign(_tier=drives["severity"].map(tier_index), _p=drives["p_fail"].fillna(-1.0),
                          _g=drives["group_first"].astype(float).fillna(0.0))
    drives = order.sort_values(["_tier", "score", "_p", "_g", "serial"],
                               ascending=[True, False, False, True, True], kind="stable")
    drives = drives.reset_index(drop=True)
    drives["rank"] = range(1, len(drives) + 1)
    drives["group_first"] = pd.Series([None if x != x or x is None else int(x) for x in drives["group_first"].tolist()],
                                      index=drives.index, dtype=object)
    return drives[RANK_COLUMNS], groups


def _with_lost_members(groups: pd.DataFrame, lost: pd.DataFrame) -> pd.DataFrame:
    """Add to each group the members it lost and when each was last seen."""
    lost_by_group = {g: part for g, part in lost.groupby("group")} if len(lost) else {}
    groups = groups.copy()
    groups["lost_serials"] = [list(lost_by_group[g]["serial"]) if g in lost_by_group else [] for g in groups["group"]]
    groups["lost_last_seen"] = [
        list(lost_by_group[g]["last_seen"]) if g in lost_by_group and "last_seen" in lost_by_group[g] else []
        for g in groups["group"]]
    groups["caution"] = [
        degraded_caution(g, lost_by_group.get(g), n) if d else None
        for g, n, d in zip(groups["group"], groups["lost"], groups["degraded"])]
    return groups


def _caution_for(degraded: bool, group, note: str | None, by_group: pd.DataFrame) -> str | None:
    """The degraded group's caution, plus which at-risk member to deal with first."""
    if not degraded:
        return None
    caution = by_group.loc[group, "caution"]
    return f"{caution}; {note}" if note else caution


def _first_in_degraded_group(drives: pd.DataFrame, groups: pd.DataFrame) -> tuple[list, list]:
    """For flagged members of a degraded group with two or more of them: the order to deal with them.

    A degraded group has fewer members to lose than it was built for, so the member whose failure
    would lose data sooner is the one more likely to fail within the rebuild window (``p_member``,
    groups.member_probability); it goes first. Returns (position or None, note or None) per drive.
    """
    positions, notes = [None] * len(drives), [None] * len(drives)
    degraded = set(groups.loc[groups["degraded"], "group"]) if len(groups) else set()
    at_risk = drives[drives["group"].isin(degraded) & (drives["rules"].map(len) > 0)]
    for group, part in at_risk.groupby("group"):
        if len(part) < 2:
            continue
        part = part.sort_values(["p_member", "score", "serial"], ascending=[False, False, True])
        shares = ", ".join(f"{s} {p:.1%}" for s, p in zip(part["serial"], part["p_member"]))
        for position, index in enumerate(part.index, start=1):
            positions[index] = position
            notes[index] = (f"at-risk member {position} of {len(part)} in {group}, in the order to deal with them "
                            f"(P(fail during the rebuild): {shares})")
    return positions, notes


def filter_ranked(drives: pd.DataFrame, shown: RowFilter) -> pd.DataFrame:
    """The ranked drives ``shown`` keeps (``view.RowFilter``), in rank order."""
    counts = [len(r) for r in drives["rules"]] if shown.flagged_only else []
    return drives.iloc[shown.kept(drives["host"].tolist(), drives["group"].tolist(), drives["severity"].tolist(),
                                  counts)]


_AUTO = object()


def rank_store(
    store,
    ruleset,
    *,
    evaluate: Callable | None = None,
    model=_AUTO,
    config: GroupConfig | None = None,
    tickets: Path | None = None,
    silent_hours: float = STALE_HOURS,
    reuse: bool = False,
    inputs: dict | None = None,
) -> RankResult:
    """Rank every reporting drive in ``store``; list the drives, hosts and sites that went silent.

    Reads: snapshot partitions of the last max(ruleset.window_days, GROUP_LOOKBACK_DAYS) + 1 days,
    each drive's last sighting (Store.last_rows: a few columns, one day in memory at a time), the
    removal log, the newest saved model (``model=None`` forces a rules-only run) and, when given,
    the last ticket export (``tickets``: each flag's state new / ongoing and the day first raised).
    A drive whose newest capture is more than ``silent_hours`` older than the fleet's newest is not
    ranked: it is "not reporting" until it reports again, is removed, or another drive takes its slot.

    ``reuse``: read the ranking saved for the same inputs (triage/risk/saved.py) when there is
    one, and save the one computed otherwise (with the saved model and the rule engine only),
    with ``inputs`` (how the command line named the rules and options; ``saved.last_inputs``).
    """
    from triage.risk.tickets import (  # noqa: PLC0415  (same layer)
        TICKET_COLUMNS,
        flag_states,
        read_tickets,
        silent_flags,
    )

    key = token = None
    result = None
    if reuse and evaluate is None and model is _AUTO:
        from triage.risk import saved  # noqa: PLC0415  (same layer; only when asked)

        token = store.state_token()
        if token is not None:
            key = saved.key_of(store, token, ruleset, config, silent_hours)
            result = saved.load_ranking(store.derived_dir, key, RankResult(pd.DataFrame(), pd.DataFrame(), False,
                                                                           None, None))
    if result is None:
        result = _rank_afresh(store, ruleset, evaluate, model, config, silent_hours)
        if key is not None and store.state_token() == token:  # no commit meanwhile
            saved.save_ranking(store.derived_dir, key, result, inputs)
    previous = read_tickets(tickets) if tickets is not None else pd.DataFrame(columns=TICKET_COLUMNS)
    drives = flag_states(result.drives, previous, result.as_of) if tickets is not None else result.drives
    silent = silent_flags(result.silent, previous)[SILENT_REPORT_COLUMNS]
    return replace(result, drives=drives, silent=silent)


def _rank_afresh(store, ruleset, evaluate, model, config, silent_hours) -> RankResult:
    """``rank_store`` without ticket states: ``silent`` has SILENT_COLUMNS."""
    notes: list[str] = []
    custom_rules = evaluate is not None
    if evaluate is None:
        from triage.rules import evaluate  # noqa: PLC0415  (rules layer, to our left)
    if model is _AUTO:
        model = _latest_model(store, notes)
    odd = store.odd_days("snapshots")
    if odd:  # stored before ingest checked dates; the store leaves them out of every read
        notes.append(f"{len(odd)} capture day(s) dated in the future or before {EARLIEST_DAY} ignored "
                     f"(e.g. day={odd[-1]}): check the clocks of the hosts that wrote them")
    # enough history for the rules, for a missing group member, and to see every drive that
    # reported within ``silent_hours``
    lookback = max(int(getattr(ruleset, "window_days", 0) or 0), GROUP_LOOKBACK_DAYS, int(silent_hours // 24) + 1)
    columns = None if custom_rules else _history_columns(ruleset, model)
    fits = lookback <= RECENT_DAYS  # else the rules ask for more days than the state keeps
    state, rebuilt = store.current_state(columns=columns if fits else [], days_back=lookback if fits else 0)
    if rebuilt:
        notes.append(rebuilt)
    if state.newest is None:
        empty = pd.DataFrame(columns=RANK_COLUMNS)
        return RankResult(empty, pd.DataFrame(), model is not None, getattr(model, "horizon_days", None), None,
                          notes + ["the store holds no captures yet"], pd.DataFrame(columns=SILENT_COLUMNS))
    if fits:
        recent = state.recent
    else:  # read the partitions
        recent = store.read("snapshots", columns=columns, since=window_start(state.newest, lookback), as_table=True)
    removals = state.removals.to_pandas()
    as_of = pc.max(recent["taken_at"]).as_py()  # the newest capture not in the future

    # each drive's last sighting: recent ones from the history read above, older ones from the state
    detail = ["serial", "taken_at", "model", "host", "slot", "group"]
    latest = last_values(recent, list(dict.fromkeys([*detail, "power_on_hours", *getattr(model, "by", ())])))
    recent_seen = latest[detail]
    removed = frozenset(removals["serial"]) if len(removals) else frozenset()
    older = state.sightings.to_pandas()
    older = older[~older["serial"].isin(set(recent_seen["serial"]) | removed)]  # removed: never silent
    sightings = pd.concat([recent_seen, older[detail]], ignore_index=True)
    silent = silent_drives(sightings, removals, as_of, silent_hours)
    lost = lost_members(recent, removals)
    gone = set(lost["serial"]) | set(silent["serial"])
    if len(removals):
        removed_at = removals.groupby("serial")["removed_at"].max()
        left = latest["serial"].map(removed_at) >= latest["taken_at"]
        gone |= set(latest.loc[left.fillna(False).astype(bool), "serial"])
    latest = latest[~latest["serial"].isin(gone)]

    scored = scoring_rows(recent) if model is not None else None
    rule_columns = None if columns is None else ["serial", "taken_at", *sorted(getattr(ruleset, "fields", ()))]
    history = (recent if rule_columns is None else recent.select(rule_columns)).to_pandas()
    del recent, state  # the window's Arrow copy is not needed past here (memory: one copy at a time)
    flags = evaluate(ruleset, history, now=as_of)
    del history
    p_fail, horizon = None, None
    if model is not None:
        p_fail = model.predict_fail_probability(latest, horizon_days=None, history=scored)
        horizon = float(model.horizon_days)
    else:
        notes.append("no saved survival model: ranking on rules alone (p_fail is empty)")
    drives, groups = rank_drives(latest, flags, p_fail, horizon_days=horizon, lost=lost, config=config)
    summary = not_reporting_summary(silent, sightings, removals)
    return RankResult(drives, groups, model is not None, horizon, as_of, notes, silent, summary, removed,
                      flags=flags, lost=lost)


#: Snapshot columns a saved model scores a drive on (triage.survival.landmark.STATE_SOURCES,
#: listed here so that ranking does not import the survival layer to learn them; a test holds
#: the two lists equal).
MODEL_COLUMNS = (
    "serial", "taken_at", "power_on_hours", "model", "firmware", "bus", "user_capacity_bytes",
    "host", "slot", "group", "temperature_c", "reallocated_sectors", "reallocation_events", "pending_sectors",
    "offline_uncorrectable", "reported_uncorrectable", "command_timeouts", "nvme_critical_warning",
    "nvme_spare_pct", "nvme_spare_threshold_pct", "nvme_media_errors", "prefail_tripped",
)


def _history_columns(ruleset, model) -> list[str] | None:
    """The snapshot columns ranking reads: what the rules, the model and the group checks use
    (None, every column, when the rule set does not say which fields it reads)."""
    fields = getattr(ruleset, "fields", None)
    if fields is None:
        return None
    from triage.store.schema import SNAPSHOTS  # noqa: PLC0415  (store layer, to our left)

    wanted = {"serial", "taken_at", "model", "host", "slot", "group", "power_on_hours", *fields}
    if model is not None:
        wanted |= {*MODEL_COLUMNS, *getattr(model, "by", ())}
    return [c for c in SNAPSHOTS.names if c in wanted]


def last_values(history: pa.Table, columns: list[str]) -> pd.DataFrame:
    """Per serial (in serial order), each column's last known value by capture time: what
    ``history.to_pandas().sort_values("taken_at").groupby("serial", as_index=False).last()``
    gives (dtypes included), computed on the Arrow table without the per-row frame."""
    others = [c for c in columns if c != "serial"]
    frame = last_known(in_time_order(history.select(["serial", *others])), ["serial"], others).to_pandas()
    for column in others:  # the dtype the whole column has in pandas (nulls make ints float, bools object)
        kind = history.schema.field(column).type
        if history[column].null_count and pa.types.is_integer(kind):
            frame[column] = frame[column].astype("float64")
        elif history[column].null_count and pa.types.is_boolean(kind):
            frame[column] = frame[column].astype(object)
    return frame.sort_values("serial", kind="stable")[columns].reset_index(drop=True)


def scoring_rows(history: pa.Table) -> pd.DataFrame:
    """The rows of ``history`` a saved model's ``states_from_history`` looks at, as a frame: each
    serial's first capture, its latest, and its latest at or before the newest capture minus the
    model's growth window (``GROWTH_DAYS``). The states come out the same as from every row."""
    from triage.survival.landmark import GROWTH_DAYS  # noqa: PLC0415  (survival layer, to our left)

    rows = history.select(["serial", "taken_at"]).append_column("_row", pa.array(np.arange(history.num_rows)))
    rows = rows.filter(pc.is_valid(rows["serial"]))
    cut = pc.max(rows["taken_at"]).as_py() - timedelta(days=GROWTH_DAYS)
    ordered = in_time_order(rows)
    ends = ordered.group_by("serial", use_threads=False).aggregate([("_row", "first"), ("_row", "last")])
    early = ordered.filter(pc.less_equal(ordered["taken_at"], pa.scalar(cut, ordered.schema.field("taken_at").type)))
    base = early.group_by("serial", use_threads=False).aggregate([("_row", "last")])
    keep = np.zeros(history.num_rows, dtype=bool)
    for rows_kept in (ends["_row_first"], ends["_row_last"], base["_row_last"]):
        keep[rows_kept.to_numpy()] = True
    return history.take(pa.array(np.flatnonzero(keep))).to_pandas()


def silent_drives(sightings: pd.DataFrame, removals: pd.DataFrame, as_of: datetime,
                  silent_hours: float = STALE_HOURS) -> pd.DataFrame:
    """Drives whose last capture is more than ``silent_hours`` before ``as_of``, not removed
    (the removal log) and not replaced (another drive seen later in the same host and slot).

    ``sightings``: each serial's newest capture (Store.last_rows), columns SILENT_COLUMNS with
    ``taken_at`` for ``last_seen``.
    """
    frame = sightings.rename(columns={"taken_at": "last_seen"})
    if frame.empty:
        return pd.DataFrame(columns=SILENT_COLUMNS)
    cutoff = pd.Timestamp(as_of) - pd.Timedelta(hours=silent_hours)
    quiet = frame[frame["last_seen"] < cutoff]
    if len(removals):
        quiet = quiet[~quiet["serial"].isin(set(removals["serial"]))]
    placed = frame.dropna(subset=["host", "slot"])
    newest_in_slot = placed.groupby(["host", "slot"])["last_seen"].max()
    slot_newest = pd.Series([newest_in_slot.get((h, s)) for h, s in zip(quiet["host"], quiet["slot"])],
                            index=quiet.index, dtype=object)
    replaced = [isinstance(n, pd.Timestamp) and n > seen for n, seen in zip(slot_newest, quiet["last_seen"])]
    quiet = quiet[~pd.Series(replaced, index=quiet.index, dtype=bool)]
    return quiet.sort_values(["host", "slot", "serial"], na_position="last")[SILENT_COLUMNS].reset_index(drop=True)


def not_reporting_summary(silent: pd.DataFrame, sightings: pd.DataFrame, removals: pd.DataFrame) -> pd.DataFrame:
    """Roll silent drives up: a site when all its hosts are silent, a host when all its drives are,
    otherwise the drive. Columns NOT_REPORTING_COLUMNS; ``last_seen`` is the newest capture of any
    of its drives."""
    if silent.empty:
        return pd.DataFrame(columns=NOT_REPORTING_COLUMNS)
    known = sightings[~sightings["serial"].isin(set(removals["serial"]) if len(removals) else set())]
    known = known.assign(site=known["host"].map(site_of))
    quiet = silent.assign(site=silent["host"].map(site_of))
    quiet_serials = set(quiet["serial"])
    host_silent = known.groupby("host")["serial"].agg(lambda s: set(s) <= quiet_serials)
    site_silent = known.groupby("site")["host"].agg(lambda h: all(host_silent.get(x, False) for x in set(h)))
    rows = []
    for site, part in quiet.groupby("site"):
        if site_silent.get(site, False):
            rows.append(("site", site, part["host"].nunique(), len(part), part["last_seen"].max()))
            continue
        for host, drives in part.groupby("host"):
            if host_silent.get(host, False):
                rows.append(("host", host, 1, len(drives), drives["last_seen"].max()))
            else:
                rows.extend(("drive", f"{d.serial} at {host}/{d.slot if isinstance(d.slot, str) else '?'}", 1, 1,
                             d.last_seen) for d in drives.itertuples(index=False))
    orphans = quiet[quiet["host"].isna()]
    rows.extend(("drive", f"{d.serial} at ?", 0, 1, d.last_seen) for d in orphans.itertuples(index=False))
    return pd.DataFrame(rows, columns=NOT_REPORTING_COLUMNS)


def silence_warnings(result: RankResult, *, now: datetime | None = None,
                     stale_hours: float | None = STALE_HOURS) -> list[str]:
    """``view.silence_lines`` of a computed ranking."""
    return silence_lines(result.as_of, result.not_reporting.to_dict("records"), now=now, stale_hours=stale_hours)


def _latest_model(store, notes: list[str]):
    import triage.survival as survival  # noqa: PLC0415  (survival layer, to our left)

    model, unreadable = survival.readable_latest_model(store)
    if unreadable:
        notes.append(f"saved model unreadable ({unreadable}): ranking on rules alone until 'triage fit' runs")
    return model
