"""How trustworthy are field confidences: error among accepted fields against review rate.

Two modes.

**cli** (the honest figures): makes a demo set with ``formread demo make`` (or uses
the shipped ``demo_forms/``), reads it with ``formread read``, scores it with
``formread score --json`` and ``formread tune --json``, then prints per field the
accuracy before review and, over a range of thresholds, the review rate and the
error among accepted fields (the error-versus-review curve)::

    python benchmarks/decision_quality.py cli --seed 101 --count 60 [--work DIR]
    python benchmarks/decision_quality.py cli --shipped --threshold 0.97
    python benchmarks/decision_quality.py cli --seed 11 --count 60 --threshold 0.97

``--threshold`` reads with that page threshold (as a lead would after tuning);
without it the layout's threshold is used.  ``formread tune`` always reports the
threshold it would choose on the set (target ``--target``, default 0.5%).

**fast** (development loop for the decoder): the imaging and the network run once
per page (library calls, as ``formread read`` does) and the evidence is cached in
``WORK/evidence.npz``; every later run only re-decodes with the current
``formread/read/decode.py`` and scores in-process (same curve and threshold choice
as ``formread tune``), which takes about a second (the cache keeps the segmentation
of the time it was made: delete ``WORK/evidence_*.npz`` after changing imaging)::

    python benchmarks/decision_quality.py fast --seed 101 --count 60 [--work DIR] [--threshold T]

Both modes read with the set's own ``layout.toml`` (the demo layout of the time the set
was made); ``--layout FILE`` reads with another one, e.g. the current
``formread/demo/layout.toml`` after changing its rules.

Tune only on a development set (seeds 101 and 102 by convention); the shipped set
(seed 7) and a fresh set (seed 11) are for measuring.  ``--json`` prints one object.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

THRESHOLDS = (0.5, 0.8, 0.9, 0.95, 0.97, 0.98, 0.99, 0.995, 0.999)


def _formread(*args: str) -> str:
    """Run the CLI of the interpreter running this script; its stdout."""
    cmd = [sys.executable, "-c", "import sys; from formread.cli.main import main; sys.exit(main())", *args]
    res = subprocess.run(cmd, capture_output=True, text=True)
    if res.returncode not in (0, 3):
        raise SystemExit(f"{' '.join(args[:2])} failed ({res.returncode}): {res.stderr.strip()[-400:]}")
    return res.stdout


def _demo_set(args, work: Path) -> Path:
    """The folder holding the scans, layout.toml and truth.jsonl."""
    if args.shipped:
        from formread.store import demo_forms as demo_dir

        return demo_dir()
    d = work / f"set_seed{args.seed}_n{args.count}"
    if not (d / "truth.jsonl").exists():
        _formread("demo", "make", "--count", str(args.count), "--seed", str(args.seed), str(d))
    return d


def _scans(d: Path) -> list[str]:
    return sorted(str(p) for p in d.iterdir() if p.name.startswith("scan_"))


def _per_field(records: list[dict], truth_path: Path) -> dict:
    """Per field name: arrays of confidence, correct, eligible (no rule failure / doubt)."""
    from formread.read.score import load_truth

    truth = {(Path(t.source).name, t.page_number): t.fields for t in load_truth(truth_path)}
    out: dict[str, dict[str, list]] = {}
    for r in records:
        key = (Path(r["source"]).name, int(r["page_number"]))
        name = r.get("field") or r.get("name")
        if key not in truth or name not in truth[key]:
            continue
        d = out.setdefault(name, {"conf": [], "correct": [], "eligible": []})
        d["conf"].append(float(r.get("confidence") or 0.0))
        d["correct"].append(r.get("reading") == truth[key][name])
        reason = r.get("reason")
        d["eligible"].append(reason in (None, "low_confidence"))
    return {k: {kk: np.asarray(vv) for kk, vv in v.items()} for k, v in out.items()}


def _figures(conf, correct, eligible, thresholds) -> list[dict]:
    rows = []
    n = conf.size
    for t in thresholds:
        acc = eligible & (conf >= t)
        na = int(acc.sum())
        wrong = int((acc & ~correct).sum())
        rows.append({"threshold": float(t), "review_rate": 1.0 - na / n if n else 0.0,
                     "error_among_accepted": wrong / na if na else 0.0, "accepted": na, "wrong_accepted": wrong})
    return rows


def _report(per_field: dict, thresholds, target: float, run_threshold: float | None = None) -> dict:
    from formread.read.tune import choose_threshold

    allc = np.concatenate([v["conf"] for v in per_field.values()])
    allk = np.concatenate([v["correct"] for v in per_field.values()])
    alle = np.concatenate([v["eligible"] for v in per_field.values()])
    tr = choose_threshold(allc, allk, alle, target=target)
    ts = sorted(set(thresholds) | {tr.threshold} | ({run_threshold} if run_threshold is not None else set()))
    out = {"fields": int(allc.size), "field_accuracy_before_review": float(allk.mean()),
           "tune": tr.summary(), "all": _figures(allc, allk, alle, ts), "per_field": {}}
    for name, v in per_field.items():
        out["per_field"][name] = {"fields": int(v["conf"].size), "accuracy": float(v["correct"].mean()),
                                  "curve": _figures(v["conf"], v["correct"], v["eligible"], ts)}
    return out


def _print(rep: dict, head: str) -> None:
    print(head)
    if "score" in rep:
        sc = rep["score"]
        print(f"  formread score at the run's threshold {sc['threshold']}: review {sc['review_rate']:.1%}  "
              f"error among accepted {sc['error_among_accepted']:.2%} ({sc['wrong_accepted']}/{sc['accepted']})  "
              f"accuracy before review {sc['field_accuracy_before_review']:.1%}  digits {sc['digit_accuracy']:.1%}")
    t = rep["tune"]
    print(f"  fields {rep['fields']}  accuracy before review {rep['field_accuracy_before_review']:.1%}")
    print(f"  tuned threshold (target {t['target']:.2%}): {t['threshold']:.6f}  review {t['review_rate']:.1%}  "
          f"error among accepted {t['error_among_accepted']:.2%} ({t['wrong_accepted']}/{t['accepted']})  "
          f"upper bound {t['upper_bound']:.2%}  met {t['met']}")
    names = ["all"] + sorted(rep["per_field"])
    ts = [r["threshold"] for r in rep["all"]]
    print("  threshold   " + "  ".join(f"{n[:16]:>16}" for n in names) + "   (review% / error% among accepted)")
    for i, th in enumerate(ts):
        cells = []
        for n in names:
            r = rep["all"][i] if n == "all" else rep["per_field"][n]["curve"][i]
            cells.append(f"{100 * r['review_rate']:7.1f}/{100 * r['error_among_accepted']:5.2f}")
        print(f"  {th:9.6f}   " + "  ".join(f"{c:>16}" for c in cells))
    print("  accuracy    " + "  ".join(f"{'':>16}" if n == "all" else f"{rep['per_field'][n]['accuracy']:16.1%}"
                                        for n in names))


def _layout(args, d: Path) -> Path:
    return args.layout if args.layout is not None else d / "layout.toml"


def run_cli(args, work: Path) -> dict:
    d = _demo_set(args, work)
    out = work / f"read_{d.name}_{int(time.time())}"
    extra = ["--threshold", str(args.threshold)] if args.threshold is not None else []
    t0 = time.perf_counter()
    _formread("read", *_scans(d), "--layout", str(_layout(args, d)), "--out", str(out), *extra)
    seconds = time.perf_counter() - t0
    score = json.loads(_formread("score", str(out), "--truth", str(d / "truth.jsonl"), "--json"))
    tune = json.loads(_formread("tune", str(out), "--truth", str(d / "truth.jsonl"),
                                "--target", str(args.target), "--json"))
    records = [json.loads(line) for line in (out / "fields.jsonl").read_text().splitlines() if line.strip()]
    rep = _report(_per_field(records, d / "truth.jsonl"), THRESHOLDS, args.target, args.threshold)
    rep.update(set=str(d), out=str(out), read_seconds=seconds, score=score, formread_tune=tune)
    return rep


# ---------------------------------------------------------------- fast mode: cached evidence

def _extract(d: Path, cache: Path) -> None:
    """Imaging + network once per page; evidence saved in one npz (no pickle) plus a JSON index."""
    from formread.errors import FormreadError
    from formread.form.layout import load_layout
    from formread.imaging.load import load_pages
    from formread.imaging.pipeline import process_page
    from formread.read.bundle import load_bundle
    from formread.read.recognise import recognise_page
    from formread.store import in_use_path as default_model_path

    layout = load_layout(d / "layout.toml")
    bundle = load_bundle(default_model_path())
    arrays, index = {}, []
    for scan in _scans(d):
        for page in load_pages(scan):
            entry = {"source": Path(scan).name, "page_number": page.page_number, "fields": {}}
            index.append(entry)
            try:
                pd = process_page(page, layout)
            except FormreadError as e:
                entry["error"] = str(e)
                continue
            ev = recognise_page(pd.fields, bundle)
            for name, fe in ev.items():
                key = f"{len(index) - 1}/{name}"
                entry["fields"][name] = {"doubtful": fe.doubtful, "reason": fe.reason,
                                         "costs": [c.cost for c in fe.candidates]}
                for i, c in enumerate(fe.candidates):
                    arrays[f"{key}/{i}/p"] = np.asarray(c.probs, np.float32).reshape(-1, 10)
                    if c.blank is not None:
                        arrays[f"{key}/{i}/b"] = np.asarray(c.blank, bool)
    np.savez_compressed(cache, **arrays)
    cache.with_suffix(".json").write_text(json.dumps(index))


def _load_cache(cache: Path):
    from formread.read.decode import CandidateEvidence, FieldEvidence

    index = json.loads(cache.with_suffix(".json").read_text())
    z = np.load(cache, allow_pickle=False)
    pages = []
    for pi, entry in enumerate(index):
        ev = None
        if "error" not in entry:
            ev = {}
            for name, f in entry["fields"].items():
                cands = []
                for i, cost in enumerate(f["costs"]):
                    b = z[f"{pi}/{name}/{i}/b"] if f"{pi}/{name}/{i}/b" in z.files else None
                    cands.append(CandidateEvidence(z[f"{pi}/{name}/{i}/p"], cost, b))
                ev[name] = FieldEvidence(name, cands, f["doubtful"], f["reason"])
        pages.append((entry["source"], entry["page_number"], ev))
    return pages


def decode_cached(pages, layout_path: Path, threshold=None, confidence=None, **kw) -> list[dict]:
    """Re-decode cached evidence with the current decoder; records like ``fields.jsonl``.

    ``confidence``: the decoder constants (default: those of the model bundle in use)."""
    from formread.form.layout import load_layout
    from formread.form.thresholds import resolve_thresholds
    from formread.read.bundle import load_bundle
    from formread.read.decode import decode_page, unregistered_page
    from formread.store import in_use_path as default_model_path

    layout = load_layout(layout_path)
    bundle = load_bundle(default_model_path())
    confidence = bundle.decoder if confidence is None else confidence
    thresholds = resolve_thresholds(layout, explicit=threshold, fitted=bundle.fitted_threshold(layout.name))
    records = []
    for source, page_number, ev in pages:
        rs = unregistered_page(layout, thresholds=thresholds) if ev is None else \
            decode_page(ev, layout, confidence=confidence, thresholds=thresholds, **kw)
        for name, r in rs.items():
            rec = r.to_record()
            rec.update(source=source, page_number=page_number, field=name)
            records.append(rec)
    return records


def run_fast(args, work: Path) -> dict:
    d = _demo_set(args, work)
    cache = work / f"evidence_{d.name}.npz"
    if not cache.exists():
        _extract(d, cache)
    pages = _load_cache(cache)
    t0 = time.perf_counter()
    records = decode_cached(pages, _layout(args, d), args.threshold)
    seconds = time.perf_counter() - t0
    rep = _report(_per_field(records, d / "truth.jsonl"), THRESHOLDS, args.target, args.threshold)
    rep.update(set=str(d), decode_seconds=seconds)
    return rep


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("mode", choices=("cli", "fast"))
    ap.add_argument("--seed", type=int, default=101)
    ap.add_argument("--count", type=int, default=60)
    ap.add_argument("--shipped", action="store_true", help="use the shipped demo_forms/ (seed 7)")
    ap.add_argument("--work", type=Path, default=None, help="keep sets, caches and outputs here")
    ap.add_argument("--threshold", type=float, default=None)
    ap.add_argument("--layout", type=Path, default=None, help="read with this layout (default: the set's own)")
    ap.add_argument("--target", type=float, default=0.005)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        rep = (run_cli if args.mode == "cli" else run_fast)(args, work)
    if args.json:
        print(json.dumps(rep))
    else:
        _print(rep, f"{args.mode}: {rep['set']}" + (f"  (threshold {args.threshold})" if args.threshold else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
