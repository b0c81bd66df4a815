"""The ledger against known answers: scoring and threshold tuning of a read run.

Ground truth is a ``truth.jsonl`` file (format and page matching in
:mod:`formread.read.score`), or, for tuning, the fields a clerk has already
reviewed (their final value of confirmed / corrected / empty fields).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..errors import DataError, check_param
from ..form.rules import check_field, check_relations
from ..ledger.store import ledger_path, open_ledger
from .runs import page_layout, run_layouts
from .score import score_readings, write_curve_png
from .tune import choose_threshold

__all__ = ["ledger_readings", "score_ledger", "tune_ledger", "ELIGIBLE_REASONS",
           "SUMMARY_KEYS"]

ELIGIBLE_REASONS = (None, "low_confidence", "audit")
"""Reasons under which a field's decision depends on the threshold alone (rules hold, segmentation sure)."""

SUMMARY_KEYS = ("pages", "fields", "accepted", "review", "wrong_accepted", "error_among_accepted", "review_rate",
                "field_accuracy_before_review", "digit_accuracy")
"""Keys of the summary shared by ``formread score --json`` and ``formread demo --json``."""


def ledger_readings(outdir) -> tuple[list[dict], dict | None]:
    """Every field of the ledger as a reading record for :func:`formread.read.score.score_readings`.

    Returns
    -------
    (records, last_run): records with ``source``, ``page_number``, ``field``, ``reading``,
    ``confidence``, ``decision``, ``reason``, ``final_value``, ``final_status``; and the latest run row.

    Raises
    ------
    LedgerError
        No ledger in ``outdir``.
    """
    recs, run, _ = _ledger_records(outdir)
    return recs, run


def _ledger_records(outdir):
    with open_ledger(outdir, create=False) as led:
        rows = led.field_rows()
        run = led.last_run()
        layouts = run_layouts(led)
    recs = [{"source": r["source"], "page_number": r["page_number"], "field": r["name"], "reading": r["reading"],
             "confidence": float(r["confidence"] or 0.0), "decision": r["decision"], "reason": r["reason"],
             "final_value": r["final_value"], "final_status": r["final_status"], "audit": bool(r["audit"]),
             "run_id": r["run_id"], "form": r["form"]} for r in rows]
    return recs, run, layouts


def writer_mistakes(scored, run_of: dict, layouts: dict) -> dict:
    """Truth values that break their own field's rules, and pages whose truth breaks a relation.

    A writer's mistake must reach a person: ``accepted`` counts those the reader accepted (a field
    mistake accepted, or a relation mistake whose every field was accepted), which must be 0.

    Parameters
    ----------
    scored : list of FieldScore (formread.read.score)
    run_of : dict (source base name, page_number) -> (run id, form)
    layouts : from formread.read.runs.run_layouts

    Returns
    -------
    dict: ``fields`` (field mistakes), ``fields_accepted``, ``relations`` (page relation mistakes),
    ``relations_accepted``, ``accepted`` (the sum), ``list`` (the accepted ones, as text)
    """
    pages: dict = {}
    for f in scored:
        pages.setdefault((f.source, f.page_number), []).append(f)
    out: dict[str, Any] = {"fields": 0, "fields_accepted": 0, "relations": 0, "relations_accepted": 0, "list": []}
    for key, fields in pages.items():
        where = run_of.get((Path(key[0]).name, key[1]))
        layout = None if where is None else page_layout(layouts, *where)
        if layout is None:
            continue
        compiled = layout.rules
        assert compiled is not None  # compiled when the layout loaded
        for f in fields:
            if f.field in compiled.fields and not all(check_field(compiled, f.field, f.truth).values()):
                out["fields"] += 1
                if f.decision == "accepted":
                    out["fields_accepted"] += 1
                    out["list"].append(f"{f.source} page {f.page_number} {f.field}: {f.truth!r} accepted as "
                                       f"{f.reading!r}")
        by_name = {f.field: f for f in fields}
        for text, ok in check_relations(compiled, {f.field: f.truth for f in fields}).items():
            if ok is False:
                out["relations"] += 1
                rel = next(r for r in compiled.relations if r.text == text)
                if all(n in by_name and by_name[n].decision == "accepted" for n in rel.fields):
                    out["relations_accepted"] += 1
                    out["list"].append(f"{key[0]} page {key[1]}: {text} broken on paper, all accepted")
    out["accepted"] = out["fields_accepted"] + out["relations_accepted"]
    return out


def score_ledger(outdir, truth_path, *, curve_png=None, target: float = 0.005) -> dict:
    """Score a read run (before any review) against a truth file.

    Pages on one side only are recorded in the summary (``truth_pages_not_read``,
    ``pages_not_in_truth``, ...), not errors; no page in common is a DataError.

    Returns
    -------
    dict: ``ScoreReport.summary()`` (``pages``, ``fields``, ``accepted``, ``review``, ``wrong_accepted``,
    ``error_among_accepted``, ``review_rate``, ``field_accuracy_before_review``, ``digit_accuracy``,
    ``per_field``, ...) plus ``ledger`` and ``threshold`` (of the latest run).
    """
    recs, run, layouts = _ledger_records(outdir)
    if not recs:
        raise DataError(f"{outdir}: the ledger holds no field to score")
    report = score_readings(recs, truth_path)
    summary = report.summary()
    run_of = {(Path(r["source"]).name, r["page_number"]): (r["run_id"], r["form"]) for r in recs}
    wm = writer_mistakes(report.fields, run_of, layouts)
    summary["writer_mistakes"] = wm["fields"] + wm["relations"]
    summary["writer_mistakes_accepted"] = wm["accepted"]
    summary["writer_mistakes_accepted_list"] = wm["list"]
    summary["ledger"] = str(ledger_path(outdir))
    summary["threshold"] = None if run is None else float(run["threshold"])
    if curve_png is not None:
        write_curve_png(curve_png, report.curve(), threshold=summary["threshold"], target=target)
        summary["curve"] = str(curve_png)
    return summary


def tune_ledger(outdir, truth_path=None, *, target: float = 0.005, criterion: str = "estimate") -> dict:
    """Choose the acceptance threshold of a read run from known answers.

    With ``truth_path`` every field of the pages in the truth is used; without it, the
    fields a clerk has confirmed, corrected or marked empty (truth = their final value).

    Returns
    -------
    dict with ``threshold``, ``review_rate``, ``error_among_accepted``, ``error_upper_95``
    (one-sided Clopper-Pearson), ``accepted``, ``wrong_accepted``, ``fields``, ``target``,
    ``target_met``, ``truth_source``, ``truth_pages_not_read``.

    Raises
    ------
    DataError
        No field with a known answer.
    ParameterError
        ``target`` outside [0, 1) (checked before anything is read).
    """
    check_param(isinstance(target, (int, float)) and 0.0 <= target < 1.0, "target", "in [0, 1)", target)
    recs, _ = ledger_readings(outdir)
    missing = 0
    if truth_path is not None:
        report = score_readings(recs, truth_path)
        res = report.tune(target=target, criterion=criterion)
        source = str(truth_path)
        missing = len(report.truth_pages_not_read)
    else:
        done = [r for r in recs if r["final_status"] in ("confirmed", "corrected", "empty")]
        if not done:
            raise DataError(f"{outdir}: no reviewed field to tune on (confirm or correct fields first, "
                            "or give --truth)")
        res = choose_threshold([r["confidence"] for r in done],
                               [r["reading"] is not None and r["reading"] == (r["final_value"] or "") for r in done],
                               [r["decision"] == "accepted" or r["reason"] in ELIGIBLE_REASONS for r in done],
                               target=target, criterion=criterion)
        source = "the clerk's reviewed fields"
    return {"threshold": float(res.threshold), "review_rate": float(res.review_rate),
            "error_among_accepted": float(res.error_among_accepted), "error_upper_95": float(res.upper_bound),
            "accepted": int(res.accepted), "wrong_accepted": int(res.wrong_accepted), "fields": int(res.fields),
            "target": float(target), "target_met": bool(res.met), "truth_source": source,
            "truth_pages_not_read": missing}
