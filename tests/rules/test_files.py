"""Rule files: schema checks reported as file:line, loading order, override and disable by id."""

from __future__ import annotations

import textwrap
from pathlib import Path

from triage.rules import Category, RuleError, Severity, default_rules_dir, evaluate, load_rules, resolve_rules_dirs

from tests.rules.histories import frame, hdd

REPO = Path(__file__).resolve().parents[2]

GOOD = """\
[[rule]]
id = "site.pending-any"
title = "Any pending sector"
severity = "watch"
category = "media"
when = "pending_sectors > 0"
explain = "{pending_sectors} pending"
source = "test"
"""


def write(folder: Path, name: str, text: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def site_only(folder: Path):
    return load_rules([folder], include_defaults=False)


def only_error(ruleset) -> RuleError:
    assert len(ruleset.errors) == 1, [str(e) for e in ruleset.errors]
    return ruleset.errors[0]


def test_a_valid_file_loads_its_rule(tmp_path):
    write(tmp_path, "a.toml", GOOD)
    ruleset = site_only(tmp_path)
    assert ruleset.errors == []
    rule = ruleset.get("site.pending-any")
    assert (rule.severity, rule.category, rule.line, rule.status) == (Severity.WATCH, Category.MEDIA, 1, "site")


def test_unknown_field_is_reported_at_the_when_line_and_the_rule_is_not_loaded(tmp_path):
    path = write(tmp_path, "a.toml", GOOD + GOOD.replace("site.pending-any", "site.typo").replace(
        'when = "pending_sectors > 0"', 'when = "pending_sector > 0"'))
    ruleset = site_only(tmp_path)
    error = only_error(ruleset)
    assert (error.path, error.line) == (path, 14)
    assert str(error) == (f"{path}:14: rule 'site.typo': when: unknown field 'pending_sector' "
                          "(did you mean 'pending_sectors'?) (column 1 of the expression)")
    assert [r.id for r in ruleset.rules] == ["site.pending-any"]


def test_syntax_error_in_when_gives_line_and_column(tmp_path):
    path = write(tmp_path, "a.toml", GOOD.replace('"pending_sectors > 0"', '"pending_sectors >> 0"'))
    error = only_error(site_only(tmp_path))
    assert (error.path, error.line) == (path, 6)
    assert "unexpected '>' (column 18 of the expression)" in error.message


def test_bad_severity_is_reported_at_its_line_with_the_choices(tmp_path):
    path = write(tmp_path, "a.toml", GOOD.replace('severity = "watch"', 'severity = "urgent"'))
    error = only_error(site_only(tmp_path))
    assert (error.path, error.line) == (path, 4)
    assert "unknown severity 'urgent' (one of: replace-now, replace-soon, watch, check-path)" in error.message


def test_bad_category_is_reported_at_its_line(tmp_path):
    write(tmp_path, "a.toml", GOOD.replace('category = "media"', 'category = "cable"'))
    error = only_error(site_only(tmp_path))
    assert error.line == 5 and "unknown category 'cable'" in error.message


def test_unknown_key_is_reported_at_its_line(tmp_path):
    write(tmp_path, "a.toml", GOOD.replace('source = "test"', 'severty = "watch"'))
    error = only_error(site_only(tmp_path))
    assert error.line == 8 and "unknown key 'severty'" in error.message


def test_missing_key_is_reported_at_the_rule_header(tmp_path):
    write(tmp_path, "a.toml", "# comment\n\n" + GOOD.replace('explain = "{pending_sectors} pending"\n', ""))
    error = only_error(site_only(tmp_path))
    assert error.line == 3 and "missing key(s): explain" in error.message


def test_duplicate_id_in_one_folder_keeps_the_first_and_reports_the_second(tmp_path):
    write(tmp_path, "a.toml", GOOD)
    second = write(tmp_path, "b.toml", "\n" + GOOD.replace('"watch"', '"replace-soon"'))
    ruleset = site_only(tmp_path)
    error = only_error(ruleset)
    assert (error.path, error.line) == (second, 3)
    assert f"duplicate id, already defined at {tmp_path / 'a.toml'}:1" in error.message
    assert ruleset.get("site.pending-any").severity == Severity.WATCH


def test_toml_syntax_error_names_the_line_from_the_parser(tmp_path):
    path = write(tmp_path, "a.toml", GOOD + "\n[[rule]]\nid = \n")
    error = only_error(site_only(tmp_path))
    assert (error.path, error.line) == (path, 11)
    assert error.message.startswith("TOML syntax:")


def test_a_broken_file_does_not_stop_the_other_files(tmp_path):
    write(tmp_path, "a.toml", "this is not toml")
    write(tmp_path, "b.toml", GOOD)
    ruleset = site_only(tmp_path)
    assert len(ruleset.errors) == 1
    assert [r.id for r in ruleset.rules] == ["site.pending-any"]


def test_bad_explain_placeholder_is_reported(tmp_path):
    write(tmp_path, "a.toml", GOOD.replace("{pending_sectors} pending", "{growth(pending_sectors)} pending"))
    error = only_error(site_only(tmp_path))
    assert error.line == 7 and "explain: growth() takes 2 argument(s)" in error.message


def test_bad_id_is_rejected(tmp_path):
    write(tmp_path, "a.toml", GOOD.replace('"site.pending-any"', '"Site Pending"'))
    error = only_error(site_only(tmp_path))
    assert error.line == 2 and "lowercase" in error.message


def test_top_level_keys_other_than_rule_are_errors(tmp_path):
    write(tmp_path, "a.toml", 'severity = "watch"\n\n' + GOOD)
    ruleset = site_only(tmp_path)
    error = only_error(ruleset)
    assert error.line == 1 and "unknown top-level key 'severity'" in error.message
    assert len(ruleset.rules) == 1


def test_a_missing_folder_is_an_error_without_a_line(tmp_path):
    error = only_error(site_only(tmp_path / "nowhere"))
    assert error.line is None
    assert str(error) == f"{tmp_path / 'nowhere'}: no such rule directory or file"


# -- override and disable by id -----------------------------------------------------------------

def test_a_site_rule_with_a_default_id_overrides_only_the_keys_it_gives(tmp_path):
    write(tmp_path, "site.toml", """\
        [[rule]]
        id = "media.reallocated-present"
        severity = "replace-soon"
        """)
    ruleset = load_rules([tmp_path])
    assert ruleset.errors == []
    rule = ruleset.get("media.reallocated-present")
    default = load_rules([]).get("media.reallocated-present")
    assert rule.severity == Severity.REPLACE_SOON
    assert (rule.when.text, rule.title, rule.category) == (default.when.text, default.title, default.category)
    assert (rule.status, rule.path, rule.overrides) == ("override", tmp_path / "site.toml", default.path)


def test_enabled_false_disables_a_default_and_it_never_fires(tmp_path):
    write(tmp_path, "site.toml", '[[rule]]\nid = "media.pending-present"\nenabled = false\n')
    ruleset = load_rules([tmp_path])
    assert ruleset.errors == []
    assert ruleset.get("media.pending-present").status == "disabled"
    assert "media.pending-present" not in [r.id for r in ruleset.rules]
    flags = evaluate(ruleset, frame(hdd("QHA001", pending_sectors=5)))
    assert "media.pending-present" not in set(flags["rule_id"])
    assert len(ruleset.all_rules) == len(load_rules([]).all_rules)


def test_disabling_an_id_nobody_defined_is_an_error(tmp_path):
    write(tmp_path, "site.toml", '[[rule]]\nid = "media.pending-presnet"\nenabled = false\n')
    error = only_error(load_rules([tmp_path]))
    assert error.line == 1 and "no earlier rule has this id" in error.message


def test_a_broken_override_leaves_the_default_in_effect(tmp_path):
    write(tmp_path, "site.toml", '[[rule]]\nid = "media.pending-growth"\nwhen = "growth(pending_sectors) >= 8"\n')
    ruleset = load_rules([tmp_path])
    assert only_error(ruleset).line == 3
    rule = ruleset.get("media.pending-growth")
    assert rule.status == "default" and rule.when.text == "growth(pending_sectors, 7) >= 8"


def test_a_later_folder_overrides_an_earlier_one(tmp_path):
    write(tmp_path / "one", "a.toml", GOOD)
    write(tmp_path / "two", "a.toml", '[[rule]]\nid = "site.pending-any"\nseverity = "replace-now"\n')
    ruleset = load_rules([tmp_path / "one", tmp_path / "two"], include_defaults=False)
    assert ruleset.errors == []
    assert ruleset.get("site.pending-any").severity == Severity.REPLACE_NOW


def test_window_days_covers_the_longest_window_plus_a_day(tmp_path):
    write(tmp_path, "a.toml", GOOD.replace('"pending_sectors > 0"', '"highest(temperature_c, 13.5) > 50"'))
    assert site_only(tmp_path).window_days == 15


# -- the packaged defaults and the repo's example -----------------------------------------------

def test_the_default_set_loads_cleanly_and_every_rule_names_its_source():
    ruleset = load_rules([])
    assert ruleset.errors == []
    assert len(ruleset.rules) >= 20
    for rule in ruleset.rules:
        assert rule.source.strip(), rule.id
        assert rule.path.parent == default_rules_dir()


def test_the_repos_example_site_folder_is_valid():
    ruleset = load_rules([REPO / "rules"])
    assert ruleset.errors == []
    assert ruleset.get("site.hdd-warm-all-week").status == "site"


def test_site_folders_come_from_the_environment_when_no_option_is_given(monkeypatch, tmp_path):
    monkeypatch.setenv("TRIAGE_RULES", f"{tmp_path / 'a'}:{tmp_path / 'b'}")
    assert resolve_rules_dirs(None) == [tmp_path / "a", tmp_path / "b"]
    assert resolve_rules_dirs([tmp_path / "c"]) == [tmp_path / "c"]


# -- functions renamed in the language: refused with the new name, one line per use ---------------

OLD_NAMES = """\
[[rule]]
id = "site.cool"
title = "Never cools"
severity = "watch"
category = "thermal"
when = "min_over(temperature_c, 7) >= 50 and delta(crc_errors, 7) >= 0"
explain = "coolest {min_over(temperature_c, 7)} C, {rate(crc_errors, 7)} CRC/day, was {previous(crc_errors, 1)}"
source = "test"
"""


def test_each_use_of_an_old_function_name_is_one_line_naming_the_new_one(tmp_path):
    path = write(tmp_path, "site.toml", GOOD + OLD_NAMES)
    ruleset = site_only(tmp_path)
    assert [str(e) for e in ruleset.errors] == [
        f"{path}:14: 'min_over' is now 'lowest'",
        f"{path}:14: 'delta' is now 'growth'",
        f"{path}:15: 'min_over' is now 'lowest'",
        f"{path}:15: 'rate' is now 'growth_per_day'",
        f"{path}:15: 'previous' is now 'captures_ago'",
    ]
    # the other rule of the file loads unchanged; the one with old names does not load at all
    assert [r.id for r in ruleset.rules] == ["site.pending-any"]


def test_old_names_in_a_multi_line_condition_point_at_their_own_line(tmp_path):
    text = OLD_NAMES.replace(
        'when = "min_over(temperature_c, 7) >= 50 and delta(crc_errors, 7) >= 0"',
        'when = """\nhighest(temperature_c, 7) >= 50\nand max_over(temperature_c, 7) >= 50"""',
    ).replace('explain = "coolest {min_over(temperature_c, 7)} C, {rate(crc_errors, 7)} CRC/day, was {previous(crc_errors, 1)}"',
              'explain = "{temperature_c} C"')
    path = write(tmp_path, "site.toml", text)
    assert [str(e) for e in site_only(tmp_path).errors] == [f"{path}:8: 'max_over' is now 'highest'"]


def test_an_old_name_as_text_or_a_field_like_word_is_not_a_call(tmp_path):
    # 'rate' in the evidence prose and in a quoted string is only words, not a call
    text = GOOD.replace('explain = "{pending_sectors} pending"', 'explain = "rate (per day) {pending_sectors}"')
    text = text.replace('when = "pending_sectors > 0"', "when = \"pending_sectors > 0 and model != 'delta(x)'\"")
    write(tmp_path, "a.toml", text)
    assert site_only(tmp_path).errors == []


def test_an_override_with_an_old_name_leaves_the_default_in_effect(tmp_path):
    write(tmp_path, "site.toml", '[[rule]]\nid = "media.pending-growth"\nwhen = "delta(pending_sectors, 7) >= 4"\n')
    ruleset = load_rules([tmp_path])
    assert [str(e) for e in ruleset.errors] == [f"{tmp_path / 'site.toml'}:3: 'delta' is now 'growth'"]
    assert ruleset.get("media.pending-growth").when.text == "growth(pending_sectors, 7) >= 8"


def test_an_old_name_in_a_library_expression_names_the_new_one():
    from triage.rules.expr import ExprError, compile_expression

    try:
        compile_expression("max_over(temperature_c, 7) > 60")
    except ExprError as exc:
        assert (exc.message, exc.column) == ("'max_over' is now 'highest'", 1)
    else:
        raise AssertionError("an old function name compiled")
