"""How fast one ledger writer takes pages, and how many bytes a page's work is: the limits of scaling out.

A cluster reads pages on many machines, but every page's row, field rows, page image, field crops and
digit files are written by the one process that owns the ledger (one SQLite transaction per page).
This measures that writer with real rows: the pages of the shipped demo set are read once (the page
work of formread.read.pagework), then written again and again under new content hashes into a fresh
ledger, and the time per page is taken.  It also prints the size of one page's work as it travels
from a worker to the writer (pickled, images and digit files included) and the size of the scan files.

    python benchmarks/ledger_write.py [--pages 300] [--json]
"""

from __future__ import annotations

import argparse
import copy
import json
import pickle
import sys
import tempfile
import time
from pathlib import Path


def main(argv=None) -> int:
    from formread.form.layout import load_layout
    from formread.form.thresholds import audit_rate, resolve_thresholds
    from formread.imaging.load import load_pages
    from formread.ledger.store import open_ledger, page_hash
    from formread.read.bundle import load_bundle
    from formread.read.pagework import RunContext, read_page
    from formread.store import demo_forms, in_use_path

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--pages", type=int, default=300, help="pages to write")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    demo = demo_forms()
    layout = load_layout(demo / "layout.toml")
    bundle = load_bundle(in_use_path())
    ctx = RunContext.for_bundle(bundle, layouts=(layout,), thresholds={layout.name: resolve_thresholds(layout)},
                                audit={layout.name: audit_rate(layout)}, audit_seed=0)
    scans = sorted(p for p in demo.iterdir() if p.name.startswith("scan_"))
    works, t0 = [], time.perf_counter()
    for f in scans[:10]:
        for page in load_pages(f):
            works.append(read_page(page, page_hash(page.gray), ctx))
    read_seconds = (time.perf_counter() - t0) / len(works)
    sizes = [len(pickle.dumps(w)) for w in works]
    scan_bytes = sum(f.stat().st_size for f in scans) / sum(len(load_pages(f)) for f in scans)
    with tempfile.TemporaryDirectory() as tmp:
        led = open_ledger(Path(tmp) / "out")
        run = led.start_run(layout_path="l.toml", layout_sha256="0", model_path="m", model_sha256="0", threshold=0.9,
                            command="benchmark")
        t0 = time.perf_counter()
        for i in range(args.pages):
            row = copy.copy(works[i % len(works)].row)
            row.content_hash = f"{i:064x}"
            led.write_page(run, row)
        write_seconds = (time.perf_counter() - t0) / args.pages
        led.close()
    rep = {"pages_written": args.pages, "writer_pages_per_second": 1.0 / write_seconds,
           "page_work_seconds_one_core": read_seconds, "page_work_bytes_mean": sum(sizes) / len(sizes),
           "scan_bytes_per_page_mean": scan_bytes}
    if args.json:
        print(json.dumps(rep))
    else:
        print(f"one ledger writer: {rep['writer_pages_per_second']:.0f} pages/s ({1000 * write_seconds:.1f} ms a page,"
              f" real rows with their images and digit files, {args.pages} pages)")
        print(f"a page's work, worker to writer: {rep['page_work_bytes_mean'] / 1024:.0f} KiB; a scan: "
              f"{scan_bytes / 1024:.0f} KiB a page (demo set)")
        print(f"the page work itself: {1000 * read_seconds:.0f} ms a page on one core (demo pages)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
