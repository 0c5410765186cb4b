"""The loaded rule set as a table (what ``triage rules list`` prints)."""

from __future__ import annotations

import pandas as pd

from triage.rules.model import RuleSet

RULE_LIST_COLUMNS = ["id", "severity", "category", "status", "title", "when", "source", "defined_at"]


def rules_table(ruleset: RuleSet) -> pd.DataFrame:
    """One row per rule, disabled ones included, in load order.

    ``status``: ``default`` (packaged), ``site`` (new in a site directory), ``override`` (a site
    rule that replaced an earlier one with the same id) or ``disabled``. ``defined_at`` is the
    ``file:line`` that last defined the rule.
    """
    rows = [
        {
            "id": rule.id,
            "severity": rule.severity.value,
            "category": rule.category.value,
            "status": rule.status,
            "title": rule.title,
            "when": rule.when.text,
            "source": rule.source,
            "defined_at": f"{rule.path}:{rule.line}",
        }
        for rule in ruleset.all_rules
    ]
    return pd.DataFrame(rows, columns=RULE_LIST_COLUMNS)
