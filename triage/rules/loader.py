"""Read rule files (TOML, our own schema; docs/rules.md) into a RuleSet.

Layers load in order: the packaged defaults (``triage/rules_default/*.toml``), then each site
directory given. Within a directory, files load in name order. A rule whose ``id`` was defined
by an earlier layer overrides it: the keys it gives replace the earlier rule's keys, so
``enabled = false`` alone disables a default, ``severity = "watch"`` alone softens one.

Errors never stop the load: each becomes a ``RuleError`` (``file:line: message``) and only the
rule concerned is left out (an override that fails leaves the earlier rule in effect).
tomllib reports no positions for values, so lines are found by scanning the file's text for the
``[[rule]]`` headers and ``key =`` lines.
"""

from __future__ import annotations

import os
import re
import tomllib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Mapping, Sequence

from triage.rules.expr import ExprError, compile_expression, renamed_calls, renamed_message
from triage.rules.fields import Kind
from triage.rules.model import Category, Rule, RuleError, RuleSet, Severity
from triage.rules.template import compile_template, renamed_calls_in_template

REQUIRED_KEYS = ("id", "title", "severity", "category", "when", "explain")
OPTIONAL_KEYS = ("source", "enabled")
ENV_RULES = "TRIAGE_RULES"

_ID = re.compile(r"[a-z0-9]+(?:[._-][a-z0-9]+)*")
_RULE_HEADER = re.compile(r"^\s*\[\[\s*rule\s*\]\]\s*(?:#.*)?$")
_ANY_HEADER = re.compile(r"^\s*\[")
_KEY_LINE = re.compile(r"""^\s*(?:"([^"]*)"|'([^']*)'|([A-Za-z0-9_-]+))\s*=""")
_OPENS_MULTILINE = re.compile(r"=\s*(?:\"\"\"|\'\'\')\s*$")  # TOML drops the newline right after it
_TOML_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)$")


def default_rules_dir() -> Path:
    """The packaged default rule set."""
    return Path(str(resources.files("triage").joinpath("rules_default")))


def resolve_rules_dirs(options: Sequence[Path] | None = None) -> list[Path]:
    """Site rule directories: ``--dir`` options, else ``$TRIAGE_RULES`` (``:``-separated), else
    ``rules`` in triage.toml (a path or a list of paths), else ``./rules`` when it exists."""
    if options:
        return list(options)
    if os.environ.get(ENV_RULES):
        return [Path(p) for p in os.environ[ENV_RULES].split(os.pathsep) if p]
    from triage.config import load_config

    configured = load_config().get("rules")
    if isinstance(configured, str):
        return [Path(configured)]
    if isinstance(configured, list):
        return [Path(p) for p in configured if isinstance(p, str)]
    return [Path("rules")] if Path("rules").is_dir() else []


class _Bad(Exception):
    def __init__(self, line: int, message: str):
        super().__init__(message)
        self.line = line
        self.message = message


class _Renamed(Exception):
    """A rule calls functions by their old names: one (line, message) per call."""

    def __init__(self, uses: list[tuple[int, str]]):
        super().__init__(uses)
        self.uses = uses


@dataclass
class _FileText:
    """Line lookup for one rule file."""

    lines: list[str]
    headers: list[int]  # 1-based line numbers of [[rule]] headers

    @classmethod
    def of(cls, text: str) -> "_FileText":
        lines = text.splitlines()
        return cls(lines, [i + 1 for i, line in enumerate(lines) if _RULE_HEADER.match(line)])

    def block(self, index: int) -> tuple[int, int]:
        """(header line, last line) of the index-th [[rule]] table."""
        start = self.headers[index]
        end = len(self.lines)
        for number in range(start + 1, len(self.lines) + 1):
            if _ANY_HEADER.match(self.lines[number - 1]):
                end = number - 1
                break
        return start, end

    def key_line(self, start: int, end: int, key: str) -> int | None:
        for number in range(start, end + 1):
            match = _KEY_LINE.match(self.lines[number - 1])
            if match and key in match.groups():
                return number
        return None

    def value_line(self, key_line: int, offset: int, value: str) -> int:
        """The line of ``offset`` into the string value of the key at ``key_line``."""
        opens_alone = _OPENS_MULTILINE.search(self.lines[key_line - 1]) is not None
        return key_line + int(opens_alone) + value.count("\n", 0, offset)

    def top_level_key_line(self, key: str) -> int:
        stop = self.headers[0] - 1 if self.headers else len(self.lines)
        return self.key_line(1, stop, key) or 1 if stop >= 1 else 1


def load_rules(dirs: Sequence[Path] = (), include_defaults: bool = True) -> RuleSet:
    """The rules in effect: defaults (unless ``include_defaults`` is false), then each of
    ``dirs`` (a directory of ``*.toml`` files, or one file) overriding by id."""
    layers: list[tuple[Path, str]] = []
    if include_defaults:
        layers.append((default_rules_dir(), "default"))
    layers += [(Path(d), "site") for d in dirs]
    effective: dict[str, Rule] = {}
    errors: list[RuleError] = []
    for directory, origin in layers:
        if directory.is_file():
            files = [directory]
        elif directory.is_dir():
            files = sorted(p for p in directory.glob("*.toml") if p.is_file())
        else:
            errors.append(RuleError(directory, None, "no such rule directory or file"))
            continue
        seen_here: dict[str, str] = {}
        for path in files:
            _load_file(path, origin, effective, seen_here, errors)
    return RuleSet(all_rules=list(effective.values()), errors=errors)


def _load_file(
    path: Path,
    origin: str,
    effective: dict[str, Rule],
    seen_here: dict[str, str],
    errors: list[RuleError],
) -> None:
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        errors.append(RuleError(path, None, "not UTF-8 text"))
        return
    except OSError as exc:
        errors.append(RuleError(path, None, f"cannot read: {exc.strerror or exc}"))
        return
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        found = _TOML_POSITION.search(message)
        if found:
            line, column = int(found.group(1)), int(found.group(2))
            errors.append(RuleError(path, line, f"TOML syntax: {message[: found.start()]} (column {column})"))
        else:
            errors.append(RuleError(path, max(1, len(text.splitlines())), f"TOML syntax: {message}"))
        return
    lines = _FileText.of(text)
    for key in document:
        if key != "rule":
            errors.append(
                RuleError(path, lines.top_level_key_line(key), f"unknown top-level key '{key}'; rules go in [[rule]] tables")
            )
    tables = document.get("rule", [])
    if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
        errors.append(RuleError(path, lines.top_level_key_line("rule"), "'rule' must be [[rule]] tables"))
        return
    for index, table in enumerate(tables):
        if len(lines.headers) == len(tables):
            start, end = lines.block(index)
        else:  # inline tables or an unusual layout: positions are approximate
            start, end = lines.top_level_key_line("rule"), len(lines.lines)
        try:
            rule = _build(table, path, origin, start, end, lines, effective, seen_here)
        except _Bad as bad:
            errors.append(RuleError(path, bad.line, bad.message))
            continue
        except _Renamed as renamed:
            errors += [RuleError(path, line, message) for line, message in renamed.uses]
            continue
        seen_here[rule.id] = f"{path}:{start}"
        effective[rule.id] = rule


def _refuse_old_names(table: Mapping[str, Any], at, lines: _FileText) -> None:
    """Raise _Renamed when ``when`` or ``explain`` calls a function by a name it no longer has."""
    uses = []
    for key, finder in (("when", renamed_calls), ("explain", renamed_calls_in_template)):
        value = table.get(key)
        if isinstance(value, str):
            uses += [(lines.value_line(at(key), offset, value), renamed_message(old)) for old, offset in finder(value)]
    if uses:
        raise _Renamed(uses)


def _build(
    table: Mapping[str, Any],
    path: Path,
    origin: str,
    start: int,
    end: int,
    lines: _FileText,
    effective: Mapping[str, Rule],
    seen_here: Mapping[str, str],
) -> Rule:
    def at(key: str) -> int:
        return lines.key_line(start, end, key) or start

    rule_id = table.get("id")
    if rule_id is None:
        raise _Bad(start, "rule has no 'id'")
    if not isinstance(rule_id, str) or not _ID.fullmatch(rule_id):
        raise _Bad(at("id"), f"id {rule_id!r} must be lowercase letters and digits joined by '.', '-' or '_'")
    label = f"rule '{rule_id}'"
    if rule_id in seen_here:
        raise _Bad(at("id"), f"{label}: duplicate id, already defined at {seen_here[rule_id]}")
    for key in table:
        if key not in REQUIRED_KEYS and key not in OPTIONAL_KEYS:
            known = ", ".join(REQUIRED_KEYS + OPTIONAL_KEYS)
            raise _Bad(at(key), f"{label}: unknown key '{key}' (keys: {known})")

    earlier = effective.get(rule_id)
    definition = {**(earlier.definition if earlier else {}), **table}
    missing = [k for k in REQUIRED_KEYS if k not in definition]
    if missing:
        if set(table) <= {"id", "enabled"}:
            raise _Bad(start, f"{label}: no earlier rule has this id, so there is nothing to override or disable")
        raise _Bad(start, f"{label}: missing key(s): {', '.join(missing)}")

    def text(key: str) -> str:
        value = definition[key]
        if not isinstance(value, str) or (key in ("title", "when", "explain") and not value.strip()):
            raise _Bad(at(key), f"{label}: '{key}' must be a non-empty string")
        return value

    _refuse_old_names(table, at, lines)
    title = text("title")
    try:
        severity = Severity(text("severity"))
    except ValueError:
        choices = ", ".join(s.value for s in Severity)
        raise _Bad(at("severity"), f"{label}: unknown severity {definition['severity']!r} (one of: {choices})") from None
    try:
        category = Category(text("category"))
    except ValueError:
        choices = ", ".join(c.value for c in Category)
        raise _Bad(at("category"), f"{label}: unknown category {definition['category']!r} (one of: {choices})") from None
    try:
        when = compile_expression(text("when"), expect=Kind.BOOL)
    except ExprError as exc:
        raise _Bad(at("when"), f"{label}: when: {exc.message} (column {exc.column} of the expression)") from None
    try:
        explain = compile_template(text("explain"))
    except ExprError as exc:
        raise _Bad(at("explain"), f"{label}: explain: {exc.message} (column {exc.column} of the text)") from None
    source = definition.get("source", "")
    if not isinstance(source, str):
        raise _Bad(at("source"), f"{label}: 'source' must be a string")
    enabled = definition.get("enabled", True)
    if not isinstance(enabled, bool):
        raise _Bad(at("enabled"), f"{label}: 'enabled' must be true or false")
    return Rule(
        id=rule_id,
        title=title,
        severity=severity,
        category=category,
        when=when,
        explain=explain,
        source=source,
        enabled=enabled,
        path=path,
        line=start,
        origin=origin,
        overrides=earlier.path if earlier else None,
        definition=definition,
    )
