"""Hostile layouts, through ``formread read`` (into the existing output folder, which must stay as it was)
and through ``formread layout proof / draft / fingerprint``."""

from __future__ import annotations

import os

import numpy as np
import pytest
from hostilekit import Case, bad_layout, edited_layout, execute, layout_text, params, png_bomb, write
from PIL import Image


def read_with(make):
    """``formread read`` of the good page with the layout ``make(w)`` writes, into the existing folder."""
    return lambda w: ["read", str(w.page), "--layout", str(make(w)), "--out", str(w.out), "--model", str(w.model),
                      "--workers", "1", "--quiet"]


def edit(old, new, count=1):
    return lambda w: edited_layout(w, "bad.toml", old, new, count)


def text(make_text):
    return lambda w: bad_layout(w, "bad.toml", make_text(w))


def _no_fields(w):
    t = layout_text(w)
    return t[:t.index("[[fields]]")]


def _no_header(w):
    t = layout_text(w)
    a = t.index("[form.header]")
    return t[:a] + t[t.index("[[marks]]"):]


def _relation(rule):
    return lambda w: layout_text(w) + f'\n[[relations]]\nrule = "{rule}"\n'


def _duplicate_field(w):
    t = layout_text(w)
    return t.replace('name = "member_number"', 'name = "plot_number"')


def _pwned(w, res):
    assert not (w.root / "pwned").exists() and not (w.root / "out" / "pwned").exists()


def _read_fresh_with_bom(w):
    p = write(w.path("bom.toml"), "\ufeff" + layout_text(w))
    return ["read", str(w.page), "--layout", str(p), "--out", str(w.path("fresh")), "--model", str(w.model),
            "--workers", "1", "--quiet"]


def _read_one(w, res):
    assert "pages: 1 (1 read" in res.out, res.out


def _noise(w, name="noise.png"):
    rng = np.random.default_rng(4)
    Image.fromarray(rng.integers(0, 256, (1169, 827), dtype=np.uint8)).save(w.path(name), dpi=(100, 100))
    return w.path(name)


def _blank(w):
    Image.new("L", (1654, 2339), 255).save(w.path("blank.png"), dpi=(200, 200))
    return w.path("blank.png")


def proof(scan, *extra, layout=None):
    return lambda w: ["layout", "proof", str(scan(w)), "--layout", str(layout(w) if layout else w.layout),
                      *(str(e(w)) if callable(e) else e for e in extra)]


E = "bad.toml"   # the bad layout's file name, in every message

CASES = [
    Case("layout-bad-toml", read_with(text(lambda w: layout_text(w) + "\n[[fields]\nname = ")), 1, (E, "TOML"),
         ledger="same"),
    Case("layout-zero-byte", read_with(text(lambda w: "")), 1, (E,), ledger="same"),
    Case("layout-missing-form", read_with(edit("[form]\n", "[forms]\n")), 1, (E, "form"), ledger="same"),
    Case("layout-missing-key", read_with(edit("width_mm = 210.0\n", "")), 1, (E, "width_mm"), ledger="same"),
    Case("layout-negative-size", read_with(edit("w = 48.0", "w = -48.0")), 1, (E, "member_number"), ledger="same"),
    Case("layout-nan", read_with(edit("width_mm = 210.0", "width_mm = nan")), 1, (E, "width_mm"), ledger="same"),
    Case("layout-inf", read_with(edit("height_mm = 297.0", "height_mm = inf")), 1, (E, "height_mm"),
         ledger="same"),
    Case("layout-1e308", read_with(edit("x = 80.0", "x = 1e308")), 1, (E, "plot_number"), ledger="same"),
    Case("layout-unicode-field-name", read_with(edit('name = "plot_number"', 'name = "plöt_nümbér"', 2)), 1,
         (E, "name"), ledger="same"),
    Case("layout-long-field-name", read_with(edit('name = "plot_number"', 'name = "' + "p" * 20_000 + '"')), 1,
         (E, "name"), ledger="same"),
    Case("layout-overlapping-fields", read_with(edit("y = 76.0", "y = 58.0")), 1, (E, "overlap"), ledger="same"),
    Case("layout-unknown-rule", read_with(edit('check = "luhn"', 'checksum = "luhn"')), 1, (E, "checksum"),
         ledger="same"),
    Case("layout-unknown-check", read_with(edit('check = "luhn"', 'check = "crc32"')), 1, (E, "crc32"),
         ledger="same"),
    Case("layout-bad-date-format", read_with(edit('date = "DDMMYYYY"', 'date = "YYYYDDMM"')), 1, (E, "YYYYDDMM"),
         ledger="same"),
    Case("layout-years-reversed", read_with(edit("years = [2025, 2027]", "years = [2027, 2025]")), 1,
         (E, "years"), ledger="same"),
    Case("layout-range-reversed", read_with(edit("range = [1, 240]", "range = [240, 1]")), 1, (E, "range"),
         ledger="same"),
    Case("layout-negative-length", read_with(edit("length = 8", "length = -3")), 1, (E, "length"), ledger="same"),
    Case("layout-deep-relation", read_with(text(_relation("(" * 5000 + "plot_number" + ")" * 5000 + " = 1"))), 1,
         (E,), ledger="same"),
    Case("layout-long-relation", read_with(text(_relation(" + ".join(["plot_number"] * 20_000) + " = 1"))), 1,
         (E,), ledger="same"),
    Case("layout-code-in-relation", read_with(text(_relation("__import__('os').system('touch pwned') = 1"))), 1,
         (E, "relation"), ledger="same", after=_pwned),
    Case("layout-relation-unknown-field", read_with(text(_relation("current_reading >= meter_size"))), 1,
         (E, "meter_size"), ledger="same"),
    Case("layout-400-digit-integer", read_with(edit("cells = 8", "cells = " + "9" * 400)), 1, (E, "cells"),
         ledger="same"),
    Case("layout-cells-1e30", read_with(edit("cells = 8", "cells = " + str(10 ** 30))), 1, (E, "cells"),
         ledger="same"),
    Case("layout-5000-nested-arrays", read_with(edit("length = 8", "length = " + "[" * 5000 + "8" + "]" * 5000)), 1,
         (E,), ledger="same"),
    Case("layout-non-utf8", read_with(lambda w: bad_layout(w, E, layout_text(w).encode() + b"\n# caf\xe9\n")), 1,
         (E, "UTF-8"), ledger="same"),
    Case("layout-utf8-bom", _read_fresh_with_bom, 0, after=_read_one),
    Case("layout-no-fields", read_with(text(_no_fields)), 1, (E, "fields"), ledger="same"),
    Case("layout-missing-file", read_with(lambda w: w.path(E)), 1, (E,), ledger="same"),
    Case("layout-folder-without-toml", read_with(lambda w: w.samples), 1, ("samples", "no layout files"),
         ledger="same"),
    Case("layout-threshold-two", read_with(edit("binarize =", "threshold = 2.0\nbinarize =")), 1,
         (E, "threshold"), ledger="same"),
    Case("layout-string-threshold", read_with(edit("binarize =", 'threshold = "high"\nbinarize =')), 1,
         (E, "threshold"), ledger="same"),
    Case("layout-audit-share", read_with(edit("binarize =", "audit = 1.5\nbinarize =")), 1, (E, "audit"),
         ledger="same"),
    Case("layout-target-error", read_with(edit("target_error = 0.005", "target_error = 0.9")), 1,
         (E, "target_error"), ledger="same"),
    Case("layout-two-marks", read_with(edit("[[marks]]\nx = 12.0\ny = 285.0\nsize = 6.0\n\n[[marks]]\nx = 198.0\n"
                                            "y = 285.0\nsize = 6.0\n", "")), 1, (E, "marks"), ledger="same"),
    Case("layout-duplicate-field", read_with(text(_duplicate_field)), 1, (E, "plot_number"), ledger="same"),
    Case("layout-field-off-the-page", read_with(edit("x = 80.0", "x = 500.0")), 1, (E, "plot_number"),
         ledger="same"),
    Case("layout-unknown-kind", read_with(edit('kind = "open"', 'kind = "circle"')), 1, (E, "circle"),
         ledger="same"),
    Case("layout-huge-file", read_with(text(lambda w: layout_text(w) + "#" * 2_000_000 + "\n")), 1, (E,),
         ledger="same"),
    Case("layout-same-form-twice", lambda w: ["read", str(w.page), "--layout", str(w.layout), "--layout",
                                              str(edited_layout(w, "copy.toml", "x = 80.0", "x = 81.0")),
                                              "--out", str(w.out), "--model", str(w.model), "--quiet"], 1,
         ("copy.toml", "several layouts"), ledger="same"),
    # ------------------------------------------------------------------ layout proof / draft / fingerprint
    Case("layout-proof-zero-byte-scan", proof(lambda w: write(w.path("zero.png"), b"")), 1, ("zero.png", "empty")),
    Case("layout-proof-page-zero", proof(lambda w: w.page, "--page", "0"), 1, ("page.png", "no page 0")),
    Case("layout-proof-page-five", proof(lambda w: w.page, "--page", "5"), 1, ("page.png", "no page 5")),
    Case("layout-proof-blank-page", proof(_blank), 1, ("blank.png", "registration marks")),
    Case("layout-proof-bad-layout", proof(lambda w: w.page, layout=edit("cells = 8", "cells = 0")), 1,
         (E, "cells")),
    Case("layout-proof-out-under-a-file", proof(lambda w: w.page, "--out", lambda w: w.layout / "p.png"), 1,
         ("layout.toml",)),
    Case("layout-proof-bomb", proof(lambda w: png_bomb(w.path("bomb.png"))), 1, ("bomb.png", "too large")),
    Case("layout-draft-noise", lambda w: ["layout", "draft", str(_noise(w)), "--out", str(w.path("d.toml"))], 1,
         ("noise.png",)),
    Case("layout-draft-exists", lambda w: ["layout", "draft", str(w.page), "--out", str(w.layout)], 1,
         ("layout.toml", "already exists")),
    Case("layout-draft-non-utf8-out", lambda w: ["layout", "draft", str(w.page), "--out",
                                                 os.fsencode(str(w.root)) + b"/caf\xe9.toml"], (0, 1)),
    Case("layout-fingerprint-no-header", lambda w: ["layout", "fingerprint", str(w.page), "--layout",
                                                    str(bad_layout(w, E, _no_header(w)))], 1, (E, "header")),
    Case("layout-fingerprint-frozen-layout", lambda w: ["layout", "fingerprint", str(w.page), "--layout",
                                                        str(w.freeze(w.layout))], 1, ("layout.toml",)),
    Case("layout-fingerprint-zero-byte-scan", lambda w: ["layout", "fingerprint", str(write(w.path("z.tif"), b"")),
                                                         "--layout", str(w.layout)], 1, ("z.tif", "empty")),
]


@pytest.mark.parametrize("case", params(CASES))
def test_case(case, world):
    execute(case, world)
