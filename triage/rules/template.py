"""Explanation templates: the words a firing rule prints, with its numbers filled in.

A template is text with ``{expression}`` or ``{expression:format}`` placeholders; each expression is
in the rule language (``{pending_sectors}``, ``{before(pending_sectors, 7)}``,
``{growth_per_day(crc_errors, 7):.1f}``) and is evaluated only for the drives where the rule fired.
``{{`` and ``}}`` stand for literal braces. The format part is Python's format mini-language for
numbers (``.1f``, ``d``, ``,``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Union

from triage.rules.expr import ExprError, Expression, compile_expression, renamed_calls

_PLACEHOLDER = re.compile(r"\{\{|\}\}|\{([^}]*)\}")
_SPEC = re.compile(r"[<>=^]?[+\- ]?#?0?\d*[,_]?(?:\.\d+)?[bdeEfFgGn%]?")


@dataclass(frozen=True)
class Placeholder:
    expression: Expression
    spec: str  # "" for the default number format


Part = Union[str, Placeholder]


@dataclass(frozen=True)
class Template:
    text: str
    parts: tuple[Part, ...]

    @property
    def expressions(self) -> list[Expression]:
        return [p.expression for p in self.parts if isinstance(p, Placeholder)]


def compile_template(text: str) -> Template:
    """Split ``text`` into literal parts and compiled placeholders; raise ExprError on a bad one."""
    parts: list[Part] = []
    literal: list[str] = []
    pos = 0
    while pos < len(text):
        char = text[pos]
        if text.startswith("{{", pos) or text.startswith("}}", pos):
            literal.append(char)
            pos += 2
            continue
        if char == "}":
            raise ExprError("'}' without '{' (write '}}' for a brace)", pos)
        if char != "{":
            literal.append(char)
            pos += 1
            continue
        close = text.find("}", pos)
        if close < 0:
            raise ExprError("'{' is not closed (write '{{' for a brace)", pos)
        body = text[pos + 1 : close]
        expression_text, _, spec = body.partition(":")
        if spec and not _SPEC.fullmatch(spec):
            raise ExprError(f"bad number format ':{spec}'", pos + 1 + len(expression_text))
        try:
            expression = compile_expression(expression_text)
        except ExprError as exc:
            raise ExprError(exc.message, pos + 1 + exc.offset) from None
        if spec:
            try:
                format(1.5 if not spec.endswith("d") else 1, spec)
            except ValueError:
                raise ExprError(f"bad number format ':{spec}'", pos + 1 + len(expression_text)) from None
        if literal:
            parts.append("".join(literal))
            literal = []
        parts.append(Placeholder(expression, spec))
        pos = close + 1
    if literal:
        parts.append("".join(literal))
    return Template(text, tuple(parts))


def renamed_calls_in_template(text: str) -> list[tuple[str, int]]:
    """(old name, offset into ``text``) of every call to a renamed function in the placeholders."""
    uses = []
    for match in _PLACEHOLDER.finditer(text):
        if match.group(1) is not None:
            body = match.group(1).partition(":")[0]
            uses += [(name, match.start(1) + offset) for name, offset in renamed_calls(body)]
    return uses


def format_value(value: object, known: bool, spec: str = "") -> str:
    """One value as words: numbers without a spurious '.0', booleans as yes/no, missing as 'unknown'."""
    if not known:
        return "unknown"
    if isinstance(value, (bool,)) or type(value).__name__ == "bool_":
        return "yes" if value else "no"
    if isinstance(value, str):
        return value
    number = float(value)  # type: ignore[arg-type]
    if spec:
        if spec.endswith("d"):
            return format(int(round(number)), spec)
        return format(number, spec)
    if number == int(number):
        return str(int(number))
    if abs(number) >= 100:
        return f"{number:.0f}"
    return f"{number:.3g}"
