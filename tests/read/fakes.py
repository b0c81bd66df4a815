"""Real layouts for the pure reading-logic tests, built from a few field descriptions.

The rules and the decoder read real ``formread.form.layout.Layout`` objects (rules compiled when
the layout is parsed), so the tests build them the same way: a TOML text made from the fields,
with marks in the corners and the fields stacked down the page, parsed by ``parse_layout``.
"""

from __future__ import annotations

import json

from formread.form.layout import Layout, parse_layout
from formread.form.thresholds import resolve_thresholds


def field_spec(name: str, kind: str = "boxed", cells: int | None = 8, max_digits: int | None = None,
               optional: bool = False, rules: dict | None = None, threshold: float | None = None) -> dict:
    """One field as the layout file describes it (geometry is filled in by :func:`layout_of`)."""
    return {"name": name, "kind": kind, "cells": cells, "max_digits": max_digits, "optional": optional,
            "rules": dict(rules or {}), "threshold": threshold}


def _value(v) -> str:
    return json.dumps(v)


def layout_of(fields: list[dict], relations=(), threshold: float | None = 0.9,
              source: str = "cards/meter.toml") -> Layout:
    """A real Layout holding ``fields`` (from :func:`field_spec`) and ``relations``."""
    lines = ["[form]", 'name = "test card"', "width_mm = 210.0", "height_mm = 297.0"]
    if threshold is not None:
        lines.append(f"threshold = {threshold!r}")
    for x, y in ((10, 10), (200, 10), (10, 287), (200, 287)):
        lines += ["[[marks]]", f"x = {x}", f"y = {y}", "size = 6"]
    for i, f in enumerate(fields):
        kind = f["kind"]
        lines += ["[[fields]]", f"name = {_value(f['name'])}", f"kind = {_value(kind)}",
                  "x = 30", f"y = {20 + 12 * i}", "w = 120", "h = 10"]
        if kind == "boxed":
            lines.append(f"cells = {f['cells'] or 8}")
        else:
            lines.append(f"max_digits = {f['max_digits'] or f['cells'] or 8}")
        lines.append(f"optional = {'true' if f['optional'] else 'false'}")
        if f["threshold"] is not None:
            lines.append(f"threshold = {f['threshold']!r}")
        if f["rules"]:
            lines.append("[fields.rules]")
            lines += [f"{k} = {_value(v)}" for k, v in f["rules"].items()]
    for r in relations:
        lines += ["[[relations]]", f"rule = {_value(r)}"]
    return parse_layout("\n".join(lines) + "\n", source)


def thresholds_of(layout: Layout, threshold: float | None = None) -> dict:
    """Every field's threshold by the one policy (``threshold`` given explicitly wins)."""
    return resolve_thresholds(layout, explicit=threshold)
