"""The relation language: cross-field rules such as ``litres = current - previous``.

Grammar (hand-written tokenizer and recursive-descent parser; nothing is ever
passed to ``eval``)::

    relation := sum CMP sum
    sum      := term (("+" | "-") term)*
    term     := NAME | INTEGER | "(" sum ")"
    CMP      := "=" | "==" | "<=" | ">=" | "<" | ">" | "!="
    NAME     := [a-z_][a-z0-9_]*        (a field name)
    INTEGER  := [0-9]{1,18}             (non-negative)

Whitespace is free.  Values are Python integers, so sums never overflow.  Limits
keep hostile text harmless: at most 500 characters, 18-digit numbers, 32 levels of
parentheses.  Every error is a :class:`RuleError` naming the position (1-based
column) and the problem.
"""

from __future__ import annotations

import operator
import re
from dataclasses import dataclass

from formread.errors import RuleError

__all__ = ["Relation", "parse_relation", "MAX_LENGTH"]

MAX_LENGTH = 500
_MAX_DIGITS = 18
_MAX_DEPTH = 32

_COMPARE = {
    "=": operator.eq, "==": operator.eq, "!=": operator.ne,
    "<=": operator.le, ">=": operator.ge, "<": operator.lt, ">": operator.gt,
}
_TOKEN = re.compile(r"\s*(?:(?P<num>[0-9]+)|(?P<name>[a-z_][a-z0-9_]*)|(?P<op>==|!=|<=|>=|[=<>+\-()]))")


@dataclass(frozen=True)
class _Tok:
    kind: str   # 'num' | 'name' | 'op' | 'end'
    text: str
    col: int    # 1-based column


def _tokenize(text: str) -> list[_Tok]:
    toks, pos = [], 0
    while True:
        while pos < len(text) and text[pos].isspace():
            pos += 1
        if pos >= len(text):
            toks.append(_Tok("end", "", pos + 1))
            return toks
        m = _TOKEN.match(text, pos)
        if m is None or m.end() == pos:
            raise RuleError(f"unexpected character {text[pos]!r} at column {pos + 1}")
        kind = m.lastgroup
        assert kind is not None  # every alternative of _TOKEN is a named group
        tok = _Tok(kind, m.group(kind), m.start(kind) + 1)
        if kind == "num" and len(tok.text) > _MAX_DIGITS:
            raise RuleError(f"number longer than {_MAX_DIGITS} digits at column {tok.col}")
        toks.append(tok)
        pos = m.end()


# AST nodes are tuples: ("num", int) | ("name", str) | ("+"/"-", left, right)

class _Parser:
    def __init__(self, toks: list[_Tok]):
        self.toks, self.i, self.depth = toks, 0, 0

    def peek(self) -> _Tok:
        return self.toks[self.i]

    def take(self) -> _Tok:
        t = self.toks[self.i]
        self.i += 1
        return t

    def sum(self):
        node = self.term()
        while self.peek().kind == "op" and self.peek().text in "+-":
            op = self.take().text
            node = (op, node, self.term())
        return node

    def term(self):
        t = self.take()
        if t.kind == "num":
            return ("num", int(t.text))
        if t.kind == "name":
            return ("name", t.text)
        if t.kind == "op" and t.text == "(":
            self.depth += 1
            if self.depth > _MAX_DEPTH:
                raise RuleError(f"parentheses nested deeper than {_MAX_DEPTH} at column {t.col}")
            node = self.sum()
            close = self.take()
            if close.kind == "op" and close.text == ")":
                self.depth -= 1
                return node
            raise RuleError(f"expected ')' at column {close.col}, found {_show(close)}")
        raise RuleError(f"expected a field name, a number or '(' at column {t.col}, found {_show(t)}")


def _show(t: _Tok) -> str:
    return "the end" if t.kind == "end" else repr(t.text)


def _eval(node, values: dict[str, int]) -> int:
    kind = node[0]
    if kind == "num":
        return node[1]
    if kind == "name":
        return int(values[node[1]])
    left, right = _eval(node[1], values), _eval(node[2], values)
    return left + right if kind == "+" else left - right


def _names(node, out: list[str]) -> None:
    if node[0] == "name":
        if node[1] not in out:
            out.append(node[1])
    elif node[0] in "+-":
        _names(node[1], out)
        _names(node[2], out)


@dataclass(frozen=True)
class Relation:
    """A parsed relation.

    Attributes
    ----------
    text : str
        The rule as written.
    fields : tuple of str
        Field names used, in order of first appearance.
    op : str
        The comparison ('=', '<=', ...).
    """

    text: str
    fields: tuple[str, ...]
    op: str
    left: tuple
    right: tuple

    def sides(self, values: dict[str, int]) -> tuple[int, int]:
        """Values of the left and right sides (to show a clerk why a relation fails)."""
        return _eval(self.left, values), _eval(self.right, values)

    def holds(self, values: dict[str, int]) -> bool:
        """True when the comparison holds for these integer field values.

        ``values`` must hold every name in :attr:`fields` (KeyError otherwise).
        """
        return bool(_COMPARE[self.op](*self.sides(values)))


def parse_relation(text: str) -> Relation:
    """Parse ``text`` into a :class:`Relation`; RuleError naming the column on any problem."""
    if not isinstance(text, str):
        raise RuleError(f"a relation must be text; got {type(text).__name__}")
    if not text.strip():
        raise RuleError("empty relation")
    if len(text) > MAX_LENGTH:
        raise RuleError(f"relation longer than {MAX_LENGTH} characters")
    p = _Parser(_tokenize(text))
    left = p.sum()
    t = p.take()
    if t.kind != "op" or t.text not in _COMPARE:
        raise RuleError(f"expected a comparison (=, <=, >=, <, >, !=) at column {t.col}, found {_show(t)}")
    right = p.sum()
    end = p.peek()
    if end.kind != "end":
        raise RuleError(f"unexpected {_show(end)} at column {end.col}")
    names: list[str] = []
    _names(left, names)
    _names(right, names)
    if not names:
        raise RuleError("relation names no field")
    return Relation(text=text, fields=tuple(names), op=t.text, left=left, right=right)
