"""The layout file: where a form's marks and fields are, in millimetres (DEVELOPERS.md, "Layout file").

Coordinates are millimetres from the page's top-left corner, ``x`` to the right and ``y`` down, so
one layout serves scans at any dpi. ``parse_layout`` checks everything it can and raises a one-line
``LayoutError("<file>: field 'x': <problem>")``; the reading stage can then trust a ``Layout``.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
import re
from dataclasses import dataclass
from dataclasses import field as dc_field
from pathlib import Path
from typing import NoReturn

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from ..errors import LayoutError
from .rules import CompiledRules, compile_rules
from .thresholds import AUDIT_RANGE, TARGET_RANGE, THRESHOLD_RANGE, is_audit_rate, is_target, is_threshold

__all__ = ["Mark", "Region", "FieldSpec", "Layout", "load_layout", "parse_layout", "read_layout_text",
           "KINDS", "BINARIZE_METHODS", "NAME_PATTERN", "FINGERPRINT_PATTERN"]

KINDS = ("boxed", "open")
MAX_DIGITS = 64
"""Most cells or digits one field may hold (identity numbers run to about 20; 64 leaves room)."""
MAX_TEXT = 200
"""Longest name, form name or relation a layout may hold."""
MAX_LAYOUT_CHARS = 1_000_000
MAX_FIELDS = 500
BINARIZE_METHODS = ("auto", "otsu", "sauvola")
NAME_PATTERN = re.compile(r"[a-z_][a-z0-9_]*\Z")
FINGERPRINT_PATTERN = re.compile(r"([1-9][0-9]?)x([1-9][0-9]{0,2}):([0-9a-f]*)\Z")
"""``[form.header] fingerprint``: ROWSxCOLS, then one hex digit per grid cell, row by row
(formread/imaging/fingerprint.py makes and compares them)."""


@dataclass(frozen=True)
class Mark:
    """A solid square registration mark: centre (x, y) and side, all in mm."""
    x: float
    y: float
    size: float


@dataclass(frozen=True)
class Region:
    """A rectangle in mm: top-left corner (x, y), width w, height h."""
    x: float
    y: float
    w: float
    h: float

    def corners(self) -> tuple[tuple[float, float], ...]:
        """The four corners (x, y) in mm: top-left, top-right, bottom-right, bottom-left."""
        return ((self.x, self.y), (self.x + self.w, self.y),
                (self.x + self.w, self.y + self.h), (self.x, self.y + self.h))


@dataclass(frozen=True)
class FieldSpec:
    """One numeric field. ``boxed``: ``cells`` printed cells, one digit each (``max_digits == cells``);
    ``open``: up to ``max_digits`` digits written freely (``cells is None``)."""
    name: str
    kind: str
    x: float
    y: float
    w: float
    h: float
    cells: int | None
    max_digits: int
    optional: bool = False
    rules: dict = dc_field(default_factory=dict, hash=False)
    threshold: float | None = None
    target_error: float | None = None

    @property
    def region(self) -> Region:
        return Region(self.x, self.y, self.w, self.h)

    def cell_regions(self) -> list[Region]:
        """The printed cells of a boxed field (equal widths across ``w``), left to right, in mm."""
        if self.cells is None:
            return []
        cw = self.w / self.cells
        return [Region(self.x + i * cw, self.y, cw, self.h) for i in range(self.cells)]


@dataclass(frozen=True)
class Layout:
    """A form's layout: page size, marks, fields, cross-field relations (all lengths in mm)."""
    name: str
    width_mm: float
    height_mm: float
    marks: tuple[Mark, ...]
    fields: tuple[FieldSpec, ...]
    relations: tuple[str, ...] = ()
    header: Region | None = None
    binarize: str = "auto"
    threshold: float | None = None
    target_error: float | None = None
    audit: float | None = None
    source: str = "<layout>"
    rules: CompiledRules | None = dc_field(default=None, compare=False, repr=False)
    """The fields' rules and the relations, compiled and checked when the layout was parsed."""
    header_fingerprint: str | None = None

    def field(self, name: str) -> FieldSpec:
        """The field called ``name``; ``LayoutError`` if there is none."""
        for f in self.fields:
            if f.name == name:
                return f
        raise LayoutError(f"{self.source}: no field named {name!r}")

    @property
    def field_names(self) -> list[str]:
        return [f.name for f in self.fields]

    def structure(self) -> tuple:
        """What a ledger's readings depend on: page, marks, fields (their geometry and rules) and
        relations; not the decision settings (threshold, target error, spot checks) nor comments."""
        return (self.name, self.width_mm, self.height_mm, self.marks,
                tuple((f.name, f.kind, f.x, f.y, f.w, f.h, f.cells, f.max_digits, f.optional,
                       tuple(sorted((k, repr(v)) for k, v in f.rules.items()))) for f in self.fields),
                self.relations, self.header, self.binarize)

    def capacity(self, name: str) -> int:
        """Most digits field ``name`` may hold: its cells (boxed) or max_digits (open), narrowed by
        its length rule.  What review lets a clerk type, recorded with every field read."""
        n = self.field(name).max_digits
        rules = self.rules.fields.get(name) if self.rules is not None else None
        if rules is not None and rules.length is not None:
            n = min(n, rules.length[1])
        return int(n)

    def to_toml(self) -> str:
        """This layout as TOML text in the format ``parse_layout`` reads (round-trips exactly)."""
        out = ["[form]", f"name = {_toml_value(self.name)}",
               f"width_mm = {_toml_value(float(self.width_mm))}",
               f"height_mm = {_toml_value(float(self.height_mm))}",
               f"binarize = {_toml_value(self.binarize)}"]
        if self.threshold is not None:
            out.append(f"threshold = {_toml_value(float(self.threshold))}")
        if self.target_error is not None:
            out.append(f"target_error = {_toml_value(float(self.target_error))}")
        if self.audit is not None:
            out.append(f"audit = {_toml_value(float(self.audit))}")
        if self.header is not None:
            out += ["", "[form.header]"] + [f"{k} = {_toml_value(float(getattr(self.header, k)))}"
                                            for k in ("x", "y", "w", "h")]
            if self.header_fingerprint is not None:
                out.append(f"fingerprint = {_toml_value(self.header_fingerprint)}")
        for m in self.marks:
            out += ["", "[[marks]]"] + [f"{k} = {_toml_value(float(getattr(m, k)))}"
                                        for k in ("x", "y", "size")]
        for f in self.fields:
            out += ["", "[[fields]]", f"name = {_toml_value(f.name)}", f"kind = {_toml_value(f.kind)}"]
            out += [f"{k} = {_toml_value(float(getattr(f, k)))}" for k in ("x", "y", "w", "h")]
            out.append(f"cells = {f.cells}" if f.kind == "boxed" else f"max_digits = {f.max_digits}")
            out.append(f"optional = {_toml_value(f.optional)}")
            if f.threshold is not None:
                out.append(f"threshold = {_toml_value(float(f.threshold))}")
            if f.target_error is not None:
                out.append(f"target_error = {_toml_value(float(f.target_error))}")
            if f.rules:
                out += ["[fields.rules]"] + [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in f.rules.items()]
        for r in self.relations:
            out += ["", "[[relations]]", f"rule = {_toml_value(r)}"]
        return "\n".join(out) + "\n"


def _toml_key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else _toml_value(k)


def _toml_value(v) -> str:
    """One TOML value: str, bool, int, float, list or dict of those."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):  # a JSON string is a valid TOML basic string, once DEL is escaped too
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


# ----------------------------------------------------------------------------------------- parsing

def read_layout_text(path) -> str:
    """The text of a layout file (UTF-8; a leading byte-order mark is dropped).

    Raises ``LayoutError("<file>: <problem>")`` when it cannot be read.
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise LayoutError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise LayoutError(f"{path}: is a directory, not a layout file") from None
    except UnicodeDecodeError as e:
        raise LayoutError(f"{path}: not UTF-8 text (byte {e.start})") from None
    except OSError as e:
        raise LayoutError(f"{path}: cannot be read ({e.strerror or e})") from None
    return text.removeprefix("\ufeff")      # a byte-order mark some editors write: harmless


def load_layout(path) -> Layout:
    """Read and check a layout file (TOML, UTF-8). Raises ``LayoutError("<file>: <problem>")``."""
    return parse_layout(read_layout_text(path), str(path))


def parse_layout(text: str, source: str = "<layout>") -> Layout:
    """Parse and check layout TOML ``text``; ``source`` names it in error messages."""
    if len(text) > MAX_LAYOUT_CHARS:
        raise LayoutError(f"{source}: {len(text):,} characters is not a layout file (at most {MAX_LAYOUT_CHARS:,})")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise LayoutError(f"{source}: TOML syntax error: {str(e).splitlines()[0]}") from None
    except RecursionError:
        raise LayoutError(f"{source}: TOML nested too deeply to be a layout") from None
    return _Checker(source).layout(doc)


class _Checker:
    """Builds a Layout from a parsed TOML document, one clear message per problem."""

    def __init__(self, source: str):
        self.source = source
        self.marks_seen: tuple[Mark, ...] = ()

    def fail(self, where: str, problem: str) -> NoReturn:
        raise LayoutError(f"{self.source}: {where}: {problem}")

    def table(self, doc: dict, key: str, where: str, *, required: bool = True) -> dict | None:
        if key not in doc:
            if required:
                self.fail(where, f"missing [{key}] table")
            return None
        if not isinstance(doc[key], dict):
            self.fail(where, f"{key!r} must be a table; got {_tname(doc[key])}")
        return doc[key]

    def unknown(self, d: dict, allowed: set, where: str):
        extra = sorted(set(d) - allowed)
        if extra:
            self.fail(where, f"unknown key {extra[0]!r} (allowed: {', '.join(sorted(allowed))})")

    def number(self, d: dict, key: str, where: str, *, required: bool = True, positive: bool = False,
               nonneg: bool = False, default=None):
        if key not in d:
            if required:
                self.fail(where, f"missing key {key!r}")
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            self.fail(where, f"{key!r} must be a number; got {_tname(v)} {_short(v)}")
        if isinstance(v, int) and abs(v) > 10 ** 9:
            self.fail(where, f"{key!r} is not a plausible size in mm; got {_short(v)}")
        v = float(v)
        if not math.isfinite(v):
            self.fail(where, f"{key!r} must be finite; got {v!r}")
        if positive and v <= 0:
            self.fail(where, f"{key!r} must be > 0; got {v:g}")
        if nonneg and v < 0:
            self.fail(where, f"{key!r} must be >= 0; got {v:g}")
        return v

    def integer(self, d: dict, key: str, where: str, *, minimum: int, maximum: int = MAX_DIGITS):
        if key not in d:
            self.fail(where, f"missing key {key!r}")
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, int):
            self.fail(where, f"{key!r} must be a whole number; got {_tname(v)} {_short(v)}")
        if not minimum <= v <= maximum:
            self.fail(where, f"{key!r} must be a whole number from {minimum} to {maximum}; got {_short(v)}")
        return v

    def string(self, d: dict, key: str, where: str, *, required: bool = True, default=None,
               max_len: int = MAX_TEXT):
        if key not in d:
            if required:
                self.fail(where, f"missing key {key!r}")
            return default
        if not isinstance(d[key], str):
            self.fail(where, f"{key!r} must be a string; got {_tname(d[key])} {_short(d[key])}")
        if len(d[key]) > max_len:
            self.fail(where, f"{key!r} is {len(d[key])} characters long; at most {max_len}")
        return d[key]

    def threshold(self, d: dict, where: str):
        t = self.number(d, "threshold", where, required=False)
        if t is not None and not is_threshold(t):
            self.fail(where, f"'threshold' must be {THRESHOLD_RANGE}; got {t:g}")
        return t

    def target(self, d: dict, where: str):
        t = self.number(d, "target_error", where, required=False)
        if t is not None and not is_target(t):
            self.fail(where, f"'target_error' must be {TARGET_RANGE}; got {t:g}")
        return t

    def on_page(self, r: Region, where: str, W: float, H: float):
        if r.x < 0 or r.y < 0 or r.x + r.w > W + 1e-9 or r.y + r.h > H + 1e-9:
            self.fail(where, f"rectangle x={r.x:g} y={r.y:g} w={r.w:g} h={r.h:g} lies off the "
                             f"{W:g} x {H:g} mm page")

    def region(self, d: dict, where: str, W: float, H: float) -> Region:
        self.unknown(d, {"x", "y", "w", "h"}, where)
        r = Region(self.number(d, "x", where), self.number(d, "y", where),
                   self.number(d, "w", where, positive=True), self.number(d, "h", where, positive=True))
        self.on_page(r, where, W, H)
        return r

    def layout(self, doc: dict) -> Layout:
        self.unknown(doc, {"form", "marks", "fields", "relations"}, "layout")
        form = self.table(doc, "form", "layout")
        assert form is not None  # a required table: table() raised otherwise
        self.unknown(form, {"name", "width_mm", "height_mm", "binarize", "threshold", "target_error", "audit",
                            "header"}, "[form]")
        name = self.string(form, "name", "[form]")
        W = self.number(form, "width_mm", "[form]", positive=True)
        H = self.number(form, "height_mm", "[form]", positive=True)
        method = self.string(form, "binarize", "[form]", required=False, default="auto")
        if method not in BINARIZE_METHODS:
            self.fail("[form]", f"'binarize' must be one of {', '.join(BINARIZE_METHODS)}; got {method!r}")
        threshold = self.threshold(form, "[form]")
        target = self.target(form, "[form]")
        audit = self.number(form, "audit", "[form]", required=False)
        if audit is not None and not is_audit_rate(audit):
            self.fail("[form]", f"'audit' must be {AUDIT_RANGE}; got {audit:g}")
        header_table = self.table(form, "header", "[form]", required=False)
        header: Region | None = None
        fingerprint = None
        if header_table is not None:
            self.unknown(header_table, {"x", "y", "w", "h", "fingerprint"}, "[form.header]")
            fingerprint = self.fingerprint(header_table)
            header = self.region({k: v for k, v in header_table.items() if k != "fingerprint"}, "[form.header]",
                                 W, H)
        marks = self.marks(doc.get("marks"), W, H)
        self.marks_seen = marks
        fields = self.fields(doc.get("fields"), W, H)
        relations = self.relations(doc.get("relations"))
        if not fields:
            self.fail("layout", "no [[fields]]: a layout must describe at least one field to read")
        layout = Layout(name=name, width_mm=W, height_mm=H, marks=marks, fields=fields,
                        relations=relations, header=header, binarize=method, threshold=threshold,
                        target_error=target, audit=audit, source=self.source,
                        header_fingerprint=fingerprint)
        return dataclasses.replace(layout, rules=compile_rules(layout))
    def fingerprint(self, header: dict) -> str | None:
        fp = self.string(header, "fingerprint", "[form.header]", required=False, max_len=20_000)
        if fp is None:
            return None
        m = FINGERPRINT_PATTERN.match(fp)
        if m is None:
            self.fail("[form.header]", f"'fingerprint' must be ROWSxCOLS:HEX (as `formread layout fingerprint` "
                                       f"writes it); got {fp[:24]!r}{'...' if len(fp) > 24 else ''}")
        need = int(m.group(1)) * int(m.group(2))
        if len(m.group(3)) != need:
            self.fail("[form.header]", f"'fingerprint' has {len(m.group(3))} cells; {m.group(1)}x{m.group(2)} "
                                       f"needs {need}")
        return fp

    def array(self, v, key: str) -> list[dict]:
        if v is None:
            return []
        if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
            self.fail("layout", f"{key!r} must be an array of tables ([[{key}]])")
        if len(v) > MAX_FIELDS:
            self.fail("layout", f"{len(v)} [[{key}]] tables; a layout holds at most {MAX_FIELDS}")
        return v

    def marks(self, v, W: float, H: float) -> tuple[Mark, ...]:
        out = []
        for i, d in enumerate(self.array(v, "marks"), 1):
            where = f"mark {i}"
            self.unknown(d, {"x", "y", "size"}, where)
            m = Mark(self.number(d, "x", where), self.number(d, "y", where),
                     self.number(d, "size", where, positive=True))
            self.on_page(Region(m.x - m.size / 2, m.y - m.size / 2, m.size, m.size), where, W, H)
            out.append(m)
        if len(out) < 3:
            self.fail("marks", f"at least 3 registration marks are needed; got {len(out)}")
        for i, m in enumerate(out, 1):
            for j, n in enumerate(out[:i - 1], 1):
                if _overlap(_mark_region(m), _mark_region(n)):
                    self.fail(f"mark {i}", f"overlaps mark {j}")
        # Three marks on one line cannot fix an affine transform: ask for a spread-out triangle.
        pts = [(m.x, m.y) for m in out]
        area = max(abs((b[0] - a[0]) * (c[1] - a[1]) - (c[0] - a[0]) * (b[1] - a[1])) / 2
                   for a, b, c in itertools.combinations(pts, 3))
        if area < 0.05 * W * H:
            self.fail("marks", "the marks lie (nearly) on one line; put them in three or four corners of the page")
        return tuple(out)

    def fields(self, v, W: float, H: float) -> tuple[FieldSpec, ...]:
        out: list[FieldSpec] = []
        allowed = {"name", "kind", "x", "y", "w", "h", "cells", "max_digits", "optional", "threshold",
                   "target_error", "rules"}
        for i, d in enumerate(self.array(v, "fields"), 1):
            if "name" not in d:
                self.fail(f"field {i}", "missing key 'name'")
            name = self.string(d, "name", f"field {i}")
            where = f"field {name!r}"
            if not NAME_PATTERN.match(name):
                self.fail(where, "bad name: use lower-case letters, digits and '_', not starting with a digit")
            if any(f.name == name for f in out):
                self.fail(where, "duplicate field name")
            self.unknown(d, allowed, where)
            kind = self.string(d, "kind", where)
            if kind not in KINDS:
                self.fail(where, f"unknown kind {kind!r} (use 'boxed' or 'open')")
            x, y = self.number(d, "x", where), self.number(d, "y", where)
            w, h = self.number(d, "w", where, positive=True), self.number(d, "h", where, positive=True)
            self.on_page(Region(x, y, w, h), where, W, H)
            if kind == "boxed":
                if "max_digits" in d:
                    self.fail(where, "a boxed field takes 'cells', not 'max_digits'")
                cells = self.integer(d, "cells", where, minimum=1)
                max_digits = cells
            else:
                if "cells" in d:
                    self.fail(where, "an open field takes 'max_digits', not 'cells'")
                cells, max_digits = None, self.integer(d, "max_digits", where, minimum=1)
            optional = d.get("optional", False)
            if not isinstance(optional, bool):
                self.fail(where, f"'optional' must be true or false; got {optional!r}")
            rules = d.get("rules", {})
            if not isinstance(rules, dict):
                self.fail(where, f"'rules' must be a table ([fields.rules]); got {_tname(rules)}")
            f = FieldSpec(name=name, kind=kind, x=x, y=y, w=w, h=h, cells=cells, max_digits=max_digits,
                          optional=optional, rules=dict(rules), threshold=self.threshold(d, where),
                          target_error=self.target(d, where))
            for g in out:
                if _overlap(f.region, g.region):
                    self.fail(where, f"overlaps field {g.name!r}")
            for j, m in enumerate(self.marks_seen, 1):
                if _overlap(f.region, _mark_region(m)):
                    self.fail(where, f"covers registration mark {j}")
            out.append(f)
        return tuple(out)

    def relations(self, v) -> tuple[str, ...]:
        out = []
        for i, d in enumerate(self.array(v, "relations"), 1):
            self.unknown(d, {"rule"}, f"relation {i}")
            rule = self.string(d, "rule", f"relation {i}")
            if not rule.strip():
                self.fail(f"relation {i}", "'rule' is empty")
            out.append(rule)
        return tuple(out)


def _mark_region(m: Mark) -> Region:
    return Region(m.x - m.size / 2, m.y - m.size / 2, m.size, m.size)


def _overlap(a: Region, b: Region) -> bool:
    """True when two rectangles share a positive area (touching edges do not overlap)."""
    eps = 1e-9
    return (min(a.x + a.w, b.x + b.w) - max(a.x, b.x) > eps
            and min(a.y + a.h, b.y + b.h) - max(a.y, b.y) > eps)


def _short(v) -> str:
    """A value for a message: its repr, cut to 40 characters (a 400-digit number is not worth printing)."""
    r = repr(v)
    return r if len(r) <= 40 else r[:37] + "..."


def _tname(v) -> str:
    return {bool: "boolean", int: "integer", float: "float", str: "string", list: "array",
            dict: "table"}.get(type(v), type(v).__name__)
