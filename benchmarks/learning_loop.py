"""The learning loop as an office lives it: a first batch, a clerk's review, `formread learn`, the next batch.

Every step is the command a person would type (run as a child process of this interpreter):

1. ``formread demo make`` a first batch (default 200 pages) and a next batch (default 60 pages) of
   other pages; with ``--style``/``--form``/``--halves`` the development scenario of writers, pens
   and forms the shipped model never saw, the two batches written by the two halves of the MNIST
   test part's writers (``--half a`` / ``--half b``);
2. ``formread read`` the first batch with the shipped model (a fresh, empty model store:
   ``FORMREAD_HOME`` points into the work folder);
3. the clerk: every field sent to review (spot checks included) is decided from the batch's truth,
   written as a decisions file and applied with ``formread review OUT --apply FILE``;
4. ``formread learn OUT``;
5. ``formread read`` the next batch with the bundle now in use, and (for comparison) with the shipped one;
6. ``formread score`` both batches against their truth, ``formread report`` for the spot checks.

Prints cold-start and after-learning figures (field accuracy before review, review rate with the
spot checks, error among accepted, writer mistakes accepted).  Held-out data: the demo's
handwriting is the MNIST sample's test part; a learnt model has trained on the first batch's
digits (half a with ``--halves``), so its figures on ``mnist:test`` are not held out any more,
while the next batch (half b) was never trained on.  ``--json`` prints one object.

    python benchmarks/learning_loop.py [--work DIR] [--count 200 --next 60] [--style S --form F --halves] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def formread(*args, env=None, ok=(0, 3)) -> str:
    cmd = [sys.executable, "-c", "import sys; from formread.cli.main import main; sys.exit(main())", *map(str, args)]
    res = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if res.returncode not in ok:
        raise SystemExit(f"formread {' '.join(map(str, args[:2]))} failed ({res.returncode}): "
                         f"{res.stderr.strip()[-600:]}")
    return res.stdout


def make_set(work: Path, name: str, count: int, seed: int, extra: list[str]) -> Path:
    d = work / name
    if not (d / "truth.jsonl").exists():
        formread("demo", "make", "--count", count, "--seed", seed, *extra, d, "--quiet")
    return d


def scans(d: Path) -> list[str]:
    return sorted(str(p) for p in d.iterdir() if p.name.startswith("scan_"))


def clerk_decisions(outdir: Path, truth: Path, dest: Path) -> int:
    """A decisions file for every field waiting for review, from the truth (what the clerk sees on paper)."""
    import sqlite3

    known = {}
    for line in truth.read_text().splitlines():
        if line.strip():
            t = json.loads(line)
            known[(Path(t["source"]).name, int(t["page_number"]))] = t["fields"]
    conn = sqlite3.connect(outdir / "ledger.sqlite")
    rows = conn.execute("SELECT p.source, p.page_number, f.name FROM fields f JOIN pages p ON p.id = f.page_id "
                        "WHERE f.decision = 'review' AND f.final_status IS NULL").fetchall()
    conn.close()
    n = 0
    with dest.open("w") as f:
        for src, page, name in rows:
            value = known.get((Path(src).name, page), {}).get(name)
            if value is not None:
                f.write(json.dumps({"source": Path(src).name, "page_number": page, "field": name, "value": value})
                        + "\n")
                n += 1
    return n


def score(outdir: Path, truth: Path, env) -> dict:
    s = json.loads(formread("score", outdir, "--truth", truth, "--json", env=env))
    keys = ("fields", "accepted", "review", "audited", "wrong_accepted", "error_among_accepted", "review_rate",
            "field_accuracy_before_review", "digit_accuracy", "writer_mistakes", "writer_mistakes_accepted")
    out = {k: s.get(k) for k in keys}
    out["review_rate_without_spot_checks"] = (s["review"] - s.get("audited", 0)) / s["fields"] if s["fields"] else None
    return out


def run(args) -> dict:
    work = args.work
    work.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ, FORMREAD_HOME=str(work / "home"))
    extra1, extra2 = list(args.make), list(args.make)
    if args.halves:
        extra1 += ["--half", "a"]
        extra2 += ["--half", "b"]
    t0 = time.perf_counter()
    first = make_set(work, f"first_s{args.seed}", args.count, args.seed, extra1)
    nxt = make_set(work, f"next_s{args.seed + 1}", args.next, args.seed + 1, extra2)
    made = time.perf_counter() - t0
    stamp = str(int(time.time()))
    out1 = work / f"read_first_{stamp}"
    formread("read", *scans(first), "--layout", first / "layout.toml", "--out", out1, "--quiet", env=env)
    cold = score(out1, first / "truth.jsonl", env)
    decisions = work / f"decisions_{stamp}.jsonl"
    n = clerk_decisions(out1, first / "truth.jsonl", decisions)
    formread("review", out1, "--apply", decisions, "--reviewer", "clerk", env=env)
    report = json.loads(formread("report", out1, "--json", env=env))
    t1 = time.perf_counter()
    learned = json.loads(formread("learn", out1, "--json", "--quiet", env=env))
    learn_seconds = time.perf_counter() - t1
    out2 = work / f"read_next_{stamp}"
    formread("read", *scans(nxt), "--layout", nxt / "layout.toml", "--out", out2, "--quiet", env=env)
    after = score(out2, nxt / "truth.jsonl", env)
    out2c = work / f"read_next_cold_{stamp}"
    shipped = [sys.executable, "-c", "from formread.store import shipped_model; print(shipped_model())"]
    model = subprocess.run(shipped, capture_output=True, text=True, check=True).stdout.strip()
    formread("read", *scans(nxt), "--layout", nxt / "layout.toml", "--out", out2c, "--model", model, "--quiet",
             env=env)
    next_cold = score(out2c, nxt / "truth.jsonl", env)
    return {"work": str(work), "first_batch": {"set": str(first), "cold": cold, "decided": n,
                                               "spot_check_report": {k: report[k] for k in (
                                                   "audited", "audited_decided", "audited_wrong",
                                                   "error_among_accepted", "error_upper_95")}},
            "learn": {k: learned[k] for k in ("promoted", "reason", "split", "samples", "resegmented", "before",
                                                "after", "original_before", "original_after", "bundle_after")},
            "learn_seconds": learn_seconds, "next_batch": {"set": str(nxt), "shipped": next_cold, "learned": after},
            "make_seconds": made, "goal": {"review_rate_max": 0.15, "error_among_accepted_max": 0.003,
                                           "field_accuracy_min": 0.95, "writer_mistakes_accepted": 0}}


def _pct(v) -> str:
    return "-" if v is None else f"{100 * v:.2f}%"


def show(rep: dict) -> None:
    c = rep["first_batch"]["cold"]
    ns, nl = rep["next_batch"]["shipped"], rep["next_batch"]["learned"]
    print(f"first batch: {rep['first_batch']['set']}  next batch: {rep['next_batch']['set']}")
    print(f"{'':34}{'first, cold':>14}{'next, shipped':>15}{'next, learnt':>14}")
    for key, label in (("field_accuracy_before_review", "field accuracy before review"),
                       ("review_rate", "review rate (spot checks in)"),
                       ("review_rate_without_spot_checks", "review rate (spot checks out)"),
                       ("error_among_accepted", "error among accepted"),
                       ("digit_accuracy", "digit accuracy")):
        print(f"{label:34}{_pct(c[key]):>14}{_pct(ns[key]):>15}{_pct(nl[key]):>14}")
    for key, label in (("wrong_accepted", "wrong among accepted"), ("accepted", "accepted"),
                       ("writer_mistakes_accepted", "writer mistakes accepted")):
        print(f"{label:34}{c[key]:>14}{ns[key]:>15}{nl[key]:>14}")
    sc = rep["first_batch"]["spot_check_report"]
    print(f"spot checks of the first batch: {sc['audited_decided']} decided, {sc['audited_wrong']} wrong "
          f"(estimate {_pct(sc['error_among_accepted'])}, 95% upper bound {_pct(sc['error_upper_95'])})")
    le = rep["learn"]
    print(f"learn: {'promoted' if le['promoted'] else 'not promoted'} ({le['reason']}); {le['samples']} digit "
          f"samples, {le['resegmented']} fields cut again; {rep['learn_seconds']:.0f} s")
    for p in le["original_before"]:
        print(f"  {p}: {le['original_before'][p]:.4f} -> {le['original_after'][p]:.4f}")
    g = rep["goal"]
    met = (nl["review_rate"] <= g["review_rate_max"]
           and (nl["error_among_accepted"] or 0) <= g["error_among_accepted_max"]
           and nl["field_accuracy_before_review"] >= g["field_accuracy_min"] and nl["writer_mistakes_accepted"] == 0)
    print(f"goal on the next batch (review <= 15%, <= 0.3% wrong among accepted, accuracy >= 95%, no writer "
          f"mistake accepted): {'met' if met else 'not met'}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--work", type=Path, default=None, help="keep sets and outputs here (default: a temporary folder)")
    ap.add_argument("--count", type=int, default=200, help="pages of the first batch")
    ap.add_argument("--next", type=int, default=60, help="pages of the next batch")
    ap.add_argument("--seed", type=int, default=301, help="seed of the first batch (the next one: seed + 1)")
    ap.add_argument("--make", nargs=argparse.REMAINDER, default=[],
                    help="more options for `formread demo make` (e.g. --style felt --form slip), last")
    ap.add_argument("--halves", action="store_true", help="first batch from MNIST test half a, next from half b")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        if args.work is None:
            args.work = Path(tmp)
        rep = run(args)
    print(json.dumps(rep) if args.json else "", end="\n" if args.json else "")
    if not args.json:
        show(rep)
    return 0


if __name__ == "__main__":
    sys.exit(main())
