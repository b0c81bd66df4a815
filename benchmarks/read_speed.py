"""Pages per second of the batch reader, end to end, and where the time goes.

Makes demo pages with ``make_demo`` (fixed seed) in a temporary folder, then reads
them into a fresh output folder with ``read_batch`` exactly as ``formread read``
does (layout, model and rules loaded, worker processes started, every page
decoded, registered, segmented, recognised, decoded, written to the ledger with
its images, outputs rebuilt).  Prints the figures; ``--json`` prints one object.

    python benchmarks/read_speed.py [--pages 100] [--workers 2] [--seed 3] [--keep DIR] [--json]

``imaging_seconds`` is the time the imaging step took summed over pages (decoding
the files in the main process, the rest in the workers, so it can exceed the wall
time); ``recognition_seconds`` is the network plus decoding, in the workers too;
``writing_seconds`` the ledger and image files, in the main process.
``cpu_seconds_per_page`` is the CPU time of the reader and its workers per page,
and ``cpu_bound_pages_per_second`` the rate it allows on the CPUs the run may use
(min(CPUs, workers + 1)) when nothing else competes for them: an upper bound to
read beside the wall-clock figure on a busy machine (``load_average_before``).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path


def _cpu_seconds() -> float:
    """User + system CPU seconds of this process and its finished children (the imaging workers)."""
    import resource

    a, b = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=100, help="demo pages to read (default 100)")
    ap.add_argument("--workers", type=int, default=2, help="imaging worker processes (default 2)")
    ap.add_argument("--seed", type=int, default=3, help="make_demo seed (default 3)")
    ap.add_argument("--model", type=Path, default=None, help="model file (default: the shipped one)")
    ap.add_argument("--keep", type=Path, default=None,
                    help="folder for the demo pages, reused when it already holds them")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)

    from formread.demo import make_demo
    from formread.read.batch import SCAN_SUFFIXES, read_batch

    with tempfile.TemporaryDirectory(prefix="formread-read-speed-") as tmp:
        pages_dir = args.keep or Path(tmp) / "pages"
        truth = pages_dir / "truth.jsonl"
        made = None
        if not (truth.is_file() and len(truth.read_text().splitlines()) == args.pages):
            made = make_demo(pages_dir, count=args.pages, seed=args.seed)
        scans = sorted(p for p in pages_dir.iterdir() if p.suffix.lower() in SCAN_SUFFIXES)
        out = Path(tmp) / "out"
        load_before = os.getloadavg()[0]
        cpu0 = _cpu_seconds()
        t0 = time.perf_counter()
        rep = read_batch(scans, pages_dir / "layout.toml", out, bundle=args.model, workers=args.workers,
                         command="benchmarks/read_speed.py")
        wall = time.perf_counter() - t0
        cpu = _cpu_seconds() - cpu0
    res = {
        "pages_per_second": round(rep.pages / wall, 3),
        "pages": rep.pages, "read": rep.read, "failed": rep.failed + rep.unregistered,
        "wall_seconds": round(wall, 2),
        "imaging_seconds": round(rep.imaging_seconds, 2),
        "imaging_seconds_per_page": round(rep.imaging_seconds / max(1, rep.pages), 4),
        "recognition_seconds": round(rep.recognition_seconds, 2),
        "recognition_seconds_per_page": round(rep.recognition_seconds / max(1, rep.pages), 4),
        "writing_seconds": round(rep.writing_seconds, 2),
        # CPU time of the reader and its workers: what the machine must give per page, whatever else runs
        "cpu_seconds_per_page": round(cpu / max(1, rep.pages), 4),
        "cpu_bound_pages_per_second": round(min(os.cpu_count() or 1, args.workers + 1) * rep.pages / cpu, 3)
        if cpu > 0 else None,
        "load_average_before": round(load_before, 2),
        "imaging_stages": {k: round(v, 2) for k, v in sorted(rep.stages.items())},
        "workers": args.workers, "cpus": os.cpu_count(), "seed": args.seed,
        "make_demo_seconds": None if made is None else made["seconds"],
        "python": platform.python_version(),
    }
    if args.json:
        print(json.dumps(res))
    else:
        print(f"read {rep.pages} demo pages in {wall:.1f} s: {res['pages_per_second']:.2f} pages/s "
              f"({args.workers} workers, {os.cpu_count()} CPUs)")
        print(f"  imaging      {rep.imaging_seconds:7.2f} s summed over pages "
              f"({res['imaging_seconds_per_page'] * 1000:.0f} ms/page, in the workers)")
        for k, v in res["imaging_stages"].items():
            print(f"    {k:<12} {v:7.2f} s")
        print(f"  recognition  {rep.recognition_seconds:7.2f} s "
              f"({res['recognition_seconds_per_page'] * 1000:.0f} ms/page: network + decoding)")
        print(f"  writing      {rep.writing_seconds:7.2f} s (ledger rows and image files)")
        print(f"  CPU time     {res['cpu_seconds_per_page'] * 1000:.0f} ms/page (reader + workers): "
              f"{res['cpu_bound_pages_per_second']} pages/s if the CPUs were free "
              f"(load average before the run: {res['load_average_before']})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
