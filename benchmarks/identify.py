"""Form identification: pages of several forms, in all four quarter turns, assigned to their layouts.

Candidates: the demo card's layout and the three invented tool-library slips of the tests
(tests/imaging/form_kit.py: a loan slip with marks 3 mm further in than the card's, a return slip
with marks 3 mm lower/higher, and a renewal slip whose marks lie within 0.5 mm of the return slip's,
with the same fields: only one word of the header differs). Every layout carries the fingerprint
of its blank form's header, taken from a straight 300 dpi render of the blank form.

Pages:
* demo cards: a set made by ``formread demo make`` (``make_demo``; default seed 101, a development
  set) in a temporary folder: JPEG, PNG, Group 4 TIFF and PDF files at 200 and 300 dpi, one card
  upside down; every page is read through formread.imaging.load and then turned by 0, 90, 180 and
  270 degrees (lossless ``numpy.rot90`` of the decoded page);
* test forms: filled slips rendered by tests/imaging/synth.py at 200 and 300 dpi (skew within 2
  degrees, scale within 2 %, shift within 4 mm, noise, blur; every third bilevel), in each quarter turn;
* stray pages: the same slips offered to the candidates WITHOUT their own layout (the right answer
  is "unknown": the renewal slip's layout fits a return slip's marks and lines, only its header not).

    python benchmarks/identify.py [--seed 101] [--cards 12] [--forms 3] [--json]

Prints pages assigned right, assigned wrong, "unknown" and "ambiguous" per group (goal: all right,
0 wrong), the margins of the evidence (the right layout's lowest line share and header match; the
highest of rival layouts whose marks also fit: line share where their fields differ, header match),
and seconds per page per candidate layout on one thread (BLAS pinned with threadpoolctl).
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests" / "imaging"))   # the test forms and their renderer


def _tally(counts: Counter, idf, want: int | None, turn: int | None) -> None:
    """Count one answer: right / wrong / unknown / ambiguous (want None: 'unknown' is right)."""
    if want is None:
        counts["right" if idf.status == "unknown" else ("wrong" if idf.identified else idf.status)] += 1
    elif idf.identified:
        ok = idf.index == want and (turn is None or idf.registration.turn_deg == turn)
        counts["right" if ok else "wrong"] += 1
    else:
        counts[idf.status] += 1


def run(seed: int, cards: int, forms: int) -> dict:
    from form_kit import KIT_NAMES, kit_layouts, scan_kit_form

    from formread.demo import make_demo
    from formread.imaging.identify import identify_form
    from formread.imaging.load import Page, load_pages

    layouts = kit_layouts()
    groups: dict[str, Counter] = {"demo cards": Counter(), "test forms": Counter(), "stray pages": Counter()}
    seconds, calls = 0.0, 0
    wrong: list[str] = []
    # the evidence's margins: the right layout's weakest scores, and the best scores of rivals that registered
    own = {"lines": [], "header": []}
    rival = {"lines (other fields)": [], "header": []}

    def ask(page, cand, want, turn, group, what):
        nonlocal seconds, calls
        t0 = time.perf_counter()
        idf = identify_form(page, cand)
        seconds += time.perf_counter() - t0
        calls += len(cand)
        _tally(groups[group], idf, want, turn)
        if want is not None:
            mine = idf.evidence[want]
            for key in own:
                if getattr(mine, key) is not None:
                    own[key].append(getattr(mine, key))
            for e in idf.evidence:
                if e.index == want or e.residual_mm is None:
                    continue
                if cand[e.index].fields != cand[want].fields and e.lines is not None:
                    rival["lines (other fields)"].append(e.lines)
                if e.header is not None:
                    rival["header"].append(e.header)
        if want is not None and idf.identified and (idf.index != want or idf.registration.turn_deg != turn):
            wrong.append(f"{what}: {idf.reason}")
        elif want is None and idf.identified:
            wrong.append(f"{what}: {idf.reason}")

    with tempfile.TemporaryDirectory(prefix="formread-identify-") as tmp:
        out = Path(tmp) / "demo"
        make_demo(out, count=cards, seed=seed)
        truth = [json.loads(line) for line in (out / "truth.jsonl").read_text().splitlines()]
        for rec in truth:
            page = load_pages(out / rec["source"])[rec["page_number"] - 1]
            base = 180 if rec["scan"]["upside_down"] else 0
            for k in range(4):
                turned = Page(np.ascontiguousarray(np.rot90(page.gray, k)), page.dpi, page.source, page.page_number)
                ask(turned, layouts, 0, (base + 90 * k) % 360, "demo cards", f"{rec['source']} turned {90 * k}")
    rng = np.random.default_rng(seed)
    for i, name in enumerate(KIT_NAMES[1:], 1):
        others = [layouts[j] for j in range(len(layouts)) if j != i]
        for n in range(forms):
            for dpi in (200, 300):
                for turn in (0, 90, 180, 270):
                    gray, _ = scan_kit_form(name, dpi, rng, turn_deg=turn)
                    if n % 3 == 2:
                        gray = np.where(gray >= 150, 255, 0).astype(np.uint8)
                    page = Page(gray, float(dpi), f"{name}-{n}-{dpi}.png", 1)
                    ask(page, layouts, i, turn, "test forms", f"{name} {dpi} dpi turned {turn}")
                    ask(page, others, None, None, "stray pages", f"{name} {dpi} dpi turned {turn} (stray)")
    res = {g: {k: c.get(k, 0) for k in ("right", "wrong", "unknown", "ambiguous")} | {"pages": sum(c.values())}
           for g, c in groups.items()}
    margins = {"right layout, lowest": {k: round(min(v), 3) for k, v in own.items() if v},
               "rivals that registered, highest": {k: round(max(v), 3) for k, v in rival.items() if v}}
    return {"groups": res, "margins": margins, "seconds_per_page_per_layout": round(seconds / max(calls, 1), 4),
            "candidate_calls": calls, "wrong": wrong[:10], "demo_seed": seed, "demo_cards": cards,
            "forms_per_kind": forms}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=101, help="seed of the demo set and the test forms (default 101, "
                                                          "a development set)")
    ap.add_argument("--cards", type=int, default=12, help="demo cards to make (default 12)")
    ap.add_argument("--forms", type=int, default=3, help="test slips per kind, each at 200 and 300 dpi (default 3)")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        res = run(args.seed, args.cards, args.forms)
    res["machine"] = f"{platform.machine()} {platform.python_implementation()} {platform.python_version()}"
    if args.json:
        print(json.dumps(res))
        return 0
    print(f"Form identification, 4 candidate layouts, all four quarter turns (demo seed {args.seed}):")
    for g, v in res["groups"].items():
        print(f"  {g:<12} {v['pages']:4d} pages: {v['right']} right, {v['wrong']} wrong, "
              f"{v['unknown']} unknown, {v['ambiguous']} ambiguous")
    for k, v in res["margins"].items():
        print(f"  {k}: " + ", ".join(f"{a} {b:.3f}" for a, b in v.items()))
    print(f"  seconds per page per candidate layout: {res['seconds_per_page_per_layout']:.3f} (one thread)")
    for w in res["wrong"]:
        print(f"  WRONG {w}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
