"""The condition language: tokens, precedence, and errors that point at the offending column.

The parser is our own design (docs/rules.md); its semantics need no outside reference.
"""

from __future__ import annotations

import pytest

from triage.rules.expr import Binary, Call, ExprError, Field, Literal, Unary, compile_expression, parse, tokenize
from triage.rules.fields import FIELDS, Kind


def error_of(text: str) -> ExprError:
    with pytest.raises(ExprError) as caught:
        compile_expression(text)
    return caught.value


def test_tokens_carry_their_offsets():
    tokens = tokenize("growth(crc_errors, 7) >= 10")
    assert [(t.kind, t.text, t.offset) for t in tokens] == [
        ("name", "growth", 0), ("op", "(", 6), ("name", "crc_errors", 7), ("op", ",", 17),
        ("number", "7", 19), ("op", ")", 20), ("op", ">=", 22), ("number", "10", 25), ("end", "", 27),
    ]


def test_and_binds_tighter_than_or():
    tree = parse("prefail_tripped or threshold_tripped and pending_sectors > 0")
    assert isinstance(tree, Binary) and tree.op == "or"
    assert isinstance(tree.right, Binary) and tree.right.op == "and"


def test_not_applies_to_a_whole_comparison():
    tree = parse("not pending_sectors > 0")
    assert isinstance(tree, Unary) and tree.op == "not"
    assert isinstance(tree.operand, Binary) and tree.operand.op == ">"


def test_multiplication_binds_tighter_than_addition_and_comparison_loosest():
    tree = parse("1 + 2 * 3 > 6")
    assert tree.op == ">"
    assert tree.left.op == "+" and tree.left.right.op == "*"


def test_subtraction_is_left_associative():
    tree = parse("10 - 4 - 3")
    assert tree.op == "-" and isinstance(tree.left, Binary) and tree.left.op == "-"
    assert tree.right == Literal(3.0, Kind.NUMBER, 9)


def test_parentheses_override_precedence():
    tree = parse("(prefail_tripped or threshold_tripped) and pending_sectors > 0")
    assert tree.op == "and" and tree.left.op == "or"


def test_calls_keep_field_and_number_arguments():
    tree = parse("growth(pending_sectors, 7)")
    assert tree == Call("growth", (Field("pending_sectors", 7), Literal(7.0, Kind.NUMBER, 24)), 0)


def test_strings_take_either_quote():
    assert parse("bus == 'nvme'").right.value == "nvme"
    assert parse('bus == "nvme"').right.value == "nvme"


def test_compiled_expression_lists_fields_and_longest_window():
    expression = compile_expression("growth(pending_sectors, 7) >= 8 or highest(temperature_c, 14) > 60")
    assert expression.fields == {"pending_sectors", "temperature_c"}
    assert expression.max_days == 14
    assert expression.kind == Kind.BOOL


def test_numeric_and_flag_snapshot_columns_are_fields_but_timestamps_are_not():
    assert FIELDS["pending_sectors"] == Kind.NUMBER
    assert FIELDS["prefail_tripped"] == Kind.BOOL
    assert FIELDS["bus"] == Kind.TEXT
    assert "taken_at" not in FIELDS and "source_file" not in FIELDS


@pytest.mark.parametrize(
    "text, column, words",
    [
        ("pending_sector > 0", 1, "unknown field 'pending_sector' (did you mean 'pending_sectors'?)"),
        ("pending_sectors = 0", 17, "write '=='"),
        ("pending_sectors > 0 && prefail_tripped", 21, "write 'and', 'or', 'not'"),
        ("growth(pending_sectors, 7d) > 0", 26, "a number takes no unit"),
        ("(pending_sectors > 0", 21, "expected ')'"),
        ("pending_sectors >", 18, "expression ends too early"),
        ("pending_sectors > 0 0", 21, "after a complete expression"),
        ("1 < pending_sectors < 9", 21, "cannot be chained"),
        ("bus == 'nvme", 8, "string is not closed"),
        ("", 1, "empty expression"),
        ("pending_sectors # 3", 17, "unexpected character '#'"),
    ],
)
def test_syntax_errors_point_at_the_column(text, column, words):
    error = error_of(text)
    assert error.column == column
    assert words in error.message


@pytest.mark.parametrize(
    "text, column, words",
    [
        ("pending_sectors and prefail_tripped", 1, "'and' joins true/false conditions"),
        ("not pending_sectors", 1, "'not' needs a boolean operand"),
        ("bus > 3", 1, "'>' needs numbers"),
        ("bus == 3", 5, "cannot compare a text with a number"),
        ("average(pending_sectors, 7) > 1", 1, "unknown function 'average'"),
        ("growth(pending_sectors) > 1", 1, "growth() takes 2 argument(s): growth(field, days)"),
        ("growth(7, pending_sectors) > 1", 8, "takes a field name first"),
        ("growth(bus, 7) > 1", 8, "needs a numeric field; 'bus' is a text"),
        ("growth(pending_sectors, 0) > 1", 25, "days must be more than 0"),
        ("growth(pending_sectors, 400) > 1", 25, "at most 366"),
        ("consecutive_increases(crc_errors, 2.5)", 35, "count must be a whole number"),
        ("bit(nvme_critical_warning, 63)", 28, "bit position"),
        ("growth > 1", 1, "'growth' is a function"),
        ("pending_sectors(7) > 1", 1, "'pending_sectors' is a field, not a function"),
    ],
)
def test_type_errors_point_at_the_offending_part(text, column, words):
    error = error_of(text)
    assert words in error.message
    assert error.column == column


def test_error_text_names_the_column():
    assert str(error_of("pending_sector > 0")).endswith("(column 1)")


def test_a_condition_must_be_true_or_false():
    with pytest.raises(ExprError) as caught:
        compile_expression("pending_sectors + 1", expect=Kind.BOOL)
    assert "must be a boolean, but it is a number" in caught.value.message
    assert caught.value.column == 1
