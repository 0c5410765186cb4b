"""Rules layer: declarative rule files -> per-drive flags with evidence.

Public API (the risk layer builds on these names)::

    load_rules(dirs, include_defaults=True) -> RuleSet     # .rules, .all_rules, .errors, .window_days, .fields
    evaluate(ruleset, history, now=None) -> DataFrame      # one row per (drive, fired rule): FLAG_COLUMNS
    per_drive(flags) -> DataFrame                          # one row per flagged drive: DRIVE_COLUMNS
    Severity, Category, Rule, RuleError, RuleSet
    rules_table(ruleset) -> DataFrame                      # what `triage rules list` shows

The language and the file schema are documented in docs/rules.md.
"""

from importlib import import_module

from triage.rules.expr import ExprError, compile_expression
from triage.rules.loader import default_rules_dir, load_rules, resolve_rules_dirs
from triage.rules.model import Category, Rule, RuleError, RuleSet, Severity

#: Names from the modules that work on frames, imported on first use (PEP 562): loading rules
#: needs no pandas, so 'triage rank' reading a saved ranking never imports it.
_ON_FIRST_USE = {"DRIVE_COLUMNS": "engine", "FLAG_COLUMNS": "engine", "DriveHistory": "engine",
                 "evaluate": "engine", "per_drive": "engine", "RULE_LIST_COLUMNS": "listing",
                 "rules_table": "listing"}


def __getattr__(attribute: str):
    if attribute in _ON_FIRST_USE:
        return getattr(import_module(f"triage.rules.{_ON_FIRST_USE[attribute]}"), attribute)
    raise AttributeError(f"module 'triage.rules' has no attribute {attribute!r}")

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
