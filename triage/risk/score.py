"""Action tiers, one risk score per drive, and the actions the on-call sysadmin should take.

Order (docs/ranking.md is the one definition): by action tier first (``TIERS``: replace now,
replace soon, check the path, watch; drives no rule flagged come last), then by the score inside
a tier. The score combines three numbers in [0, 1] as independent reasons to act::

    score = 1 - (1 - w_severity) * (1 - p_fail) * (1 - g)

* ``w_severity``: weight of the drive's most urgent rule severity (``SEVERITY_WEIGHT``; our choice);
* ``p_fail``: the model's P(fail within H days); 0 when no model is saved;
* ``g``: what replacing the drive removes from its group's loss probability
  (``groups.group_risk``: member importance).

It is increasing in each of the three (each factor ``1 - x`` shrinks as ``x`` grows), stays in
[0, 1], equals ``w_severity`` for a rules-only run on a lone drive, and lets a strong reason win
without the others having to agree. Inside one tier ``w_severity`` is the same for every drive,
so the score orders them by model probability and group importance.
"""

from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Iterable

import numpy as np

from triage.safety import name

if TYPE_CHECKING:
    import pandas as pd

#: Action tiers, most urgent first. "check-path" (cable, backplane, controller) comes before
#: "watch": it is work to do tonight, even though it points away from the drive.
TIERS = ("replace-now", "replace-soon", "check-path", "watch")
#: Rule severities the risk layer knows, in tier order (filters and group priors use them).
SEVERITIES = TIERS

#: Our choice: replace-now below 1 so group and model evidence still separate replace-now drives.
SEVERITY_WEIGHT = {"replace-now": 0.9, "replace-soon": 0.6, "watch": 0.3, "check-path": 0.1, None: 0.0}

DEGRADED_CAUTION = (
    "group {group} is degraded ({lost}): do not pull a second drive from this group "
    "before the rebuild finishes; follow the site's change procedure"
)

#: One action per kind of finding. A drive gets the action of every category that fired.
ACTIONS = {
    "check-path": "check the path first: inspect, reseat or replace the cable / backplane port / controller",
    "replace-now": "replace this drive now (schedule a swap today)",
    "replace-soon": "order a spare and replace this drive within the week",
    "thermal": "check the bay's cooling (airflow, fans, ambient temperature)",
    "watch": "keep watching; no swap yet",
}
#: Said when the path is the only finding: the drive itself is not the suspect.
PATH_ONLY = "; do not pull the drive"
#: Said when the path and the media both fired: a new drive on the same bad cable fails the same way.
PATH_BEFORE_SWAP = " before the swap, or the new drive goes onto the same bad path"


def missing(value) -> bool:
    """None, NaN, NaT or pandas' NA: a scalar that is not there. Without pandas, so that reading a
    saved ranking never imports it: NaN and NaT are the only values unequal to themselves, and
    NA's comparison has no truth value."""
    if value is None:
        return True
    try:
        return bool(value != value)  # noqa: PLR0124
    except TypeError:
        return True


def severity_name(value) -> str | None:
    """Severity from the rules layer (enum or string) -> its string value, or None."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    value = getattr(value, "value", value)
    return str(value)


def tier_index(tier: str | None) -> int:
    """Position in ``TIERS``; unknown severities just after watch, no flag last."""
    if tier is None:
        return len(TIERS) + 1
    return TIERS.index(tier) if tier in TIERS else len(TIERS)


def worst_severity(values) -> str | None:
    """The most urgent tier among ``values`` (an unknown severity still shows, after watch)."""
    names = {severity_name(v) for v in values} - {None}
    return min(names, key=lambda n: (tier_index(n), n)) if names else None


def risk_score(w_severity: float, p_fail: float | None, group_importance: float) -> float:
    """score = 1 - (1 - w) * (1 - p) * (1 - g); p = 0 when there is no model."""
    p = 0.0 if missing(p_fail) else float(p_fail)
    g = 0.0 if missing(group_importance) else float(group_importance)
    return 1.0 - (1.0 - float(w_severity)) * (1.0 - p) * (1.0 - g)


def risk_scores(w_severity: np.ndarray, p_fail: np.ndarray, group_importance: np.ndarray) -> np.ndarray:
    """``risk_score`` of many drives at once (the same operations in the same order, so the same
    floating-point result)."""
    p = np.nan_to_num(np.asarray(p_fail, dtype=float), nan=0.0)
    g = np.nan_to_num(np.asarray(group_importance, dtype=float), nan=0.0)
    return 1.0 - (1.0 - np.asarray(w_severity, dtype=float)) * (1.0 - p) * (1.0 - g)


def finding_kind(severity: str | None, category: str | None) -> str:
    """Which action one rule firing asks for: the path, the cooling, or the drive's own severity."""
    if severity == "check-path" or category == "path":
        return "check-path"
    if category == "thermal" and severity not in ("replace-now", "replace-soon"):
        return "thermal"
    return severity if severity in ACTIONS else "watch"


def drive_actions(findings: Iterable[tuple[str | None, str | None]]) -> list[str]:
    """Every action the drive's firings ask for, in the order to do them.

    The path comes first when it fired at all (a swap onto a bad cable repeats the fault), then
    the most urgent swap, then cooling; "keep watching" only when nothing else applies.
    """
    kinds = {finding_kind(s, c) for s, c in findings if s is not None or c is not None}
    swap = next((k for k in ("replace-now", "replace-soon") if k in kinds), None)
    actions = []
    if "check-path" in kinds:
        actions.append(ACTIONS["check-path"] + (PATH_BEFORE_SWAP if swap else PATH_ONLY))
    if swap:
        actions.append(ACTIONS[swap])
    if "thermal" in kinds:
        actions.append(ACTIONS["thermal"])
    if not actions and kinds:
        actions.append(ACTIONS["watch"])
    return actions


def degraded_caution(group: str, lost: pd.DataFrame | None = None, n_lost: int = 0) -> str:
    """The caution for a degraded group, naming each lost member and when it was last seen."""
    if lost is not None and len(lost):
        members = ", ".join(
            f"lost {name(row.serial)} at {_text(getattr(row, 'host', None))}/{_text(getattr(row, 'slot', None))}, "
            f"last seen {moment_text(getattr(row, 'last_seen', None))}"
            for row in lost.itertuples(index=False))
    else:
        members = f"{n_lost} member(s) lost"
    return DEGRADED_CAUTION.format(group=name(group), lost=members)  # stored names cut (triage.safety)


def action_text(actions: list[str], caution: str | None = None) -> str:
    """One line: the caution first when the drive's group is degraded, then the actions in order."""
    if not actions:
        return caution or "no action"
    text = "; then ".join(actions)
    return f"{caution}; then: {text}" if caution else text


def _text(value) -> str:
    return "?" if value is None or (isinstance(value, float) and math.isnan(value)) else name(value)


def moment_text(value) -> str:
    """A capture time as the reports print it: ``2026-11-28 02:41 UTC``; "never" when missing.
    A time without a zone is UTC (the store keeps UTC)."""
    if missing(value):
        return "never"
    if not isinstance(value, datetime):  # a numpy datetime64 or a string: pandas reads every form
        import pandas as pd  # noqa: PLC0415  (only for these forms)

        value = pd.Timestamp(value)
    stamp = value.astimezone(timezone.utc) if value.tzinfo else value.replace(tzinfo=timezone.utc)
    return stamp.strftime("%Y-%m-%d %H:%M UTC")
