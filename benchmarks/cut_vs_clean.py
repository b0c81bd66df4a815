"""Digit accuracy on the same handwritten digits, clean and cut from scanned forms.

Makes demo forms (``make_demo``, fixed seed; every digit on them is an image of the MNIST
sample's test part, never trained on), reads them with ``read_batch`` exactly as
``formread read`` does, and for every field whose chosen segmentation has as many digits as
the value written compares the network's reading of

* the **clean** digit: the MNIST image itself, normalised as training data is
  (``formread.learn.datasets``), and
* the **cut** digit: the image the reader cut from the scan (``digits/<page>/<field>.npz``).

The gap between the two is what imaging and segmentation cost.  Fields whose segmentation
has another digit count are counted apart (``length_mismatch``): their digits were merged or
split, which no digit accuracy can show.  Per style (the demo scanner range, the
development writer and scanner styles of ``formread demo make --style``) and per field kind.

    python benchmarks/cut_vs_clean.py [--styles demo,mixed] [--pages 60] [--seed 106]
                                      [--model FILE ...] [--keep DIR] [--json]

The default seed 106 is a development seed (not the shipped demo's seed 7, not the seed 11
check set).  With several ``--model`` files each reads the same pages.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def make_pages(folder: Path, style: str, pages: int, seed: int) -> list[dict]:
    """Demo pages in ``folder`` (reused when already made with these settings); MNIST indices per page."""
    from formread.demo import make_demo

    meta = folder / "cut_vs_clean.json"
    want = {"style": style, "pages": pages, "seed": seed}
    if meta.is_file():
        d = json.loads(meta.read_text())
        if d.get("settings") == want:
            return d["mnist_by_page"]
    made = make_demo(folder, count=pages, seed=seed, style=style)
    meta.write_text(json.dumps({"settings": want, "mnist_by_page": made["mnist_by_page"]}))
    return made["mnist_by_page"]


def _truth_order(folder: Path) -> list[tuple[str, int]]:
    rows = [json.loads(line) for line in (folder / "truth.jsonl").read_text().splitlines() if line.strip()]
    return [(r["source"], int(r["page_number"])) for r in rows]


def cut_digits(folder: Path, out: Path, model, by_page: list[dict], command: str = "benchmarks/cut_vs_clean.py"
               ) -> tuple[dict, float]:
    """Read the pages of ``folder`` into ``out`` as ``formread read`` does and gather, per field kind, the
    digits of every field cut to its written length.

    Returns ({kind: {"cut": (N, 1, 28, 28) float32, "mnist": (N,) MNIST indices of the same digits,
    "fields": fields written, "length_mismatch": fields cut to another length}}, seconds of the read).
    """
    from formread.ledger.fieldfile import load_digits
    from formread.ledger.store import open_ledger
    from formread.read.batch import SCAN_SUFFIXES, read_batch

    scans = sorted(p for p in folder.iterdir() if p.suffix.lower() in SCAN_SUFFIXES)
    t0 = time.perf_counter()
    read_batch(scans, folder / "layout.toml", out, bundle=model, workers=2, command=command)
    seconds = time.perf_counter() - t0
    index = {key: i for i, key in enumerate(_truth_order(folder))}
    got = {kind: {"cut": [], "mnist": [], "fields": 0, "length_mismatch": 0} for kind in ("boxed", "open")}
    with open_ledger(out) as ledger:
        rows = ledger.field_rows()
    for r in rows:
        key = (Path(r["source"]).name, int(r["page_number"]))
        if key not in index:
            continue
        used = by_page[index[key]].get(r["name"], [])
        if not used:
            continue                     # a field left empty on paper
        g = got[r["kind"]]
        g["fields"] += 1
        d = load_digits(out / r["digits_path"]) if r.get("digits_path") else np.zeros((0, 1, 28, 28), np.float32)
        if len(d) != len(used):
            g["length_mismatch"] += 1
            continue
        g["mnist"] += list(used)
        g["cut"].append(d)
    for g in got.values():
        g["cut"] = np.concatenate(g["cut"]) if g["cut"] else np.zeros((0, 1, 28, 28), np.float32)
        g["mnist"] = np.asarray(g["mnist"], np.int64)
    return got, seconds


def _measure(folder: Path, out: Path, model, by_page: list[dict]) -> dict:
    from formread.digits import normalize_batch
    from formread.learn.datasets import mnist_raw
    from formread.read.bundle import load_bundle

    got, seconds = cut_digits(folder, out, model, by_page)
    bundle = load_bundle(model)
    images, labels = mnist_raw()
    res: dict = {"model": str(model), "read_seconds": round(seconds, 2)}
    for kind, g in got.items():
        if not len(g["mnist"]):
            res[kind] = {"fields": g["fields"], "digits": 0}
            continue
        idx = g["mnist"]
        y = labels[idx]
        clean = normalize_batch(images[idx])
        acc_clean = float((bundle.predict_proba(clean).argmax(1) == y).mean())
        acc_cut = float((bundle.predict_proba(g["cut"]).argmax(1) == y).mean())
        res[kind] = {"fields": g["fields"], "length_mismatch": g["length_mismatch"], "digits": int(len(y)),
                     "clean": round(acc_clean, 4), "cut": round(acc_cut, 4),
                     "gap_points": round(100 * (acc_clean - acc_cut), 2)}
    return res


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--styles", default="demo,mixed", help="demo styles, comma-separated (default demo,mixed)")
    ap.add_argument("--pages", type=int, default=60, help="pages per style (default 60)")
    ap.add_argument("--seed", type=int, default=106, help="make_demo seed (default 106, a development seed)")
    ap.add_argument("--model", type=Path, action="append", default=None,
                    help="model bundle (default: the shipped one); repeat to compare")
    ap.add_argument("--keep", type=Path, default=None, help="folder for the pages, reused when already made")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)
    from formread.store import shipped_model

    models = args.model or [shipped_model()]
    results = []
    with tempfile.TemporaryDirectory(prefix="formread-cut-vs-clean-") as tmp:
        base = args.keep or Path(tmp)
        for style in args.styles.split(","):
            folder = base / f"{style}-{args.seed}-{args.pages}"
            folder.mkdir(parents=True, exist_ok=True)
            by_page = make_pages(folder, style, args.pages, args.seed)
            for k, model in enumerate(models):
                out = Path(tmp) / f"out-{style}-{k}"
                r = _measure(folder, out, model, by_page)
                r["style"] = style
                results.append(r)
                if not args.json:
                    for kind in ("boxed", "open"):
                        f = r[kind]
                        if not f.get("digits"):
                            continue
                        print(f"{style:<8} {kind:<6} {r['model']}: clean {f['clean']:.4f}  cut {f['cut']:.4f}  "
                              f"gap {f['gap_points']:+.2f} pt  ({f['digits']} digits of {f['fields']} fields; "
                              f"{f['length_mismatch']} fields cut to another length)")
    if args.json:
        print(json.dumps({"pages": args.pages, "seed": args.seed, "results": results}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
