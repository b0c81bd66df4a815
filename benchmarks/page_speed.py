"""Seconds per A4 page at 300 dpi for the imaging steps, and the share of each step.

Makes its own test pages in a temporary folder: filled demo cards (the invented water-meter
card of ``formread.demo``, digits from the MNIST sample's test part) scanned at 300 dpi with
a small random turn and shift, each saved as a grey PNG and as a bilevel Group 4 TIFF.
Then, on one thread (BLAS pinned to 1 with threadpoolctl), it times for every file:
load (decode) + binarize + register + cut + segment, as ``process_page`` does them.

    python benchmarks/page_speed.py [--pages 4] [--repeat 3] [--json]

Goal: under 0.25 s per page on one core.
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

GOAL_SECONDS = 0.25


def make_pages(folder: Path, count: int, seed: int) -> list[Path]:
    """Write ``count`` filled demo cards at 300 dpi, each as PNG and as Group 4 TIFF; return the files."""
    from PIL import Image

    from formread.demo.card import LAYOUT_PATH, marks_mm, read_card_layout, render_card
    from formread.demo.fill import load_test_digits, random_writer, write_field
    from formread.demo.scan import random_scan_settings, simulate_scan, to_bilevel
    from formread.demo.values import card_values

    layout = read_card_layout(LAYOUT_PATH)
    bank = load_test_digits()
    files = []
    for k, seq in enumerate(np.random.SeedSequence(seed).spawn(count)):
        rng = np.random.default_rng(seq)
        card = render_card(layout, 300)
        values = card_values(rng)
        writer = random_writer(rng)
        for fld in layout.fields:
            write_field(card, fld, values[fld.name], writer, bank, 300, rng)
        settings = random_scan_settings(rng, dpi=300, page_mm=(layout.width_mm, layout.height_mm),
                                        marks_mm=marks_mm(layout), noise=(1.0, 2.0))
        scan = simulate_scan(card, settings, rng)
        png = folder / f"page_{k + 1:02d}.png"
        Image.fromarray(scan).save(png, dpi=(300, 300))
        tif = folder / f"page_{k + 1:02d}.tif"
        to_bilevel(scan).save(tif, compression="group4", dpi=(300, 300))
        files += [png, tif]
    return files


def measure(files: list[Path], repeat: int) -> dict:
    """Time load + process_page over ``files``, ``repeat`` times; seconds per page and per step."""
    from formread.demo.card import LAYOUT_PATH
    from formread.form.layout import load_layout
    from formread.imaging.load import load_pages
    from formread.imaging.pipeline import STEPS, process_page

    layout = load_layout(LAYOUT_PATH)
    timings = {s: 0.0 for s in STEPS}
    pages, doubtful = 0, 0
    per_page = []
    process_page(load_pages(files[0])[0], layout)  # warm up (imports, caches)
    for _ in range(repeat):
        for f in files:
            t0 = time.perf_counter()
            page = load_pages(f)[0]
            timings["load"] += time.perf_counter() - t0
            pd = process_page(page, layout, timings=timings)
            per_page.append(time.perf_counter() - t0)
            pages += 1
            doubtful += sum(fd.doubtful for fd in pd.fields.values())
    total = sum(timings.values())
    return {
        "seconds_per_page": round(total / pages, 4),
        "median_seconds_per_page": round(float(np.median(per_page)), 4),
        "slowest_page_seconds": round(float(np.max(per_page)), 4),
        "steps": {s: {"seconds_per_page": round(timings[s] / pages, 4), "share": round(timings[s] / total, 3)}
                  for s in STEPS},
        "pages": pages,
        "doubtful_fields_per_page": round(doubtful / pages, 2),
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=4, help="cards to make (each saved as PNG and TIFF; default 4)")
    ap.add_argument("--repeat", type=int, default=3, help="passes over the files (default 3)")
    ap.add_argument("--seed", type=int, default=11, help="seed of the cards (default 11)")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)
    from threadpoolctl import threadpool_limits

    with tempfile.TemporaryDirectory(prefix="formread-page-speed-") as tmp, threadpool_limits(1):
        files = make_pages(Path(tmp), args.pages, args.seed)
        res = measure(files, args.repeat)
    res["goal_seconds_per_page"] = GOAL_SECONDS
    res["machine"] = f"{platform.machine()} {platform.python_implementation()} {platform.python_version()}"
    if args.json:
        print(json.dumps(res))
        return 0
    print(f"A4 pages at 300 dpi (PNG and Group 4 TIFF), one thread: {res['pages']} pages timed")
    print(f"  seconds per page   {res['seconds_per_page']:.3f}  (median {res['median_seconds_per_page']:.3f}, "
          f"slowest {res['slowest_page_seconds']:.3f}; goal under {GOAL_SECONDS})")
    for s, v in res["steps"].items():
        print(f"  {s:<10} {v['seconds_per_page']:.4f} s  {v['share']:6.1%}")
    print(f"  doubtful fields per page: {res['doubtful_fields_per_page']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
