"""The rule condition language: tokenizer, Pratt parser, type checker. No ``eval`` anywhere.

A condition is a small expression over one drive's snapshot fields and their recent history::

    growth(pending_sectors, 7) >= 8 and not prefail_tripped

Grammar (lowest binding first; docs/rules.md has the user's version)::

    expr       := or
    or         := and ("or" and)*
    and        := not ("and" not)*
    not        := "not" not | comparison
    comparison := sum (("==" | "!=" | "<" | "<=" | ">" | ">=") sum)?     -- never chained
    sum        := product (("+" | "-") product)*
    product    := unary (("*" | "/") unary)*
    unary      := "-" unary | atom
    atom       := NUMBER | STRING | "true" | "false" | FIELD | CALL | "(" expr ")"
    CALL       := NAME "(" FIELD "," NUMBER ")"   |   NAME "(" FIELD ")"

The parser is a Pratt (top-down operator precedence) parser: each token kind has a binding power,
and ``_parse(rbp)`` keeps absorbing infix operators that bind tighter than ``rbp``
(V. Pratt, "Top Down Operator Precedence", POPL 1973).

Every node carries the offset of its first character so errors can point into the text; the
type checker rejects ill-typed expressions (``pending_sectors and 3``) before any data is seen.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field
from typing import Union

from triage.rules.fields import FIELDS, Kind


class ExprError(ValueError):
    """A syntax or type error in an expression; ``offset`` is 0-based into the text."""

    def __init__(self, message: str, offset: int):
        super().__init__(message)
        self.message = message
        self.offset = offset

    @property
    def column(self) -> int:
        return self.offset + 1

    def __str__(self) -> str:
        return f"{self.message} (column {self.column})"


# -- tokens -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Token:
    kind: str  # "number" | "string" | "name" | "op" | "end"
    text: str
    offset: int


_TOKEN = re.compile(
    r"""
     (?P<space>\s+)
    |(?P<number>(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?)
    |(?P<string>"(?:[^"\\\n]|\\.)*"|'(?:[^'\\\n]|\\.)*')
    |(?P<name>[A-Za-z_][A-Za-z0-9_]*)
    |(?P<op>==|!=|<=|>=|<|>|\(|\)|,|\+|-|\*|/)
    """,
    re.VERBOSE,
)

KEYWORDS = {"and", "or", "not", "true", "false"}


def tokenize(text: str) -> list[Token]:
    """Split ``text`` into tokens, ending with an ``end`` token; raise ExprError on a stray character."""
    tokens: list[Token] = []
    pos = 0
    while pos < len(text):
        match = _TOKEN.match(text, pos)
        if match is None:
            char = text[pos]
            if char in "\"'":
                raise ExprError("string is not closed", pos)
            if char == "=":
                raise ExprError("'=' alone is not an operator; write '==' to compare", pos)
            if char in "&|!":
                raise ExprError(f"unexpected {char!r}; write 'and', 'or', 'not'", pos)
            raise ExprError(f"unexpected character {char!r}", pos)
        kind = match.lastgroup
        assert kind is not None
        if kind == "number" and _NAME_START.match(text, match.end()):
            raise ExprError(
                f"a number takes no unit: write {match.group()} (days and counts are plain numbers)",
                match.end(),
            )
        if kind != "space":
            tokens.append(Token(kind, match.group(), pos))
        pos = match.end()
    tokens.append(Token("end", "", len(text)))
    return tokens


_NAME_START = re.compile(r"[A-Za-z_]")


# -- syntax tree ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Literal:
    value: Union[float, bool, str]
    kind: Kind
    offset: int


@dataclass(frozen=True)
class Field:
    name: str
    offset: int


@dataclass(frozen=True)
class Call:
    name: str
    args: tuple["Node", ...]
    offset: int


@dataclass(frozen=True)
class Unary:
    op: str  # "-" | "not"
    operand: "Node"
    offset: int


@dataclass(frozen=True)
class Binary:
    op: str  # arithmetic, comparison, "and", "or"
    left: "Node"
    right: "Node"
    offset: int


Node = Union[Literal, Field, Call, Unary, Binary]

COMPARISONS = {"==", "!=", "<", "<=", ">", ">="}
ARITHMETIC = {"+", "-", "*", "/"}

#: Binding powers of infix operators (higher binds tighter).
_INFIX = {
    "or": 10,
    "and": 20,
    **{op: 40 for op in COMPARISONS},
    "+": 50,
    "-": 50,
    "*": 60,
    "/": 60,
}
_NOT_POWER = 30  # "not a == b" is "not (a == b)"
_NEGATE_POWER = 70


class _Parser:
    def __init__(self, text: str):
        self.text = text
        self.tokens = tokenize(text)
        self.index = 0

    def peek(self) -> Token:
        return self.tokens[self.index]

    def advance(self) -> Token:
        token = self.tokens[self.index]
        self.index += 1
        return token

    def expect(self, text: str, context: str) -> Token:
        token = self.peek()
        if token.kind != "op" or token.text != text:
            raise ExprError(f"expected {text!r} {context}, found {_describe(token)}", token.offset)
        return self.advance()

    def parse(self) -> Node:
        if self.peek().kind == "end":
            raise ExprError("empty expression", 0)
        node = self._parse(0)
        token = self.peek()
        if token.kind != "end":
            raise ExprError(f"unexpected {_describe(token)} after a complete expression", token.offset)
        return node

    def _infix_power(self, token: Token) -> int:
        if token.kind in ("op", "name"):
            return _INFIX.get(token.text, 0)
        return 0

    def _parse(self, rbp: int) -> Node:
        left = self._prefix(self.advance())
        while rbp < self._infix_power(self.peek()):
            left = self._infix(self.advance(), left)
        return left

    def _prefix(self, token: Token) -> Node:
        if token.kind == "number":
            return Literal(float(token.text), Kind.NUMBER, token.offset)
        if token.kind == "string":
            return Literal(_unquote(token.text), Kind.TEXT, token.offset)
        if token.kind == "name":
            if token.text in ("true", "false"):
                return Literal(token.text == "true", Kind.BOOL, token.offset)
            if token.text == "not":
                return Unary("not", self._parse(_NOT_POWER), token.offset)
            if token.text in KEYWORDS:
                raise ExprError(f"'{token.text}' needs an operand on its left", token.offset)
            if self.peek().text == "(" and self.peek().kind == "op":
                return self._call(token)
            return Field(token.text, token.offset)
        if token.kind == "op":
            if token.text == "(":
                inner = self._parse(0)
                self.expect(")", "to close the '(' opened at column " + str(token.offset + 1))
                return inner
            if token.text == "-":
                return Unary("-", self._parse(_NEGATE_POWER), token.offset)
        if token.kind == "end":
            raise ExprError("expression ends too early", token.offset)
        raise ExprError(f"unexpected {_describe(token)}", token.offset)

    def _call(self, name: Token) -> Node:
        self.advance()  # "("
        args: list[Node] = []
        if self.peek().text != ")":
            while True:
                args.append(self._parse(0))
                if self.peek().text == "," and self.peek().kind == "op":
                    self.advance()
                    continue
                break
        self.expect(")", f"to close the call to {name.text}()")
        return Call(name.text, tuple(args), name.offset)

    def _infix(self, token: Token, left: Node) -> Node:
        op = token.text
        right = self._parse(_INFIX[op])
        if op in COMPARISONS:
            after = self.peek()
            if after.kind == "op" and after.text in COMPARISONS:
                raise ExprError("comparisons cannot be chained; join them with 'and'", after.offset)
        return Binary(op, left, right, token.offset)


def _describe(token: Token) -> str:
    if token.kind == "end":
        return "the end of the expression"
    return repr(token.text)


def _unquote(text: str) -> str:
    body = text[1:-1]
    return re.sub(r"\\(.)", r"\1", body)


def parse(text: str) -> Node:
    """The syntax tree of ``text``; raise ExprError with the offending offset."""
    return _Parser(text).parse()


# -- functions --------------------------------------------------------------------------------

#: Argument slots: "number_field" (a numeric snapshot field), "any_field", "days" (a positive
#: number of days), "count" (a whole number of captures >= 1), "bit" (a bit position 0-62).
@dataclass(frozen=True)
class FunctionSpec:
    name: str
    params: tuple[str, ...]
    result: Kind
    summary: str


FUNCTIONS: dict[str, FunctionSpec] = {
    spec.name: spec
    for spec in [
        FunctionSpec(
            "growth", ("number_field", "days"), Kind.NUMBER,
            "how much the reading grew: latest value minus the value at the baseline capture (the "
            "latest at or before now - days; the earliest in the history when there is none)",
        ),
        FunctionSpec(
            "growth_per_day", ("number_field", "days"), Kind.NUMBER,
            "growth divided by the days between the baseline capture and the latest one",
        ),
        FunctionSpec("before", ("number_field", "days"), Kind.NUMBER,
                     "the value at the baseline capture that growth subtracts"),
        FunctionSpec("span_days", ("number_field", "days"), Kind.NUMBER,
                     "days between the baseline capture and the latest capture"),
        FunctionSpec("highest", ("number_field", "days"), Kind.NUMBER,
                     "highest reading among captures taken in the last `days` days"),
        FunctionSpec("lowest", ("number_field", "days"), Kind.NUMBER,
                     "lowest reading among captures taken in the last `days` days"),
        FunctionSpec(
            "consecutive_increases", ("number_field", "count"), Kind.BOOL,
            "true when each of the last n captures is larger than the capture before it",
        ),
        FunctionSpec("captures_ago", ("number_field", "count"), Kind.NUMBER,
                     "the reading n captures before the latest one"),
        FunctionSpec("bit", ("number_field", "bit"), Kind.BOOL,
                     "true when bit k (0 = least significant) of the latest value is set"),
        FunctionSpec("is_null", ("any_field",), Kind.BOOL,
                     "true when the latest capture has no value for the field"),
    ]
}

#: Names the language used before it took words of its own (docs/rules.md, "Renamed functions").
#: An old name is refused with its new one, never read with a meaning of its own.
RENAMED_FUNCTIONS = {
    "delta": "growth",
    "rate": "growth_per_day",
    "max_over": "highest",
    "min_over": "lowest",
    "previous": "captures_ago",
}

_PARAM_WORDS = {"number_field": "field", "any_field": "field", "days": "days", "count": "n", "bit": "k"}

#: Longest window a rule may ask for; a typo like 7000 days would make every caller read years.
MAX_DAYS = 366.0
MAX_COUNT = 100


# -- type checking ----------------------------------------------------------------------------


@dataclass
class _Usage:
    fields: set[str] = field(default_factory=set)
    max_days: float = 0.0
    max_count: int = 0


def _unknown_field(name: str, offset: int) -> ExprError:
    if name in FUNCTIONS:
        return ExprError(f"'{name}' is a function: call it as {name}(...)", offset)
    close = difflib.get_close_matches(name, list(FIELDS), n=1)
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    return ExprError(f"unknown field '{name}'{hint}", offset)


def _check(node: Node, usage: _Usage) -> Kind:
    if isinstance(node, Literal):
        return node.kind
    if isinstance(node, Field):
        if node.name not in FIELDS:
            raise _unknown_field(node.name, node.offset)
        usage.fields.add(node.name)
        return FIELDS[node.name]
    if isinstance(node, Call):
        return _check_call(node, usage)
    if isinstance(node, Unary):
        kind = _check(node.operand, usage)
        want = Kind.BOOL if node.op == "not" else Kind.NUMBER
        if kind != want:
            raise ExprError(f"'{node.op}' needs a {want} operand, not a {kind}", node.offset)
        return want
    assert isinstance(node, Binary)
    left = _check(node.left, usage)
    right = _check(node.right, usage)
    if node.op in ("and", "or"):
        for side, kind in ((node.left, left), (node.right, right)):
            if kind != Kind.BOOL:
                raise ExprError(
                    f"'{node.op}' joins true/false conditions, but this side is a {kind}",
                    _start(side),
                )
        return Kind.BOOL
    if node.op in ARITHMETIC or node.op in ("<", "<=", ">", ">="):
        for side, kind in ((node.left, left), (node.right, right)):
            if kind != Kind.NUMBER:
                raise ExprError(f"'{node.op}' needs numbers, but this side is a {kind}", _start(side))
        return Kind.NUMBER if node.op in ARITHMETIC else Kind.BOOL
    # == and !=
    if left != right:
        raise ExprError(f"cannot compare a {left} with a {right}", node.offset)
    return Kind.BOOL


def _start(node: Node) -> int:
    if isinstance(node, Binary):
        return _start(node.left)
    return node.offset


def _check_call(node: Call, usage: _Usage) -> Kind:
    spec = FUNCTIONS.get(node.name)
    if spec is None and node.name in RENAMED_FUNCTIONS:
        raise ExprError(renamed_message(node.name), node.offset)
    if spec is None:
        if node.name in FIELDS:
            raise ExprError(f"'{node.name}' is a field, not a function", node.offset)
        raise ExprError(
            f"unknown function '{node.name}'; known: {', '.join(sorted(FUNCTIONS))}", node.offset
        )
    signature = f"{spec.name}({', '.join(_PARAM_WORDS[p] for p in spec.params)})"
    if len(node.args) != len(spec.params):
        raise ExprError(
            f"{spec.name}() takes {len(spec.params)} argument(s): {signature}", node.offset
        )
    for param, arg in zip(spec.params, node.args):
        if param in ("number_field", "any_field"):
            if not isinstance(arg, Field):
                raise ExprError(f"{spec.name}() takes a field name first: {signature}", _start(arg))
            if arg.name not in FIELDS:
                raise _unknown_field(arg.name, arg.offset)
            if param == "number_field" and FIELDS[arg.name] != Kind.NUMBER:
                raise ExprError(
                    f"{spec.name}() needs a numeric field; '{arg.name}' is a {FIELDS[arg.name]}",
                    arg.offset,
                )
            usage.fields.add(arg.name)
            continue
        if not (isinstance(arg, Literal) and arg.kind == Kind.NUMBER):
            raise ExprError(f"{spec.name}() takes a plain number here: {signature}", _start(arg))
        value = float(arg.value)
        if param == "days":
            if not 0 < value <= MAX_DAYS:
                raise ExprError(f"days must be more than 0 and at most {MAX_DAYS:g}", arg.offset)
            usage.max_days = max(usage.max_days, value)
        elif param == "count":
            if value != int(value) or not 1 <= value <= MAX_COUNT:
                raise ExprError(f"count must be a whole number from 1 to {MAX_COUNT}", arg.offset)
            usage.max_count = max(usage.max_count, int(value))
        elif param == "bit":
            if value != int(value) or not 0 <= value <= 62:
                raise ExprError("bit position must be a whole number from 0 to 62", arg.offset)
    return spec.result


def renamed_message(old: str) -> str:
    return f"'{old}' is now '{RENAMED_FUNCTIONS[old]}'"


def renamed_calls(text: str) -> list[tuple[str, int]]:
    """(old name, offset) of every call to a renamed function in ``text``, in order.

    Read from the tokens, so a field or a word inside quotes is never taken for a call; text that
    does not tokenize yields the calls before the bad character.
    """
    try:
        tokens = tokenize(text)
    except ExprError as exc:
        tokens = tokenize(text[: exc.offset])
    return [
        (token.text, token.offset)
        for token, after in zip(tokens, tokens[1:])
        if token.kind == "name" and token.text in RENAMED_FUNCTIONS and after.kind == "op" and after.text == "("
    ]


@dataclass(frozen=True)
class Expression:
    """A parsed and type-checked expression, ready for the engine."""

    text: str
    tree: Node
    kind: Kind
    fields: frozenset[str]
    max_days: float  # longest window any function in it reads; 0 when none
    max_count: int  # most captures back any function in it reads; 0 when none


def compile_expression(text: str, expect: Kind | None = None) -> Expression:
    """Parse and type-check ``text``; with ``expect``, require that result kind."""
    tree = parse(text)
    usage = _Usage()
    kind = _check(tree, usage)
    if expect is not None and kind != expect:
        raise ExprError(f"the expression must be a {expect}, but it is a {kind}", _start(tree))
    return Expression(
        text=text,
        tree=tree,
        kind=kind,
        fields=frozenset(usage.fields),
        max_days=usage.max_days,
        max_count=usage.max_count,
    )
