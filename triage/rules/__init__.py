"""Rules layer: declarative rule files -> per-drive flags with evidence.

Public API (the risk layer builds on these names)::

    load_rules(dirs, include_defaults=True) -> RuleSet     # .rules, .all_rules, .errors, .window_days, .fields
    evaluate(ruleset, history, now=None) -> DataFrame      # one row per (drive, fired rule): FLAG_COLUMNS
    per_drive(flags) -> DataFrame                          # one row per flagged drive: DRIVE_COLUMNS
    Severity, Category, Rule, RuleError, RuleSet
    rules_table(ruleset) -> DataFrame                      # what `triage rules list` shows

The language and the file schema are documented in docs/rules.md.
"""

from triage.rules.engine import DRIVE_COLUMNS, FLAG_COLUMNS, DriveHistory, evaluate, per_drive
from triage.rules.expr import ExprError, compile_expression
from triage.rules.listing import RULE_LIST_COLUMNS, rules_table
from triage.rules.loader import default_rules_dir, load_rules, resolve_rules_dirs
from triage.rules.model import Category, Rule, RuleError, RuleSet, Severity

__all__ = [
    "Category",
    "DRIVE_COLUMNS",
    "DriveHistory",
    "ExprError",
    "FLAG_COLUMNS",
    "RULE_LIST_COLUMNS",
    "Rule",
    "RuleError",
    "RuleSet",
    "Severity",
    "compile_expression",
    "default_rules_dir",
    "evaluate",
    "load_rules",
    "per_drive",
    "resolve_rules_dirs",
    "rules_table",
]
