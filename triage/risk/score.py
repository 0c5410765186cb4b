"""One risk score per drive, and the action the on-call sysadmin should take.

The score (docs/ranking.md) combines three numbers in [0, 1] as independent reasons to act::

    score = 1 - (1 - w_severity) * (1 - p_fail) * (1 - g)

* ``w_severity``: weight of the drive's worst rule severity (``SEVERITY_WEIGHT``; our choice);
* ``p_fail``: the model's P(fail within H days); 0 when no model is saved;
* ``g``: what replacing the drive removes from its group's loss probability
  (``groups.group_risk``: member importance).

It is increasing in each of the three (each factor ``1 - x`` shrinks as ``x`` grows), stays in
[0, 1], equals ``w_severity`` for a rules-only run on a lone drive, and lets a strong reason win
without the others having to agree.
"""

from __future__ import annotations

import pandas as pd

#: Ordered worst first; "check-path" means the cable/backplane/controller, not the drive.
SEVERITIES = ("replace-now", "replace-soon", "watch", "check-path")

#: Our choice: replace-now below 1 so group and model evidence still separate replace-now drives.
SEVERITY_WEIGHT = {"replace-now": 0.9, "replace-soon": 0.6, "watch": 0.3, "check-path": 0.1, None: 0.0}

DEGRADED_CAUTION = (
    "group {group} is degraded ({lost} member(s) lost): do not pull a second drive from this group "
    "before the rebuild finishes; follow the site's change procedure"
)

_ACTIONS = {
    "replace-now": "replace this drive now (schedule a swap today)",
    "replace-soon": "order a spare and replace this drive within the week",
    "watch": "keep watching; no swap yet",
    "check-path": "inspect, reseat or replace the cable / backplane port / controller; do not pull the drive",
    None: "no action",
}


def severity_name(value) -> str | None:
    """Severity from the rules layer (enum or string) -> its string value, or None."""
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return None
    value = getattr(value, "value", value)
    return str(value)


def worst_severity(values) -> str | None:
    names = {severity_name(v) for v in values} - {None}
    for name in SEVERITIES:
        if name in names:
            return name
    return next(iter(sorted(names)), None)  # an unknown severity still shows


def risk_score(w_severity: float, p_fail: float | None, group_importance: float) -> float:
    """score = 1 - (1 - w) * (1 - p) * (1 - g); p = 0 when there is no model."""
    p = 0.0 if p_fail is None or pd.isna(p_fail) else float(p_fail)
    g = 0.0 if pd.isna(group_importance) else float(group_importance)
    return 1.0 - (1.0 - float(w_severity)) * (1.0 - p) * (1.0 - g)


def action_text(severity: str | None, category: str | None, degraded: bool = False,
                group: str | None = None, lost: int = 0) -> str:
    """What to do, in our words; a degraded group's caution comes first when it applies."""
    if category == "check-path":
        base = _ACTIONS["check-path"]
    else:
        base = _ACTIONS.get(severity, _ACTIONS["watch"])
    if degraded:
        return DEGRADED_CAUTION.format(group=group, lost=lost) + "; then: " + base
    return base
