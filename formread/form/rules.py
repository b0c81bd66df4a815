"""Field rules from a layout: compiled and checked once, then evaluated per reading.

A layout field may carry ``[fields.rules]`` (DEVELOPERS.md):

- ``length = 8`` or ``length = [7, 8]``: allowed digit count;
- ``range = [lo, hi]``: allowed integer value (leading zeros allowed);
- ``date = "DDMMYYYY"``: a real Gregorian calendar date in one of the patterns
  ``DDMMYYYY``, ``MMDDYYYY``, ``YYYYMMDD``, ``DDMMYY``, ``YYMMDD`` (``YY`` means
  20YY, so ``00`` is the leap year 2000);
- ``years = [2025, 2027]`` (only with ``date``): the date's year must lie in this
  window, both ends included.  A plausible window (e.g. the current season) turns
  a confidently misread year digit ("2726" for "2026") from an accepted real date
  into a rule failure, and lets the reader prefer an alternative inside the window;
- ``check = "luhn"``: a check digit, one of :data:`CHECKS`;
- ``optional = true``: empty allowed (same as the field's own ``optional``).

:func:`compile_rules` validates everything up front (unknown rule names, bad
arguments, relations that do not parse or name an unknown field) so that a batch
never fails half-way on a bad layout.  Errors are :class:`RuleError` with one line:
``"<layout file>: field 'x': <problem>"`` or ``"<layout file>: relation '<text>': <problem>"``.

Results of a check are ``dict[rule name, bool]`` with rule names ``length``,
``range``, ``date``, ``years`` and the check scheme's own name (``luhn``, ``mod11-2``, ...).
An empty value is checked only for presence: ``{}`` when the field is optional,
``{"required": False}`` when it is not.
"""

from __future__ import annotations

import calendar
from dataclasses import dataclass, field

from ..errors import RuleError
from .checkdigits import SCHEMES
from .expr import Relation, parse_relation

__all__ = ["FieldRules", "CompiledRules", "compile_rules", "check_field", "check_value", "check_relations",
           "CHECKS", "DATE_PATTERNS", "RULE_NAMES"]

CHECKS = tuple(SCHEMES)
"""Check-digit schemes a layout may name."""
DATE_PATTERNS = ("DDMMYYYY", "MMDDYYYY", "YYYYMMDD", "DDMMYY", "YYMMDD")
RULE_NAMES = ("length", "range", "date", "years", "check", "optional")


@dataclass(frozen=True)
class FieldRules:
    """One field's compiled rules (None = rule not set)."""

    name: str
    kind: str
    optional: bool
    length: tuple[int, int] | None = None
    range: tuple[int, int] | None = None
    date: str | None = None
    years: tuple[int, int] | None = None
    check: str | None = None


@dataclass(frozen=True)
class CompiledRules:
    """All rules of a layout: per field, and the relations between fields."""

    source: str
    fields: dict[str, FieldRules]
    relations: tuple[Relation, ...] = ()
    _by_field: dict[str, tuple[Relation, ...]] = field(default_factory=dict, repr=False)

    def relations_of(self, name: str) -> tuple[Relation, ...]:
        """Relations that use field ``name`` (empty tuple if none)."""
        return self._by_field.get(name, ())


def _is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _compile_field(src: str, f) -> FieldRules:
    name = f.name
    rules = dict(f.rules)

    def bad(problem: str) -> RuleError:
        return RuleError(f"{src}: field {name!r}: {problem}")

    unknown = sorted(set(rules) - set(RULE_NAMES))
    if unknown:
        raise bad(f"unknown rule {unknown[0]!r} (known: {', '.join(RULE_NAMES)})")
    length = rng = date = years = check = None
    if "length" in rules:
        v = rules["length"]
        if _is_int(v):
            v = [v, v]
        if not (isinstance(v, (list, tuple)) and len(v) == 2 and all(_is_int(x) for x in v)
                and 1 <= v[0] <= v[1]):
            raise bad(f"rule 'length' must be a positive integer or [min, max] with 1 <= min <= max; "
                      f"got {rules['length']!r}")
        length = (int(v[0]), int(v[1]))
        room = f.max_digits
        if room is not None and length[0] > room:
            raise bad(f"rule 'length' asks for at least {length[0]} digits but the field holds {room}")
    if "range" in rules:
        v = rules["range"]
        if not (isinstance(v, (list, tuple)) and len(v) == 2 and all(_is_int(x) for x in v)
                and v[0] <= v[1]):
            raise bad(f"rule 'range' must be [lo, hi] integers with lo <= hi; got {v!r}")
        rng = (int(v[0]), int(v[1]))
    if "date" in rules:
        date = rules["date"]
        if date not in DATE_PATTERNS:
            raise bad(f"rule 'date' must be one of {', '.join(DATE_PATTERNS)}; got {date!r}")
        if length is not None and not length[0] <= len(date) <= length[1]:
            raise bad(f"rule 'length' {list(length)} cannot hold a {date} date")
    if "years" in rules:
        v = rules["years"]
        if date is None:
            raise bad("rule 'years' needs a 'date' rule (it bounds the date's year)")
        if not (isinstance(v, (list, tuple)) and len(v) == 2 and all(_is_int(x) for x in v)
                and 1 <= v[0] <= v[1]):
            raise bad(f"rule 'years' must be [first, last] years with 1 <= first <= last; got {v!r}")
        if "YYYY" not in date and (v[1] < 2000 or v[0] > 2099):
            raise bad(f"rule 'years' {list(v)} holds no year of a {date} date (YY means 2000-2099)")
        years = (int(v[0]), int(v[1]))
    if "check" in rules:
        check = rules["check"]
        if check not in SCHEMES:
            raise bad(f"rule 'check' must be one of {', '.join(CHECKS)}; got {check!r}")
    optional = bool(f.optional)
    if "optional" in rules:
        if not isinstance(rules["optional"], bool):
            raise bad(f"rule 'optional' must be true or false; got {rules['optional']!r}")
        optional = optional or rules["optional"]
    return FieldRules(name=name, kind=f.kind, optional=optional, length=length,
                      range=rng, date=date, years=years, check=check)


def compile_rules(layout) -> CompiledRules:
    """Compile and validate every rule and relation of ``layout``.

    Parameters
    ----------
    layout : formread.form.layout.Layout
        Uses ``layout.source`` (file name for messages), ``layout.fields``
        (FieldSpec: name, kind, max_digits, optional, rules) and ``layout.relations``
        (rule strings).  The layout parser calls this once; everyone else uses ``layout.rules``.

    Raises
    ------
    RuleError
        One line naming the layout file and the field or relation.
    """
    src = str(layout.source or "layout")
    fields: dict[str, FieldRules] = {}
    for f in layout.fields:
        fields[f.name] = _compile_field(src, f)
    relations = []
    by_field: dict[str, list[Relation]] = {}
    for text in layout.relations:
        try:
            rel = parse_relation(text)
        except RuleError as e:
            raise RuleError(f"{src}: relation {text!r}: {e}") from None
        for n in rel.fields:
            if n not in fields:
                raise RuleError(f"{src}: relation {text!r}: unknown field {n!r}")
            by_field.setdefault(n, []).append(rel)
        relations.append(rel)
    return CompiledRules(source=src, fields=fields, relations=tuple(relations),
                         _by_field={k: tuple(v) for k, v in by_field.items()})


def _date_parts(value: str, pattern: str) -> tuple[int, int, int] | None:
    """(year, month, day) of ``value`` read with ``pattern``; None if not that many digits."""
    if len(value) != len(pattern) or not value.isascii() or not value.isdigit():
        return None
    part = {}
    for key in ("DD", "MM", "YYYY", "YY"):
        i = pattern.find(key)
        if i >= 0 and not (key == "YY" and "YYYY" in pattern):
            part[key] = int(value[i:i + len(key)])
    return part.get("YYYY", 2000 + part.get("YY", 0)), part["MM"], part["DD"]


def _valid_date(value: str, pattern: str) -> bool:
    parts = _date_parts(value, pattern)
    if parts is None:
        return False
    year, month, day = parts
    if year < 1 or not 1 <= month <= 12:
        return False
    # calendar.monthrange applies the Gregorian leap rule (proleptic)
    return 1 <= day <= calendar.monthrange(year, month)[1]


def check_value(rules: FieldRules, value: str) -> dict[str, bool]:
    """Evaluate one field's own rules on ``value`` (a string of digits, '' = empty).

    Returns
    -------
    dict of str to bool
        ``{}`` for an empty optional field, ``{"required": False}`` for an empty
        required one, else one entry per rule set on the field.
    """
    if value == "":
        return {} if rules.optional else {"required": False}
    out: dict[str, bool] = {}
    digits = value.isascii() and value.isdigit()
    if rules.length is not None:
        out["length"] = rules.length[0] <= len(value) <= rules.length[1]
    if rules.range is not None:
        out["range"] = digits and rules.range[0] <= int(value) <= rules.range[1]
    if rules.date is not None:
        out["date"] = _valid_date(value, rules.date)
        if rules.years is not None:
            parts = _date_parts(value, rules.date)
            out["years"] = parts is not None and rules.years[0] <= parts[0] <= rules.years[1]
    if rules.check is not None:
        out[rules.check] = SCHEMES[rules.check][1](value)
    return out


def check_field(compiled: CompiledRules, name: str, value: str) -> dict[str, bool]:
    """Evaluate field ``name``'s own rules on ``value``; see :func:`check_value`."""
    if name not in compiled.fields:
        raise RuleError(f"{compiled.source}: field {name!r}: not in the layout")
    return check_value(compiled.fields[name], value)


def check_relations(compiled: CompiledRules, values: dict[str, str | None]) -> dict[str, bool | None]:
    """Evaluate every relation on a page's field values (e.g. after a clerk's correction).

    Parameters
    ----------
    values : dict of field name to str or None
        Digit strings; '' or None = no value.

    Returns
    -------
    dict of relation text to bool or None
        None when a field of the relation has no value or is not a plain digit string
        (the relation cannot be evaluated).
    """
    out: dict[str, bool | None] = {}
    for rel in compiled.relations:
        vals = [values.get(f) for f in rel.fields]
        ints = [int(v) for v in vals if isinstance(v, str) and v and v.isascii() and v.isdigit()]
        if len(ints) == len(vals):
            out[rel.text] = rel.holds(dict(zip(rel.fields, ints)))
        else:
            out[rel.text] = None
    return out
