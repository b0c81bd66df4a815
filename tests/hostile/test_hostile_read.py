"""Hostile cases of ``formread read``: bad scans, names, folders, output folders, ledgers and models.

Scans go into the existing output folder ``w.out``: a bad page is recorded as failed (exit 3) and
every row already there is kept; an error before reading (exit 1) leaves the ledger as it was.
"""

from __future__ import annotations

import csv
import os
import shutil

import numpy as np
import pytest
from hostilekit import (
    Case,
    edited_layout,
    execute,
    make_model,
    mkfifo,
    model_with_header,
    npz_with,
    page_as,
    params,
    pdf_text,
    png_bomb,
    sqlite_file,
    steps,
    truncated,
    write,
)
from PIL import Image


def read(w, *scans, out=None, model=None, layout=None, extra=()):
    """The command line reading ``scans`` into ``out`` (the existing output folder by default)."""
    argv = ["read", *scans, "--layout", str(layout or w.layout), "--out", str(out or w.out), "--workers", "1",
            "--quiet"]
    if model is not False:
        argv += ["--model", str(model or w.model)]
    return argv + list(extra)


def scan(make):
    """A case building one bad scan file with ``make(w)`` and reading it into the existing folder."""
    return lambda w: read(w, str(make(w)))


def _page_of(w, name, fmt):
    return page_as(w, name, fmt=fmt)


def _noise(w):
    rng = np.random.default_rng(3)
    Image.fromarray(rng.integers(0, 256, (1654, 2339), dtype=np.uint8)).save(w.path("noise.png"), dpi=(200, 200))
    return w.path("noise.png")


def _blank(w):
    Image.new("L", (1654, 2339), 255).save(w.path("blank.png"), dpi=(200, 200))
    return w.path("blank.png")


def _other_form(w):
    """A page of another form: the review fixture's allotment card (its marks are elsewhere)."""
    from formread.ledger.store import open_ledger  # noqa: F401 - the fixture's page images are plain PNGs

    src = sorted((w.reviewed / "pages").glob("*.png"))[0]
    shutil.copy(src, w.path("other_form.png"))
    return w.path("other_form.png")


def _encrypted_pdf(w):
    """The standard security handler's dictionary written by hand (PDF 1.4 reference, section 3.5.2), as
    tests/imaging/test_load.py does: /U does not match the empty user password."""
    extra = ("/Encrypt 4 0 R /ID [<0123456789ABCDEF0123456789ABCDEF> <0123456789ABCDEF0123456789ABCDEF>] ")
    text = pdf_text(["p"], extra_trailer=extra, extra_objects=[
        "<< /Filter /Standard /V 1 /R 2 /O <" + "A1" * 32 + "> /U <" + "5C" * 32 + "> /P -44 >>"])
    return write(w.path("locked.pdf"), text)


def _symlink_loop(w):
    os.symlink(w.path("loop_b.png"), w.path("loop_a.png"))
    os.symlink(w.path("loop_a.png"), w.path("loop_b.png"))
    return w.path("loop_a.png")


def _folder_with(w, name, make=None):
    d = w.path("tray")
    d.mkdir(exist_ok=True)
    if make is None:
        shutil.copy(w.page, d / name)
    else:
        make(d / name)
    return d


def _readings_rows(w, out):
    with open(out / "readings.csv", newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def _csv_escaped(w, res):
    rows = _readings_rows(w, w.path("fresh"))
    cells = [v for r in rows for v in r.values() if v]
    assert not any(c.startswith(("=", "+", "-", "@")) for c in cells), cells
    assert any("=HYPERLINK" in c for c in cells)


def _pages_read(n):
    def after(w, res):
        assert f"pages: {n} " in res.out, res.out
    return after


def _changed_layout(w):
    return edited_layout(w, "changed.toml", 'name = "plot_number"', 'name = "plot_no"')


def _other_name_layout(w):
    return edited_layout(w, "other.toml", "name = ", 'name = "Another card"\n#', 1)


def _wrong_input_model(w):
    spec = [{"type": "flatten"}, {"type": "dense", "in": 256, "out": 10}]
    return make_model(w, "size16.npz", spec, {"input": {"size": 16, "channels": 1, "normalisation": "unit"}})


def _five_class_model(w):
    spec = [{"type": "flatten"}, {"type": "dense", "in": 784, "out": 5}]
    return make_model(w, "five.npz", spec, {"labels": ["0", "1", "2", "3", "4"]})


def _pickled_model(w):
    p = w.path("pickled.npz")
    np.savez(p, **{"header.json": np.array([{"format": "formread"}], dtype=object)})
    return p


def _one_pixel(w):
    Image.new("L", (1, 1), 255).save(w.path("dot.png"))
    return w.path("dot.png")


def _mkdir(p):
    p.mkdir()
    return p


def _non_utf8_in_folder(w):
    d = _mkdir(w.path("tray"))
    shutil.copy(w.page, os.fsencode(str(d)) + b"/caf\xe9.png")
    return read(w, str(d))


def _non_utf8_argument(w):
    name = os.fsencode(str(w.root)) + b"/\xff\xfe.png"
    shutil.copy(w.page, name)
    return [name if a == "ARG" else a for a in read(w, "ARG")]


def _subfolders_read_only(w):
    """A new page into an output folder whose page and digit folders cannot be written."""
    page = page_as(w, "new.png", mode="L")
    with Image.open(page) as px:
        a = np.asarray(px).copy()
    a[5, 5] = 250 if a[5, 5] > 250 else 255                # a page not yet in the ledger
    Image.fromarray(a).save(page, dpi=(200, 200))
    for sub in ("pages", "fields", "digits"):
        w.freeze(w.out / sub)
    return read(w, str(page))


def _garbage_in_use(w):
    (w.home / "models").mkdir(parents=True, exist_ok=True)
    write(w.home / "models" / "in_use.json", "{not json")
    return read(w, str(w.page), model=False)


IMAGE_FORMATS = [("png", "PNG"), ("jpg", "JPEG"), ("tif", "TIFF"), ("pdf", "PDF")]

CASES = [
    # ------------------------------------------------------------------ broken files of every format
    *[Case(f"read-zero-byte-{ext}", scan(lambda w, ext=ext: write(w.path(f"zero.{ext}"), b"")), 3,
           (f"zero.{ext}", "empty"), ledger="kept") for ext, _ in IMAGE_FORMATS],
    *[Case(f"read-truncated-{ext}", scan(lambda w, ext=ext, fmt=fmt: truncated(
        _page_of(w, f"whole.{ext}", fmt), w.path(f"cut.{ext}"), 0.3)), 3, (f"cut.{ext}",), ledger="kept")
      for ext, fmt in IMAGE_FORMATS],
    *[Case(f"read-text-named-{ext}", scan(lambda w, ext=ext: write(w.path(f"note.{ext}"), "just a note\n" * 20)),
           3, (f"note.{ext}", "not a"), ledger="kept") for ext, _ in IMAGE_FORMATS],
    Case("read-jpeg-named-pdf", scan(lambda w: page_as(w, "photo.pdf", fmt="JPEG")), 0, (),
         ledger="kept"),
    Case("read-png-named-jpg", scan(lambda w: page_as(w, "really_png.jpg", fmt="PNG")), 0, ledger="kept",
         after=_pages_read(1)),
    Case("read-png-bomb", scan(lambda w: png_bomb(w.path("bomb.png"))), 3, ("bomb.png", "too large"),
         ledger="kept"),
    Case("read-pdf-bomb", scan(lambda w: write(w.path("huge.pdf"), pdf_text(["p"], media=(0, 0, 14400, 14400)))),
         3, ("huge.pdf", "too large"), ledger="kept"),
    Case("read-pdf-encrypted", scan(_encrypted_pdf), 3, ("locked.pdf", "encrypted"), ledger="kept"),
    Case("read-pdf-no-pages", scan(lambda w: write(w.path("empty.pdf"), pdf_text([])), ), 3,
         ("empty.pdf", "no pages"), ledger="kept"),
    Case("read-pdf-malformed", scan(lambda w: write(w.path("mal.pdf"), b"%PDF-1.4\n1 0 obj\n<< /Type /Cat" * 50)),
         3, ("mal.pdf",), ledger="kept"),
    # ------------------------------------------------------------------ odd but readable pages
    Case("read-one-pixel", scan(_one_pixel), 3, ("dot.png",), ledger="kept"),
    Case("read-16-bit-png", scan(lambda w: page_as(w, "deep.png", mode="I;16", fmt="PNG")), 0, ledger="kept",
         after=_pages_read(1)),
    Case("read-cmyk-jpeg", scan(lambda w: page_as(w, "cmyk.jpg", mode="CMYK", fmt="JPEG", quality=95)), 0,
         ledger="kept", after=_pages_read(1)),
    Case("read-cmyk-tiff", scan(lambda w: page_as(w, "cmyk.tif", mode="CMYK", fmt="TIFF")), 0, ledger="kept",
         after=_pages_read(1)),
    Case("read-palette-png", scan(lambda w: page_as(w, "palette.png", mode="P", fmt="PNG")), 0, ledger="kept",
         after=_pages_read(1)),
    Case("read-rgba-png", scan(lambda w: page_as(w, "rgba.png", mode="RGBA", fmt="PNG")), 0, ledger="kept",
         after=_pages_read(1)),
    Case("read-blank-page", scan(_blank), 3, ("blank.png",), ledger="kept"),
    Case("read-noise-page", scan(_noise), 3, ("noise.png",), ledger="kept"),
    Case("read-other-form", scan(_other_form), 3, ("other_form.png",), ledger="kept"),
    # ------------------------------------------------------------------ names, folders, links
    Case("read-name-with-spaces", lambda w: read(w, str(page_as(w, "my scan 1.png")), out=w.path("fresh")), 0,
         after=_pages_read(1)),
    Case("read-unicode-name", lambda w: read(w, str(page_as(w, "Zählerkarte_№7_✓.png")), out=w.path("fresh")), 0,
         after=_pages_read(1)),
    Case("read-newline-in-name", lambda w: read(w, str(write(w.path("bad\nname.png"), b"")), out=w.path("fresh")),
         3, ("bad\\nname.png", "empty file")),
    Case("read-same-file-twice", lambda w: read(w, str(w.page), str(w.page), str(w.root / "." / "page.png"),
                                                out=w.path("fresh")), 0, after=_pages_read(1)),
    Case("read-symlink-loop", scan(_symlink_loop), 3, ("loop_a.png", "cannot be opened"), ledger="kept"),
    Case("read-symlink-loop-in-folder", lambda w: read(w, str(_folder_with(
        w, "x.png", lambda p: (os.symlink(p, p.with_name("y.png")), os.symlink(p.with_name("y.png"), p)))),
        out=w.path("fresh")), 3, ("cannot be opened",)),
    Case("read-named-pipe-in-folder", lambda w: read(w, str(_folder_with(w, "x.png", mkfifo)), out=w.path("fresh")),
         3, ("x.png", "not a regular file")),
    Case("read-named-pipe-argument", scan(lambda w: mkfifo(w.path("x.png"))), 3, ("x.png", "not a regular file"),
         ledger="kept"),
    Case("read-non-utf8-name-in-folder", _non_utf8_in_folder, 0, ledger="kept", proc=True, after=_pages_read(1)),
    Case("read-non-utf8-name-argument", _non_utf8_argument, 0, ledger="kept", after=_pages_read(1)),
    Case("read-missing-file", lambda w: read(w, str(w.path("nowhere.png"))), 1, ("nowhere.png", "no such file"),
         ledger="same"),
    Case("read-empty-folder", lambda w: read(w, str(_mkdir(w.path("none")))), 1,
         ("none", "no scans"), ledger="same"),
    Case("read-folder-of-non-scans", lambda w: read(w, str(_folder_with(w, "a.txt", lambda p: write(p, "x"))),
                                                    out=w.path("fresh")), 3, ("a.txt", "not a scan")),
    Case("read-formula-name-escaped", lambda w: read(w, str(page_as(w, "=HYPERLINK(1).png")), out=w.path("fresh")),
         0, after=_csv_escaped),
    # ------------------------------------------------------------------ output folders and ledgers
    Case("read-out-is-a-file", lambda w: read(w, str(w.page), out=write(w.path("afile"), "x")), 1, ("afile",)),
    Case("read-out-under-a-file", lambda w: read(w, str(w.page), out=write(w.path("afile"), "x") / "sub"), 1,
         ("afile",)),
    Case("read-out-read-only", lambda w: read(w, str(w.page), out=w.freeze(_mkdir(w.path("ro")))), 1, ("ro",)),
    Case("read-ledger-read-only", steps(lambda w: w.freeze(w.out / "ledger.sqlite"), lambda w: read(w, str(w.page))), 1,
         ("ledger.sqlite",), ledger="same"),
    Case("read-subfolders-read-only", _subfolders_read_only, (1, 3), ("pages",), ledger="kept"),
    Case("read-ledger-truncated", steps(lambda w: truncated(w.out / "ledger.sqlite", w.out / "ledger.sqlite", 0.4),
                                        lambda w: read(w, str(w.page))), 1, ("ledger.sqlite",), ledger="same"),
    Case("read-ledger-garbage", steps(lambda w: write(w.out / "ledger.sqlite", os.urandom(8192)),
                                      lambda w: read(w, str(w.page))), 1, ("ledger.sqlite",), ledger="same"),
    Case("read-ledger-foreign", steps(lambda w: (w.out / "ledger.sqlite").unlink(), lambda w: sqlite_file(
        w.out / "ledger.sqlite", "CREATE TABLE invoices (id INTEGER, total REAL)"), lambda w: read(w, str(w.page))),
         1, ("ledger.sqlite", "not a formread ledger"), ledger="same"),
    Case("read-ledger-newer-schema", steps(lambda w: sqlite_file(w.out / "ledger.sqlite", "PRAGMA user_version = 999"),
                                           lambda w: read(w, str(w.page))), 1, ("ledger.sqlite", "999"),
         ledger="same"),
    Case("read-ledger-with-changed-layout", lambda w: read(w, str(w.page), layout=_changed_layout(w)), 1,
         ("out", "another version of the layout"), ledger="same"),
    Case("read-ledger-with-another-form", lambda w: read(w, str(_noise(w)), layout=_other_name_layout(w)), (1, 3),
         ledger="kept"),
    # ------------------------------------------------------------------ model files
    Case("read-model-zero-byte", lambda w: read(w, str(w.page), model=write(w.path("m.npz"), b"")), 1,
         ("m.npz", "empty"), ledger="same"),
    Case("read-model-garbage", lambda w: read(w, str(w.page), model=write(w.path("m.npz"), os.urandom(500))), 1,
         ("m.npz", "not a formread model"), ledger="same"),
    Case("read-model-truncated", lambda w: read(w, str(w.page), model=truncated(w.model, w.path("m.npz"))), 1,
         ("m.npz",), ledger="same"),
    Case("read-model-pickled", lambda w: read(w, str(w.page), model=_pickled_model(w)), 1, ("pickled.npz",),
         ledger="same"),
    Case("read-model-foreign-npz", lambda w: read(w, str(w.page), model=npz_with(w.path("f.npz"), w=np.ones(3))), 1,
         ("f.npz", "not a formread model"), ledger="same"),
    Case("read-model-is-a-folder", lambda w: read(w, str(w.page), model=w.samples), 1, ("samples", "not a file"),
         ledger="same"),
    Case("read-model-temperature-edited", lambda w: read(w, str(w.page), model=model_with_header(
        w, "warm.npz", lambda h: h.update(temperature=0.5), reseal=False)), 1, ("warm.npz", "checksum"),
         ledger="same"),
    Case("read-model-wrong-input-size", lambda w: read(w, str(w.page), model=_wrong_input_model(w)), 1,
         ("size16.npz",), ledger="same"),
    Case("read-model-five-classes", lambda w: read(w, str(w.page), model=_five_class_model(w)), 1, ("five.npz",),
         ledger="same"),
    Case("read-in-use-garbage", _garbage_in_use, 1, ("in_use.json",), ledger="same"),
    # ------------------------------------------------------------------ options
    Case("read-workers-zero", lambda w: read(w, str(w.page), extra=["--workers", "0"]), 2, ("--workers",),
         ledger="same"),
    Case("read-threshold-nan", lambda w: read(w, str(w.page), extra=["--threshold", "nan"]), 2, ("--threshold",),
         ledger="same"),
    Case("read-audit-one", lambda w: read(w, str(w.page), extra=["--audit", "1"]), 2, ("--audit",), ledger="same"),
]


@pytest.mark.parametrize("case", params(CASES))
def test_case(case, world):
    execute(case, world)
