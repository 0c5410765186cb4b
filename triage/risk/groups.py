"""Redundancy groups: the chance a group loses more members than it tolerates, and degraded groups.

Drives that share a ``group`` value (a RAID set, an erasure-coded pool, a mirror) are judged
together: one weak drive in a healthy double-parity group is an errand, two weak drives in a
single-parity group are an emergency. See docs/ranking.md.

Group loss probability
----------------------
Members fail independently with their own probabilities ``p_1 .. p_n`` over the rebuild window;
the number of failures ``X`` then follows the Poisson-binomial distribution. The group loses data
when ``X > t`` (``t`` = members it can lose, 1 for single parity / two-way mirror, 2 for double
parity). ``P(X > t)`` is computed exactly with the standard recurrence over members
(Poisson-binomial by dynamic programming; e.g. Chen & Liu, "Statistical applications of the
Poisson-binomial and conditional Bernoulli distributions", Statistica Sinica 7, 1997, sec. 2)::

    P_0(k) = [k == 0]
    P_j(k) = P_{j-1}(k) * (1 - p_j) + P_{j-1}(k - 1) * p_j

keeping only ``k = 0 .. t`` and one bucket for "more than t", so it costs O(n * t).

Per-member probability over the rebuild window
----------------------------------------------
From the fitted model we know ``p_H`` = P(fail within the horizon of H days). Assuming a constant
hazard across the horizon, the probability over a window of ``w`` days is::

    p_w = 1 - (1 - p_H) ** (w / H)

Rules add evidence the model may not see (a drive with growing pending sectors is read end to end
during a rebuild and will likely return read errors, which the group counts against its
tolerance). Each severity carries a prior probability of failing during a rebuild
(``SEVERITY_REBUILD_PRIOR``: common practice, no source; deliberately coarse). Model and prior
are combined as independent causes: ``p = 1 - (1 - p_w) * (1 - prior)``.

Group configuration (our own format, ``groups.toml`` in a rules directory or ``--group-config``)::

    [[group]]
    pattern = "*-dp-*"      # fnmatch pattern on the group name; the first match wins
    tolerance = 2           # members the group can lose without losing data
    rebuild_hours = 36      # how long a rebuild leaves it exposed

Groups matching no pattern get ``DEFAULT_TOLERANCE`` and ``DEFAULT_REBUILD_HOURS``.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from triage.risk.group_config import (  # noqa: F401  (the configuration's names, here as before)
    DEFAULT_REBUILD_HOURS,
    DEFAULT_TOLERANCE,
    GROUP_CONFIG_FILE,
    GroupConfig,
    GroupRule,
)

#: P(member fails or returns read errors during a rebuild) by worst rule severity.
#: Common practice, no source: coarse steps chosen so flagged drives dominate healthy ones.
SEVERITY_REBUILD_PRIOR = {
    "replace-now": 0.5,
    "replace-soon": 0.2,
    "watch": 0.05,
    "check-path": 0.01,  # the path, not the media: a small chance the drive is at fault after all
    None: 0.0,
}


# -- the distribution -------------------------------------------------------------------------
def prob_more_than(probabilities: Iterable[float], tolerance: int) -> float:
    """P(X > tolerance) for X = number of independent Bernoulli(p_i) successes (exact DP, O(n*t))."""
    if tolerance < 0:
        return 1.0  # the group is already past what it can lose
    # dist[k] = P(exactly k failures so far) for k <= t; dist[t + 1] = P(more than t)
    dist = [1.0] + [0.0] * (tolerance + 1)
    for p in probabilities:
        p = float(p)
        if not 0.0 <= p <= 1.0:
            raise ValueError(f"member probability {p} is not within [0, 1]")
        q = 1.0 - p
        over = dist[tolerance + 1] + dist[tolerance] * p  # once past t, it stays past t
        for k in range(tolerance, 0, -1):
            dist[k] = dist[k] * q + dist[k - 1] * p
        dist[0] = dist[0] * q
        dist[tolerance + 1] = over
    return dist[tolerance + 1]


def prob_more_than_each(probabilities: np.ndarray, tolerance: int) -> np.ndarray:
    """``prob_more_than`` of each row of a (groups x members) matrix: the same recurrence, run
    for all rows at once, member by member (so each row's result is the same, bit for bit)."""
    if tolerance < 0:
        return np.ones(len(probabilities))
    dist = np.zeros((len(probabilities), tolerance + 2))
    dist[:, 0] = 1.0
    for p in np.asarray(probabilities, dtype=float).T:
        q = 1.0 - p
        over = dist[:, tolerance + 1] + dist[:, tolerance] * p
        for k in range(tolerance, 0, -1):
            dist[:, k] = dist[:, k] * q + dist[:, k - 1] * p
        dist[:, 0] = dist[:, 0] * q
        dist[:, tolerance + 1] = over
    return dist[:, tolerance + 1]


def window_probability(p_horizon: float, horizon_days: float, window_days: float) -> float:
    """p_w = 1 - (1 - p_H) ** (w / H): the horizon probability rescaled under a constant hazard."""
    if horizon_days <= 0:
        raise ValueError(f"horizon_days must be positive, got {horizon_days}")
    return 1.0 - (1.0 - float(p_horizon)) ** (window_days / horizon_days)


def member_probability(p_window: float | None, severity: str | None) -> float:
    """Model and rule evidence as independent causes: 1 - (1 - p_w) * (1 - prior(severity))."""
    prior = SEVERITY_REBUILD_PRIOR.get(severity, 0.0)
    model = 0.0 if p_window is None or pd.isna(p_window) else float(p_window)
    return 1.0 - (1.0 - model) * (1.0 - prior)


def member_probabilities(p_fail: pd.Series, severity: pd.Series, group: pd.Series, horizon_days: float | None,
                         config: "GroupConfig") -> list[float]:
    """``member_probability`` of many drives: each drive's ``p_fail`` over the horizon rescaled to
    its group's rebuild window (``window_probability``; none without a model, a horizon or a
    group), combined with its severity's prior. The group configuration is looked up once per
    group, not once per drive."""
    rebuild_days = {g: config.for_group(g).rebuild_hours / 24.0 for g in pd.unique(group) if isinstance(g, str)}
    if horizon_days is not None and horizon_days <= 0:
        raise ValueError(f"horizon_days must be positive, got {horizon_days}")
    return [member_probability(window_probability(p, horizon_days, rebuild_days[g])
                               if horizon_days and p is not None and p == p and isinstance(g, str) else None,  # p == p: not NaN
                               s)
            for p, s, g in zip(p_fail.tolist(), severity.tolist(), group.tolist())]


# -- degraded groups --------------------------------------------------------------------------
def lost_members(snapshots: pd.DataFrame, removals: pd.DataFrame) -> pd.DataFrame:
    """Members each group has lost and not replaced, from recent captures and the removal log.

    ``snapshots`` holds recent captures (serial, host, slot, group, taken_at). A member is lost when

    * it was seen in the group but is absent from the group's latest capture night (the newest
      day any member of the group was captured), unless it was removed as ``retired``; or
    * it was removed as ``failed`` or ``proactive`` after it was last seen in the group,

    and in both cases no other serial has appeared in its host/slot since it was last seen.
    Returns columns group, serial, host, slot, last_seen.
    """
    columns = ["group", "serial", "host", "slot", "last_seen"]
    rows = snapshots if isinstance(snapshots, pa.Table) else pa.Table.from_pandas(
        snapshots.loc[:, ["group", "serial", "host", "slot", "taken_at"]], preserve_index=False)
    rows = rows.select(["group", "serial", "host", "slot", "taken_at"]).filter(pc.is_valid(rows["group"]))
    if rows.num_rows == 0:
        return pd.DataFrame(columns=columns)
    # each member's last sighting in its group (each field's last known value, as pandas' groupby last)
    last = last_known(in_time_order(rows), ["group", "serial"], ["host", "slot", "taken_at"]).to_pandas()
    last = last.sort_values(["group", "serial"], kind="stable").reset_index(drop=True)
    group_night = last.groupby("group")["taken_at"].max().dt.floor("D")  # the group's latest capture night
    absent = last["taken_at"].dt.floor("D") < last["group"].map(group_night)

    removed = removals.sort_values("removed_at").groupby("serial").last()
    reason = last["serial"].map(removed["reason"])
    removed_at = pd.to_datetime(last["serial"].map(removed["removed_at"]), utc=True)
    failed_after = reason.isin(["failed", "proactive"]) & (removed_at >= pd.to_datetime(last["taken_at"], utc=True))
    candidates = last[(absent & (reason != "retired")) | failed_after]

    # a replacement: another serial first seen in the same host/slot after the lost one's last sighting
    if len(candidates):
        near = pc.and_(pc.is_in(rows["host"], pa.array(candidates["host"].dropna().unique(), pa.string())),
                       pc.is_in(rows["slot"], pa.array(candidates["slot"].dropna().unique(), pa.string())))
        placed = rows.filter(pc.and_(pc.and_(pc.is_valid(rows["host"]), pc.is_valid(rows["slot"])),
                                     pc.and_(pc.is_valid(rows["serial"]), near)))  # the candidates' slots
        first_seen = placed.group_by(["host", "slot", "serial"]).aggregate([("taken_at", "min")]).to_pandas()
        first_seen = first_seen.rename(columns={"taken_at_min": "taken_at"})
        pairs = candidates.reset_index().merge(first_seen, on=["host", "slot"], suffixes=("", "_other"))
        replaced = pairs.loc[(pairs["serial_other"] != pairs["serial"]) & (pairs["taken_at_other"] > pairs["taken_at"]),
                             "index"]
        candidates = candidates[~candidates.index.isin(set(replaced)) | candidates["slot"].isna()]
    return candidates.rename(columns={"taken_at": "last_seen"})[columns].reset_index(drop=True)


def last_known(rows: pa.Table, keys: list[str], columns: list[str]) -> pa.Table:
    """One row per distinct ``keys`` (rows with a null key left out): the keys, then each of
    ``columns``' last non-null value in row order -- what an ordered Arrow group-by ``last``
    (and pandas' ``groupby().last()``) gives, computed with one index per column."""
    if not rows.num_rows:
        return rows.select([*keys, *columns])
    known = np.ones(rows.num_rows, dtype=bool)
    for key in keys:
        known &= rows[key].is_valid().to_numpy(zero_copy_only=False)
    rows = rows if known.all() else rows.filter(pa.array(known))
    if not rows.num_rows:
        return rows.select([*keys, *columns])
    code = np.zeros(rows.num_rows, dtype=np.int64)
    for key in keys:  # one integer per key combination
        column = rows[key].combine_chunks()
        encoded = pc.dictionary_encode(column) if not pa.types.is_dictionary(column.type) else column
        code = code * (len(encoded.dictionary) + 1) + encoded.indices.to_numpy(zero_copy_only=False)
    group = code if len(keys) == 1 else np.unique(code, return_inverse=True)[1]  # one key: codes are 0..n-1
    position = np.arange(rows.num_rows)

    def last_of(mask: np.ndarray | None) -> pa.Array:
        last = np.full(group.max() + 1, -1)
        np.maximum.at(last, group if mask is None else group[mask], position if mask is None else position[mask])
        return pa.array(last, mask=last < 0)

    every = last_of(None)
    out = {key: rows[key].take(every) for key in keys}
    for column in columns:
        values = rows[column]
        index = every if values.null_count == 0 else last_of(values.is_valid().to_numpy(zero_copy_only=False))
        out[column] = values.take(index)
    return pa.table(out)


def in_time_order(rows: pa.Table) -> pa.Table:
    """``rows`` sorted by ``taken_at`` (a stable sort); as they are when already so (the current
    state's recent window is stored in time order)."""
    stamps = rows["taken_at"].combine_chunks() if rows.num_rows else None
    if stamps is not None and stamps.null_count == 0:
        values = stamps.cast(pa.int64()).to_numpy()
        if np.all(values[1:] >= values[:-1]):
            return rows
    return rows.sort_by([("taken_at", "ascending")])


# -- the group table --------------------------------------------------------------------------
def group_risk(members: pd.DataFrame, lost: pd.DataFrame, config: GroupConfig) -> tuple[pd.DataFrame, pd.Series]:
    """Loss probability per group and each member's share of it.

    ``members``: current members, columns serial, group, p_member (probability over the group's
    rebuild window, see ``member_probability``). ``lost``: from ``lost_members``.

    Returns (groups, member_importance):
      groups: group, members, lost, tolerance, tolerance_left, rebuild_hours, p_group_loss, degraded
      member_importance: per serial, P(group loss) - P(group loss if this member were replaced by a
        healthy drive) = p_i * P(the other members fail exactly tolerance_left times). It is what
        replacing this drive buys the group, and it is what lifts two weak drives in one group above
        a lone weak drive.
    """
    importance = {}
    lost_count = lost.groupby("group").size().to_dict() if len(lost) else {}
    members = members.dropna(subset=["group"])
    codes, names = pd.factorize(members["group"], sort=True)
    order = np.argsort(codes, kind="stable")  # each group's members in their given order
    codes = codes[order]
    serials = members["serial"].to_numpy()[order]
    p_all = members["p_member"].to_numpy(dtype=float)[order]
    bad = (p_all < 0.0) | (p_all > 1.0) | np.isnan(p_all)
    if bad.any():
        raise ValueError(f"member probability {p_all[bad][0]} is not within [0, 1]")
    starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if len(codes) else np.zeros(0, dtype=int)
    sizes = np.diff(np.r_[starts, len(codes)])
    rules = [config.for_group(str(g)) for g in names]
    left = np.array([r.tolerance - int(lost_count.get(g, 0)) for r, g in zip(rules, names)], dtype=int)
    p_loss = np.zeros(len(names))
    # groups of one size and tolerance left go through the recurrence together, a column per member
    for size, tolerance in sorted(set(zip(sizes.tolist(), left.tolist()))):
        which = np.flatnonzero((sizes == size) & (left == tolerance))
        matrix = p_all[starts[which][:, None] + np.arange(size)[None, :]]
        p_loss[which] = prob_more_than_each(matrix, tolerance)
        for i in range(size):
            without = matrix.copy()
            without[:, i] = 0.0
            share = p_loss[which] - prob_more_than_each(without, tolerance)
            importance.update(zip(serials[starts[which] + i], share.tolist()))
    n_lost = np.array([int(lost_count.get(name, 0)) for name in names], dtype=int)
    groups = pd.DataFrame({
        "group": pd.Series(np.asarray(names, dtype=object), dtype=object), "members": sizes.astype(int),
        "lost": n_lost, "tolerance": [r.tolerance for r in rules], "tolerance_left": left,
        "rebuild_hours": [r.rebuild_hours for r in rules], "p_group_loss": p_loss, "degraded": n_lost > 0,
    }, columns=["group", "members", "lost", "tolerance", "tolerance_left", "rebuild_hours", "p_group_loss",
                "degraded"])
    return groups, pd.Series(importance, dtype=float)
