"""Commands of the read group: ``read`` (the batch job), ``tune`` (choose the threshold), ``score``."""

from __future__ import annotations

import json
import shlex
import sys
from pathlib import Path

import typer

from ..form.edit import set_form_value
from ..ledger.store import ledger_path
from ..read.batch import read_batch
from ..read.evaluate import score_ledger, tune_ledger
from ..read.report import run_report
from .common import EXIT_PAGES_FAILED, ProgressBar, edge, fail


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
    app.command("read")(read_cmd)
    app.command("tune")(tune_cmd)
    app.command("score")(score_cmd)
    app.command("report")(report_cmd)


def render_batch(report, *, out=None) -> None:
    """A few lines on what a read run did (stdout)."""
    echo = typer.echo
    echo(f"pages: {report.pages} ({report.read} read, {report.skipped} already in the ledger, "
         f"{report.unregistered} not registered, {report.failed} failed) in {report.seconds:.1f} s "
         f"({report.pages_per_second:.2f} pages/s)")
    spot = f", of which {report.audited} spot checks" if report.audited else ""
    echo(f"fields: {report.fields} new ({report.accepted} accepted, {report.review} sent to review{spot})")
    for source, page, status, error in report.problems[:20]:
        echo(f"  {status}: {source} page {page}" + (f": {error}" if error else ""))
    if len(report.problems) > 20:
        echo(f"  ... and {len(report.problems) - 20} more (see readings.csv)")
    echo(f"outputs: {ledger_path(report.outdir)}, readings.csv, fields.jsonl")


@edge
def read_cmd(
    scans: list[Path] = typer.Argument(..., help="Scan files (PNG, JPEG, TIFF, PDF) or folders of them."),
    layout: list[Path] = typer.Option(
        ..., "--layout", "-l", help="The form's layout TOML; give it several times (or a folder of layouts) for a "
                                    "tray of several forms: each page is read as the one form it fits."),
    out: Path = typer.Option(..., "--out", "-o", help="Output folder (ledger, images, readings.csv)."),
    model: Path | None = typer.Option(None, "--model", "-m", help="Model file; the shipped one by default."),
    threshold: float | None = typer.Option(
        None, "--threshold", "-t", min=1e-9, max=1.0,
        help="Acceptance threshold for every field; default: the layout's, else the model's fitted one."),
    audit: float | None = typer.Option(
        None, "--audit", min=0.0, max=0.999999,
        help="Share of the fields that would be accepted sent to review as spot checks "
             "(default: the layout's 'audit', else 0.02)."),
    audit_seed: int = typer.Option(0, "--audit-seed", min=0, help="Seed of the spot-check draw."),
    workers: int = typer.Option(2, "--workers", "-w", min=1, max=64, help="Processes for the page work."),
    scheduler: str | None = typer.Option(
        None, "--scheduler", help="Run the page work on a Dask cluster (tcp://HOST:8786); needs formread[dask]."),
    send_bytes: bool = typer.Option(False, "--send-bytes", help="With --scheduler: send the scans' bytes to the "
                                                                  "workers (they do not share the scans' folder)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Read scanned forms into OUT/ledger.sqlite; re-running the same command resumes.

    Exit code 0 when every page was read, 3 when some pages failed or were not
    registered (each recorded with its reason), 1 on an error before reading.
    """
    bar = ProgressBar("reading", unit="pages", enabled=not quiet)
    report = read_batch(scans, layout, out, bundle=model, threshold=threshold, audit=audit, audit_seed=audit_seed,
                        workers=workers, progress=bar, command=_command_line(), scheduler=scheduler,
                        send_bytes=send_bytes)
    render_batch(report)
    if not report.all_read:
        raise typer.Exit(EXIT_PAGES_FAILED)


def _command_line() -> str:
    return " ".join(shlex.quote(a) for a in ["formread"] + sys.argv[1:])


def _pct(v) -> str:
    return "-" if v is None else f"{100 * v:.2f}%"


def render_summary(s: dict) -> str:
    """The score summary as a short table (text)."""
    lines = [
        f"pages scored:                 {s['pages']}",
        f"fields:                       {s['fields']}",
        f"accepted:                     {s['accepted']}",
        f"sent to review:               {s['review']}  (review rate {_pct(s['review_rate'])}"
        + (f"; {s['audited']} of them spot checks)" if s.get("audited") else ")"),
        f"wrong among accepted:         {s['wrong_accepted']}  (error among accepted "
        f"{_pct(s['error_among_accepted'])})",
        f"field accuracy before review: {_pct(s['field_accuracy_before_review'])}",
        f"digit accuracy:               {_pct(s.get('digit_accuracy'))}",
    ]
    if s.get("writer_mistakes") is not None:
        lines.append(f"writer mistakes accepted:     {s['writer_mistakes_accepted']} of {s['writer_mistakes']} "
                     "(values that break their own rules on paper)")
        lines += [f"  {m}" for m in s.get("writer_mistakes_accepted_list", [])[:10]]
    if s.get("threshold") is not None:
        lines.append(f"threshold (latest run):       {s['threshold']:.4g}")
    per = s.get("per_field") or {}
    if per:
        w = max(len(n) for n in per) + 2
        lines.append("")
        lines.append(f"{'field':<{w}}{'fields':>7}{'accepted':>10}{'review':>8}{'wrong acc.':>12}"
                     f"{'error acc.':>12}{'accuracy':>10}{'digits':>9}")
        for n, f in per.items():
            lines.append(f"{n:<{w}}{f['fields']:>7}{f['accepted']:>10}{f['review']:>8}{f['wrong_accepted']:>12}"
                         f"{_pct(f['error_among_accepted']):>12}{_pct(f['field_accuracy_before_review']):>10}"
                         f"{_pct(f.get('digit_accuracy')):>9}")
    diffs = [("truth_pages_not_read", "truth pages not in the ledger"),
             ("pages_not_in_truth", "ledger pages not in the truth"),
             ("truth_fields_not_read", "truth fields not read"), ("fields_not_in_truth", "fields not in the truth")]
    for key, label in diffs:
        if s.get(key):
            extra = f" (first: {s['first_truth_page_not_read']})" if key == "truth_pages_not_read" and \
                s.get("first_truth_page_not_read") else ""
            lines.append(f"note: {s[key]} {label}{extra}; scored on the pages in both")
    return "\n".join(lines)


@edge
def tune_cmd(
    outdir: Path = typer.Argument(..., help="Output folder of a read run (holds ledger.sqlite)."),
    truth: Path | None = typer.Option(
        None, "--truth", help="Ground truth JSONL; default: the fields a clerk has confirmed or corrected."),
    target: float = typer.Option(0.005, "--target", help="Largest error rate allowed among accepted fields."),
    write_layout: Path | None = typer.Option(
        None, "--write-layout", help="Store the chosen threshold as [form] threshold in this layout file."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object."),
):
    """Choose the acceptance threshold that keeps the error among accepted fields under TARGET."""
    result = tune_ledger(outdir, truth, target=target)
    if write_layout is not None:
        if not result["target_met"]:
            fail(f"{write_layout}: left unchanged: no threshold keeps the error among accepted fields within "
                 f"{_pct(target)} on these {result['fields']} fields")
        set_form_value(write_layout, "threshold", round(min(1.0, float(result["threshold"])), 6),
                       comment="chosen by formread tune")
        result["layout_written"] = str(write_layout)
    if as_json:
        typer.echo(json.dumps(result))
        return
    typer.echo(f"fields used: {result['fields']} (truth: {result['truth_source']})")
    typer.echo(f"threshold: {result['threshold']:.4f}")
    typer.echo(f"review rate: {_pct(result['review_rate'])}")
    typer.echo(f"error among accepted: {_pct(result['error_among_accepted'])} "
               f"({result['wrong_accepted']} of {result['accepted']}; 95% upper bound "
               f"{_pct(result['error_upper_95'])}, Clopper-Pearson)")
    if result["truth_pages_not_read"]:
        typer.echo(f"note: {result['truth_pages_not_read']} truth pages are not in the ledger; tuned on the rest")
    if not result["target_met"]:
        typer.echo(f"note: no threshold meets the target {_pct(target)} on these fields; the threshold "
                   "shown accepts nothing")
    if write_layout is not None:
        typer.echo(f"stored in {write_layout} ([form] threshold)")


@edge
def score_cmd(
    outdir: Path = typer.Argument(..., help="Output folder of a read run (holds ledger.sqlite)."),
    truth: Path = typer.Option(..., "--truth", help="Ground truth JSONL."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object."),
    curve: Path | None = typer.Option(None, "--curve", help="Write the review/error curve as a PNG."),
):
    """Score the ledger's readings (before review) against the ground truth."""
    summary = score_ledger(outdir, truth, curve_png=curve)
    if as_json:
        typer.echo(json.dumps(summary))
        return
    typer.echo(render_summary(summary))
    if curve is not None:
        typer.echo(f"curve: {curve}")


def render_report(s: dict) -> str:
    """The run report as a short table (text)."""
    def err(f):
        if f["error_among_accepted"] is None:
            return "no spot check decided yet"
        return (f"{_pct(f['error_among_accepted'])} ({f['audited_wrong']} of {f['audited_decided']} spot checks "
                f"wrong; 95% upper bound {_pct(f['error_upper_95'])})")

    lines = [f"runs in: {', '.join(s['outdirs'])}",
             f"fields read:                  {s['fields']}",
             f"accepted:                     {s['accepted']}",
             f"sent to review:               {s['review']}  (review rate {_pct(s['review_rate'])}; "
             f"{s['audited']} spot checks, {s['decided']} decided by a clerk)",
             f"error among accepted:         {err(s)}"]
    per = s.get("per_field") or {}
    if per:
        w = max(len(n) for n in per) + 2
        lines += ["", f"{'field':<{w}}{'fields':>7}{'accepted':>10}{'review':>8}{'audited':>9}{'checked':>9}"
                      f"{'wrong':>7}{'error acc.':>12}{'upper 95%':>11}"]
        for n, f in per.items():
            lines.append(f"{n:<{w}}{f['fields']:>7}{f['accepted']:>10}{f['review']:>8}{f['audited']:>9}"
                         f"{f['audited_decided']:>9}{f['audited_wrong']:>7}{_pct(f['error_among_accepted']):>12}"
                         f"{_pct(f['error_upper_95']):>11}")
    return "\n".join(lines)


@edge
def report_cmd(
    outdirs: list[Path] = typer.Argument(..., metavar="OUTDIR...", help="Output folders of read runs."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object."),
):
    """Review load and the error among accepted fields, estimated from the spot checks a clerk decided."""
    summary = run_report(outdirs).summary()
    typer.echo(json.dumps(summary) if as_json else render_report(summary))
