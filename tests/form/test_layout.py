"""The layout file: the DEVELOPERS.md example parses, round-trips through to_toml, and every kind of
mistake gives one line naming the file and the field."""

from __future__ import annotations

import re

import pytest

from formread.errors import LayoutError
from formread.form.layout import FieldSpec, Layout, Mark, Region, load_layout, parse_layout

# The example of DEVELOPERS.md ("Layout file"), with the three more marks a real form has.
EXAMPLE = """
[form]
name = "Example card"        # free text
width_mm = 210.0             # page size
height_mm = 297.0
binarize = "auto"            # "otsu" | "sauvola" | "auto"
threshold = 0.90             # acceptance threshold for field confidence (written by `formread tune`)

[form.header]                # optional: a printed region used to tell upright from upside down
x = 30.0
y = 12.0
w = 150.0
h = 14.0

[[marks]]                    # registration squares: centre and side in mm (at least 3)
x = 12.0
y = 12.0
size = 6.0
[[marks]]
x = 198.0
y = 12.0
size = 6.0
[[marks]]
x = 12.0
y = 285.0
size = 6.0
[[marks]]
x = 198.0
y = 285.0
size = 6.0

[[fields]]
name = "member_number"       # [a-z_][a-z0-9_]*, unique
kind = "boxed"               # "boxed": `cells` printed cells, one digit each; "open": up to `max_digits`
x = 40.0                     # rectangle of the field in mm from the top-left corner
y = 60.0
w = 48.0
h = 7.0
cells = 8                    # boxed only (equal widths across w)
optional = false             # may be left empty
threshold = 0.95             # optional per-field acceptance threshold
[fields.rules]               # all optional, evaluated by formread.form.rules
length = [7, 8]              # allowed digit count (int or [min, max])
range = [1, 240]             # allowed integer value
date = "DDMMYYYY"            # a real calendar date in this pattern
check = "luhn"               # "luhn" | "mod11-2" | "mod97-10"

[[fields]]
name = "previous_reading"
kind = "open"
x = 40
y = 80
w = 60
h = 10
max_digits = 6

[[fields]]
name = "current_reading"
kind = "open"
x = 110
y = 80
w = 60
h = 10
max_digits = 6
optional = true

[[relations]]                # cross-field rules: names, integers, + and -, compared with =, <=, >=
rule = "current_reading >= previous_reading"
"""


def test_example_parses_into_the_contract_objects():
    lay = parse_layout(EXAMPLE, "card.toml")
    assert isinstance(lay, Layout) and lay.source == "card.toml"
    assert (lay.name, lay.width_mm, lay.height_mm, lay.binarize, lay.threshold) == ("Example card", 210.0, 297.0,
                                                                                    "auto", 0.90)
    assert lay.header == Region(30.0, 12.0, 150.0, 14.0)
    assert lay.marks[0] == Mark(12.0, 12.0, 6.0) and len(lay.marks) == 4
    f = lay.field("member_number")
    assert isinstance(f, FieldSpec)
    assert (f.kind, f.x, f.y, f.w, f.h, f.cells, f.max_digits, f.optional, f.threshold) == (
        "boxed", 40.0, 60.0, 48.0, 7.0, 8, 8, False, 0.95)
    assert f.rules == {"length": [7, 8], "range": [1, 240], "date": "DDMMYYYY", "check": "luhn"}
    assert [c.x for c in f.cell_regions()] == [40.0 + 6.0 * i for i in range(8)]
    o = lay.field("current_reading")
    assert (o.kind, o.cells, o.max_digits, o.optional, o.threshold, o.rules) == ("open", None, 6, True, None, {})
    assert isinstance(o.x, float)  # integers in the file become millimetre floats
    assert lay.relations == ("current_reading >= previous_reading",)
    assert [r.text for r in lay.rules.relations] == ["current_reading >= previous_reading"]
    assert lay.rules.fields["member_number"].check == "luhn"       # compiled when the layout loads
    assert lay.field_names == ["member_number", "previous_reading", "current_reading"]


def test_to_toml_round_trips_exactly(tmp_path):
    lay = parse_layout(EXAMPLE, "card.toml")
    path = tmp_path / "card.toml"
    path.write_text(lay.to_toml(), encoding="utf-8")
    again = load_layout(path)
    assert again == Layout(**{**lay.__dict__, "source": str(path)})
    # A stored threshold (what `formread tune` does) survives the round trip.
    tuned = Layout(**{**lay.__dict__, "threshold": 0.973})
    assert parse_layout(tuned.to_toml()).threshold == 0.973


def test_to_toml_quotes_awkward_text():
    lay = parse_layout(EXAMPLE.replace('name = "Example card"', 'name = "Café \\"A\\" \\\\ card"'), "x.toml")
    assert lay.name == 'Café "A" \\ card'
    assert parse_layout(lay.to_toml(), "x.toml").name == lay.name
    odd = Layout(**{**lay.__dict__, "name": "tab\there, bell\x07, del\x7f, newline\n, é"})
    assert parse_layout(odd.to_toml(), "x.toml").name == odd.name


def test_minimal_layout_defaults():
    lay = parse_layout("""
[form]
name = "m"
width_mm = 100
height_mm = 100
[[marks]]
x = 5
y = 5
size = 4
[[marks]]
x = 95
y = 5
size = 4
[[marks]]
x = 5
y = 95
size = 4
[[fields]]
name = "n"
kind = "open"
x = 20
y = 20
w = 30
h = 10
max_digits = 3
""", "m.toml")
    assert (lay.binarize, lay.threshold, lay.target_error, lay.header, lay.relations) == ("auto", None, None, None, ())


def _bad(find: str, replace: str) -> str:
    assert find in EXAMPLE
    return EXAMPLE.replace(find, replace, 1)


BAD = [
    # (text, expected message after "card.toml: ")
    ("[form\nname = 1", r"TOML syntax error: .*line 1"),
    (_bad("width_mm = 210.0 ", "#"), r"\[form\]: missing key 'width_mm'"),
    (EXAMPLE.replace("[form]", "[page]", 1).replace("[form.header]", "[page.header]"), r"layout: unknown key 'page'"),
    (_bad('name = "Example card"', "name = 7"), r"\[form\]: 'name' must be a string; got integer 7"),
    (_bad("height_mm = 297.0", 'height_mm = "297"'), r"\[form\]: 'height_mm' must be a number; got string '297'"),
    (_bad("height_mm = 297.0", "height_mm = -1"), r"\[form\]: 'height_mm' must be > 0"),
    (_bad('binarize = "auto"', 'binarize = "magic"'), r"\[form\]: 'binarize' must be one of auto, otsu, sauvola"),
    (_bad("threshold = 0.90", "threshold = 1.5"), r"\[form\]: 'threshold' must be a number in \(0, 1\]"),
    (_bad("w = 150.0", "w = 250.0"), r"\[form.header\]: rectangle .* lies off the 210 x 297 mm page"),
    (_bad("x = 40.0 ", "x = 180.0 "),
     r"field 'member_number': rectangle x=180 y=60 w=48 h=7 lies off the 210 x 297 mm page"),
    (_bad('name = "member_number"', 'name = "Member-No"'), r"field 'Member-No': bad name"),
    (_bad('name = "member_number"', 'name = "9lives"'), r"field '9lives': bad name"),
    (_bad('name = "previous_reading"', 'name = "member_number"'), r"field 'member_number': duplicate field name"),
    (_bad('kind = "boxed"', 'kind = "circled"'), r"field 'member_number': unknown kind 'circled'"),
    (_bad("cells = 8 ", "cells = 0 "), r"field 'member_number': 'cells' must be a whole number from 1 to 64; got 0"),
    (_bad("cells = 8 ", "cells = 2.5 "), r"field 'member_number': 'cells' must be a whole number; got float 2.5"),
    (_bad("cells = 8 ", "#"), r"field 'member_number': missing key 'cells'"),
    (_bad("max_digits = 6", "max_digits = 0"), r"field 'previous_reading': 'max_digits' must be a whole number from 1"),
    (_bad("max_digits = 6", "max_digits = 1000000"), r"'max_digits' must be a whole number from 1 to 64; got 1000000"),
    (_bad("cells = 8 ", f"cells = {10 ** 30} "), r"'cells' must be a whole number from 1 to 64; got 1000000000000"),
    (_bad("x = 40.0 ", f"x = {10 ** 400} "), r"'x' is not a plausible size in mm; got 1000000000"),
    (_bad('name = "member_number"', 'name = "' + "m" * 20000 + '"'), r"is 20000 characters long; at most 200"),
    ("x = " + "[" * 5000 + "]" * 5000 + "\n" + EXAMPLE, r"TOML nested too deeply|TOML syntax error"),
    (_bad("max_digits = 6", "cells = 6"), r"field 'previous_reading': an open field takes 'max_digits', not 'cells'"),
    (_bad("optional = false ", 'optional = "no" '), r"field 'member_number': 'optional' must be true or false"),
    (_bad("optional = false ", "colour = 3 "), r"field 'member_number': unknown key 'colour'"),
    (_bad("threshold = 0.95 ", "threshold = 0 "), r"field 'member_number': 'threshold' must be a number in \(0, 1\]"),
    (_bad("threshold = 0.95 ", "target_error = 0.5 "),
     r"field 'member_number': 'target_error' must be a number in \(0, 0.5\)"),
    (_bad("threshold = 0.90", "target_error = -0.01"), r"\[form\]: 'target_error' must be a number in \(0, 0.5\)"),
    (_bad('rule = "current_reading >= previous_reading"', 'rule = "litres_used = current_reading"'),
     r"relation 'litres_used = current_reading': unknown field 'litres_used'"),
    (EXAMPLE.split("[[fields]]")[0], r"layout: no \[\[fields\]\]"),
    (_bad("x = 110", "x = 90"), r"field 'current_reading': overlaps field 'previous_reading'"),
    (_bad("y = 60.0", "y = 55.0").replace("y = 80\n", "y = 58\n", 1),
     r"field 'previous_reading': overlaps field 'member_number'"),
    (_bad("h = 7.0", 'h = true'), r"field 'member_number': 'h' must be a number; got boolean True"),
    (_bad('[[fields]]\nname = "previous_reading"', '[[fields]]\nnom = "previous_reading"'),
     r"field 2: missing key 'name'"),
    (EXAMPLE.split("[[marks]]", 1)[0]
     + "[[marks]]\nx = 12.0\ny = 12.0\nsize = 6.0\n[[marks]]\nx = 198.0\ny = 12.0\nsize = 6.0\n",
     r"marks: at least 3 registration marks are needed; got 2"),
    (_bad("size = 6.0\n[[marks]]\nx = 198.0\ny = 12.0", "size = 6.0\n[[marks]]\nx = 209.0\ny = 12.0"),
     r"mark 2: rectangle .* lies off the 210 x 297 mm page"),
    (_bad("size = 6.0\n[[marks]]\nx = 198.0\ny = 12.0\nsize = 6.0",
          "size = 6.0\n[[marks]]\nx = 198.0\ny = 12.0\nsize = 0"),
     r"mark 2: 'size' must be > 0"),
    (_bad("size = 6.0\n[[marks]]\nx = 198.0\ny = 12.0", "size = 6.0\n[[marks]]\nx = 15.0\ny = 14.0"),
     r"mark 2: overlaps mark 1"),
    (_bad("x = 12.0\ny = 285.0", "x = 100.0\ny = 12.0").replace("x = 198.0\ny = 285.0", "x = 150.0\ny = 12.0"),
     r"marks: the marks lie \(nearly\) on one line"),
    (_bad("x = 40.0 ", "x = 8.0 ").replace("y = 60.0", "y = 10.0", 1),
     r"field 'member_number': covers registration mark 1"),
    (_bad('rule = "current_reading', 'rule = 5 # "'), r"relation 1: 'rule' must be a string"),
    (EXAMPLE + "\n[[relations]]\nrule = '  '\n", r"relation 2: 'rule' is empty"),
    ("relations = 3\n" + EXAMPLE.split("[[relations]]")[0], r"layout: 'relations' must be an array of tables"),
    ("fields = [1, 2]\n" + EXAMPLE.split("[[fields]]")[0], r"layout: 'fields' must be an array of tables"),
    (EXAMPLE.replace("[fields.rules]               # all optional, evaluated by formread.form.rules\n"
                     "length = [7, 8]", "rules = [7, 8]\n[fields.other]\nlength = 1"),
     r"field 'member_number': unknown key 'other'"),
    (EXAMPLE.split("[fields.rules]")[0].replace("optional = false ", "rules = 5 "),
     r"field 'member_number': 'rules' must be a table \(\[fields.rules\]\); got integer"),
]


@pytest.mark.parametrize("text,message", BAD, ids=[str(i) for i in range(len(BAD))])
def test_each_mistake_gives_one_line_naming_file_and_field(text, message):
    with pytest.raises(LayoutError) as info:
        parse_layout(text, "card.toml")
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("card.toml: ")
    assert re.search(message, msg[len("card.toml: "):]), msg


def test_load_layout_file_problems(tmp_path):
    with pytest.raises(LayoutError, match=r"missing\.toml: no such file"):
        load_layout(tmp_path / "missing.toml")
    with pytest.raises(LayoutError, match=r": is a directory"):
        load_layout(tmp_path)
    p = tmp_path / "latin1.toml"
    p.write_bytes(b'[form]\nname = "caf\xe9"\n')
    with pytest.raises(LayoutError, match=r"latin1\.toml: not UTF-8 text"):
        load_layout(p)
    p = tmp_path / "syntax.toml"
    p.write_text('[form]\nname = "x"\nwidth_mm = = 3\n', encoding="utf-8")
    with pytest.raises(LayoutError, match=r"syntax\.toml: TOML syntax error: .*line 3"):
        load_layout(p)


def test_field_lookup_of_an_unknown_name():
    lay = parse_layout(EXAMPLE, "card.toml")
    with pytest.raises(LayoutError, match=r"^card\.toml: no field named 'nope'$"):
        lay.field("nope")


def test_layouts_are_frozen():
    lay = parse_layout(EXAMPLE, "card.toml")
    with pytest.raises(AttributeError):
        lay.name = "other"  # type: ignore[misc]


# Property: any layout the parser accepts is written back by to_toml to the same layout.
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st

# Rules and relations are compiled when a layout loads, so the generated ones are valid ones.
_rules = st.sampled_from([{}, {"check": "luhn"}, {"range": [0, 999]}, {"optional": True},
                          {"range": [-5, 10**6], "check": "damm"}, {"date": "DDMMYY", "years": [2020, 2030]}])
_relations = st.sampled_from(["member_number >= 0", "member_number=member_number", "0 <= member_number",
                              "member_number != 12 + 3", "(member_number) < 10000000000"])


@settings(max_examples=60, deadline=None)
@given(name=st.text(max_size=30), threshold=st.one_of(st.none(), st.floats(0.001, 1.0)),
       target=st.one_of(st.none(), st.floats(1e-4, 0.2)),
       cells=st.integers(6, 12), rules=_rules, relation=_relations,
       x=st.floats(20.0, 100.0), w=st.floats(1.0, 60.0))
def test_to_toml_round_trips_any_accepted_layout(name, threshold, target, cells, rules, relation, x, w):
    base = parse_layout(EXAMPLE, "card.toml")
    f = base.field("member_number")
    f = FieldSpec(**{**f.__dict__, "x": x, "w": w, "cells": cells, "max_digits": cells, "rules": rules})
    lay = Layout(**{**base.__dict__, "name": name, "threshold": threshold, "target_error": target,
                    "fields": (f,), "relations": (relation,)})
    again = parse_layout(lay.to_toml(), "card.toml")
    assert again == lay
    assert again.field("member_number").rules == rules
