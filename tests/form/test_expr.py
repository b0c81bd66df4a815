"""The relation language: parsing, evaluation, and refusal of hostile text."""

import pytest

from formread.errors import RuleError
from formread.form.expr import parse_relation


def test_litres_relation():
    r = parse_relation("litres_used = current_reading - previous_reading")
    assert r.fields == ("litres_used", "current_reading", "previous_reading")
    assert r.holds({"litres_used": 20, "current_reading": 120, "previous_reading": 100})
    assert not r.holds({"litres_used": 26, "current_reading": 120, "previous_reading": 100})


@pytest.mark.parametrize("text,values,expected", [
    ("a + b = c", {"a": 1, "b": 2, "c": 3}, True),
    ("a - (b - c) = 5", {"a": 10, "b": 7, "c": 2}, True),   # parentheses change the result
    ("a - b - c = 1", {"a": 10, "b": 7, "c": 2}, True),     # left associative
    ("a<=b", {"a": 3, "b": 3}, True),
    ("a >= b + 1", {"a": 3, "b": 3}, False),
    ("a < b", {"a": 2, "b": 3}, True),
    ("a > 100", {"a": 3}, False),
    ("a != b", {"a": 2, "b": 2}, False),
    ("a == 0", {"a": 0}, True),
    ("a - a = 0", {"a": 999999999999999999}, True),
])
def test_evaluation(text, values, expected):
    assert parse_relation(text).holds(values) is expected


def test_fields_are_unique_in_order():
    assert parse_relation("b + a = a + c").fields == ("b", "a", "c")


@pytest.mark.parametrize("text,fragment", [
    ("", "empty"),
    ("   ", "empty"),
    ("__import__('os')", "column 12"),
    ("a.b = 1", "column 2"),
    ("a = b; import os", "column 6"),
    ("a = 1 2", "column 7"),
    ("a = b c", "column 7"),
    ("a +", "column 4"),
    ("a = (b + 1", "column 11"),
    ("a b", "column 3"),
    ("1 = 1", "no field"),
    ("a = -1", "column 5"),
    ("a = 2 ** 8", "column 7"),
    ("a = 1234567890123456789", "longer than 18"),
    ("A = b", "column 1"),
    ("a = b\x00", "column 6"),
    ("a = " + "(" * 40 + "b" + ")" * 40, "deeper"),
    ("a = " + "b + " * 200 + "b", "longer than"),
    ("lambda: 1", "column 7"),
])
def test_hostile_or_broken_text_is_refused_with_position(text, fragment):
    with pytest.raises(RuleError) as e:
        parse_relation(text)
    assert fragment in str(e.value)
    assert "\n" not in str(e.value)


def test_non_text_is_refused():
    with pytest.raises(RuleError):
        parse_relation(42)
