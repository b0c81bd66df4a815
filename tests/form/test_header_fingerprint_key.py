"""``[form.header] fingerprint``: parsed and checked, written back by to_toml, set in a layout file's text
with its comments kept; layouts without one load as before."""

from __future__ import annotations

import pytest

from formread.errors import LayoutError
from formread.form.edit import set_header_fingerprint
from formread.form.layout import parse_layout

BASE = """# a card for the tests
[form]
name = "Key test card"
width_mm = 148.0
height_mm = 210.0

[form.header]   # the printed title
x = 25.0
y = 6.0
w = 98.0
h = 12.0
{extra}
[[marks]]
x = 9.0
y = 9.0
size = 6.0
[[marks]]
x = 139.0
y = 9.0
size = 6.0
[[marks]]
x = 9.0
y = 201.0
size = 6.0
[[fields]]
name = "n"
kind = "open"
x = 30.0
y = 40.0
w = 40.0
h = 10.0
max_digits = 3
"""

FP = "2x3:0f8a31"


def test_a_layout_without_a_fingerprint_loads_as_before():
    layout = parse_layout(BASE.format(extra=""), "plain.toml")
    assert layout.header is not None and layout.header_fingerprint is None
    assert "fingerprint" not in layout.to_toml()


def test_a_fingerprint_is_parsed_and_round_trips():
    layout = parse_layout(BASE.format(extra=f'fingerprint = "{FP}"\n'), "fp.toml")
    assert layout.header_fingerprint == FP
    again = parse_layout(layout.to_toml(), "again.toml")
    assert again.header_fingerprint == FP and again.header == layout.header


@pytest.mark.parametrize("value,words", [
    ('"2x3:0f8a3"', "has 5 cells; 2x3 needs 6"),
    ('"2x3:0f8a31ff"', "has 8 cells; 2x3 needs 6"),
    ('"2x3:0F8A31"', "must be ROWSxCOLS:HEX"),          # lower-case hex only, as it is written
    ('"0x3:"', "must be ROWSxCOLS:HEX"),
    ('"2*3:0f8a31"', "must be ROWSxCOLS:HEX"),
    ('"0f8a31"', "must be ROWSxCOLS:HEX"),
    ("42", "'fingerprint' must be a string; got integer 42"),
])
def test_a_malformed_fingerprint_is_one_line_naming_file_and_table(value, words):
    with pytest.raises(LayoutError) as e:
        parse_layout(BASE.format(extra=f"fingerprint = {value}\n"), "bad.toml")
    msg = str(e.value)
    assert msg.startswith("bad.toml: [form.header]: ") and words in msg and "\n" not in msg


def test_an_unknown_header_key_still_names_the_allowed_ones():
    with pytest.raises(LayoutError, match=r"^u\.toml: \[form\.header\]: unknown key 'title' \(allowed: "
                                          r"fingerprint, h, w, x, y\)$"):
        parse_layout(BASE.format(extra='title = "x"\n'), "u.toml")


def test_set_header_fingerprint_adds_then_replaces_and_keeps_comments():
    text = BASE.format(extra="")
    once = set_header_fingerprint(text, FP, "card.toml")
    assert "# a card for the tests" in once and "# the printed title" in once
    assert parse_layout(once, "card.toml").header_fingerprint == FP
    twice = set_header_fingerprint(once, "1x2:ff", "card.toml")
    assert twice.count("fingerprint =") == 1 and parse_layout(twice, "card.toml").header_fingerprint == "1x2:ff"
    # everything but the one line is unchanged
    assert [ln for ln in twice.splitlines() if "fingerprint" not in ln] == text.splitlines()


def test_set_header_fingerprint_needs_a_header_table_and_a_good_fingerprint():
    no_header = BASE.format(extra="").replace(
        "[form.header]   # the printed title\nx = 25.0\ny = 6.0\nw = 98.0\nh = 12.0\n", "")
    with pytest.raises(LayoutError, match=r"^n\.toml: no \[form\.header\] table"):
        set_header_fingerprint(no_header, FP, "n.toml")
    with pytest.raises(LayoutError, match=r"^b\.toml: \[form\.header\]: 'fingerprint' has 2 cells"):
        set_header_fingerprint(BASE.format(extra=""), "2x3:ff", "b.toml")
