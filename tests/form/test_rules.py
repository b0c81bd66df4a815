"""Field rules: compilation errors and evaluation (on real layouts built by tests/read/fakes.py)."""

import pytest
from fakes import field_spec, layout_of

from formread.errors import RuleError
from formread.form.rules import check_field, compile_rules


def layout(**rules_by_field):
    return layout_of([field_spec(n, rules=r) for n, r in rules_by_field.items()])


def test_length_int_and_range_of_lengths():
    c = compile_rules(layout(a={"length": 4}, b={"length": [2, 3]}))
    assert check_field(c, "a", "1234") == {"length": True}
    assert check_field(c, "a", "123") == {"length": False}
    assert [check_field(c, "b", v)["length"] for v in ("1", "12", "123", "1234")] == [False, True, True, False]


def test_range_allows_leading_zeros():
    c = compile_rules(layout(a={"range": [1, 240]}))
    assert check_field(c, "a", "007") == {"range": True}
    assert check_field(c, "a", "0") == {"range": False}
    assert check_field(c, "a", "241") == {"range": False}


def test_dates_and_the_gregorian_leap_rule():
    # Gregorian leap rule (common practice): 29/02/2000 valid, 29/02/1900 invalid
    c = compile_rules(layout(d={"date": "DDMMYYYY"}, m={"date": "MMDDYYYY"}, y={"date": "YYYYMMDD"},
                             s={"date": "DDMMYY"}))
    assert check_field(c, "d", "29022000") == {"date": True}
    assert check_field(c, "d", "29021900") == {"date": False}
    assert check_field(c, "d", "29022024") == {"date": True}
    assert check_field(c, "d", "29022023") == {"date": False}
    assert check_field(c, "d", "31042024") == {"date": False}
    assert check_field(c, "d", "00012024") == {"date": False}
    assert check_field(c, "d", "01132024") == {"date": False}
    assert check_field(c, "d", "0101202") == {"date": False}
    assert check_field(c, "m", "02292000") == {"date": True}
    assert check_field(c, "m", "02291900") == {"date": False}
    assert check_field(c, "y", "20000229") == {"date": True}
    assert check_field(c, "y", "00000101") == {"date": False}
    assert check_field(c, "s", "290200") == {"date": True}    # YY = 20YY
    assert check_field(c, "s", "290201") == {"date": False}


def test_year_window_bounds_the_date_year():
    c = compile_rules(layout(d={"date": "DDMMYYYY", "years": [2025, 2027]},
                             s={"date": "YYMMDD", "years": [2024, 2024]}))
    assert check_field(c, "d", "05032026") == {"date": True, "years": True}
    assert check_field(c, "d", "01012025") == {"date": True, "years": True}     # both ends included
    assert check_field(c, "d", "31122027") == {"date": True, "years": True}
    assert check_field(c, "d", "05032726") == {"date": True, "years": False}    # a misread year digit
    assert check_field(c, "d", "31122024") == {"date": True, "years": False}
    assert check_field(c, "d", "31022026") == {"date": False, "years": True}    # the window says nothing of the day
    assert check_field(c, "d", "0503202") == {"date": False, "years": False}
    assert check_field(c, "s", "240229") == {"date": True, "years": True}      # YY = 20YY
    assert check_field(c, "s", "250101") == {"date": True, "years": False}
    assert c.fields["d"].years == (2025, 2027)


def test_check_digit_rules():
    c = compile_rules(layout(a={"check": "luhn"}, b={"check": "mod11-2"}, g={"check": "gs1"}))
    # ISO/IEC 7812-1 annex B: 7992739871 -> 3
    assert check_field(c, "a", "79927398713") == {"luhn": True}
    assert check_field(c, "a", "79927398710") == {"luhn": False}
    # ISO 7064 MOD 11-2 worked example: 000000021825009 -> 7
    assert check_field(c, "b", "0000000218250097") == {"mod11-2": True}
    # GS1 manual calculation example: 629104150021 -> 3
    assert check_field(c, "g", "6291041500213") == {"gs1": True}


def test_empty_values_optional_and_required():
    lay = layout_of([field_spec("a", optional=True, rules={"length": 3}), field_spec("b", rules={"length": 3}),
                      field_spec("c", rules={"optional": True})])
    c = compile_rules(lay)
    assert check_field(c, "a", "") == {}
    assert check_field(c, "b", "") == {"required": False}
    assert check_field(c, "c", "") == {}
    assert c.fields["c"].optional


def test_combined_rules():
    c = compile_rules(layout(a={"length": [7, 8], "range": [1, 99999999], "check": "damm"}))
    assert check_field(c, "a", "5724001") == {"length": True, "range": True, "damm": False}


@pytest.mark.parametrize("rules,fragment", [
    ({"lenght": 3}, "unknown rule 'lenght'"),
    ({"length": 0}, "rule 'length'"),
    ({"length": [5, 3]}, "rule 'length'"),
    ({"length": "8"}, "rule 'length'"),
    ({"length": True}, "rule 'length'"),
    ({"range": [10, 1]}, "rule 'range'"),
    ({"range": 5}, "rule 'range'"),
    ({"range": [1.5, 3]}, "rule 'range'"),
    ({"date": "DD/MM/YYYY"}, "rule 'date'"),
    ({"date": "DDMMYYYY", "length": 6}, "cannot hold"),
    ({"check": "crc32"}, "rule 'check'"),
    ({"years": [2025, 2027]}, "needs a 'date' rule"),
    ({"date": "DDMMYYYY", "years": [2027, 2025]}, "rule 'years'"),
    ({"date": "DDMMYYYY", "years": 2026}, "rule 'years'"),
    ({"date": "DDMMYYYY", "years": [2025.0, 2027]}, "rule 'years'"),
    ({"date": "DDMMYY", "years": [1990, 1999]}, "holds no year"),
    ({"optional": "yes"}, "rule 'optional'"),
])
def test_bad_rules_name_file_and_field(rules, fragment):
    with pytest.raises(RuleError) as e:
        compile_rules(layout(meter={}, member=rules))
    msg = str(e.value)
    assert msg.startswith("cards/meter.toml: field 'member': ") and fragment in msg and "\n" not in msg


def test_relations_are_compiled_and_indexed():
    lay = layout_of([field_spec(n) for n in "abcd"], relations=["a = b - c", "d <= 100"])
    c = lay.rules
    assert [r.text for r in c.relations] == ["a = b - c", "d <= 100"]
    assert [r.text for r in c.relations_of("b")] == ["a = b - c"]
    assert c.relations_of("nothing") == ()


@pytest.mark.parametrize("text,fragment", [
    ("a = b - zz", "unknown field 'zz'"),
    ("a = b -", "column"),
    ("__import__('os').system('x')", "column"),
])
def test_bad_relations_name_file_and_rule(text, fragment):
    with pytest.raises(RuleError) as e:           # refused when the layout loads
        layout_of([field_spec("a"), field_spec("b")], relations=[text])
    msg = str(e.value)
    assert msg.startswith(f"cards/meter.toml: relation {text!r}: ") and fragment in msg


def test_unknown_field_in_check_field():
    with pytest.raises(RuleError, match="field 'x'"):
        check_field(compile_rules(layout(a={})), "x", "1")


def test_length_must_fit_the_field():
    with pytest.raises(RuleError, match="holds 8"):
        compile_rules(layout(a={"length": [9, 10]}))


def test_with_the_real_layout_parser():
    from formread.form.layout import parse_layout
    text = """
[form]
name = "Meter card"
width_mm = 210.0
height_mm = 297.0
[[marks]]
x = 10.0
y = 10.0
size = 5.0
[[marks]]
x = 200.0
y = 10.0
size = 5.0
[[marks]]
x = 10.0
y = 287.0
size = 5.0
[[fields]]
name = "previous"
kind = "boxed"
x = 40.0
y = 60.0
w = 30.0
h = 7.0
cells = 5
[fields.rules]
range = [0, 99999]
[[fields]]
name = "current"
kind = "open"
x = 40.0
y = 80.0
w = 30.0
h = 7.0
max_digits = 5
[fields.rules]
lenght = 5
[[relations]]
rule = "current >= previous"
"""
    with pytest.raises(RuleError) as e:
        compile_rules(parse_layout(text, "meter.toml"))
    assert str(e.value) == ("meter.toml: field 'current': unknown rule 'lenght' "
                            "(known: length, range, date, years, check, optional)")
    c = compile_rules(parse_layout(text.replace("lenght", "length"), "meter.toml"))
    assert c.source == "meter.toml" and [r.text for r in c.relations] == ["current >= previous"]
    assert check_field(c, "current", "123") == {"length": False}
    bad = text.replace("lenght", "length").replace("current >= previous", "current >= previus")
    with pytest.raises(RuleError, match="^meter.toml: relation 'current >= previus': unknown field 'previus'$"):
        compile_rules(parse_layout(bad, "meter.toml"))


def test_check_relations_on_corrected_values():
    from formread.form.rules import check_relations
    lay = layout_of([field_spec(n) for n in ("previous", "current", "litres")],
                    relations=["litres = current - previous", "current >= previous"])
    c = lay.rules
    assert check_relations(c, {"previous": "100", "current": "120", "litres": "20"}) == {
        "litres = current - previous": True, "current >= previous": True}
    assert check_relations(c, {"previous": "100", "current": "120", "litres": "26"})[
        "litres = current - previous"] is False
    assert check_relations(c, {"previous": "100", "current": "120", "litres": ""}) == {
        "litres = current - previous": None, "current >= previous": True}
    assert c.relations[0].sides({"previous": 100, "current": 120, "litres": 26}) == (26, 20)


def test_the_demo_values_keep_the_demo_layout_rules():
    # the demo's invented cards (no writer mistake) keep every rule of the demo layout, the year window too
    import numpy as np

    from formread.demo.make import demo_layout_path
    from formread.demo.values import card_values
    from formread.form.layout import load_layout
    from formread.form.rules import check_relations

    c = compile_rules(load_layout(demo_layout_path()))
    assert c.fields["reading_date"].years is not None
    rng = np.random.default_rng(0)
    for _ in range(300):
        values = card_values(rng, litres_empty=bool(rng.random() < 0.3))
        for name, v in values.items():
            assert all(check_field(c, name, v).values()), (name, v)
        assert all(ok in (True, None) for ok in check_relations(c, values).values()), values
