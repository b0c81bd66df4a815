"""Commands that close the loop: ``learn`` (the whole step after a review), and its parts ``samples`` and
``retrain``."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from ..learn.loop import LearnConfig, learn
from ..learn.retrain import retrain
from ..learn.samples import collect_samples
from ..store import in_use_path
from .common import ProgressBar, edge


@edge
def samples_cmd(
    outdir: Path = typer.Argument(..., metavar="OUTDIR", help="Output folder of `formread read` (reviewed)."),
    to: Path = typer.Option(Path("samples"), "--to", help="Samples folder (DIR/<digit>/*.png + manifest.jsonl)."),
):
    """Add labelled digit images from confirmed and corrected fields to a samples folder
    (a part of `formread learn`, which also cuts fields again to their decided length)."""
    rep = collect_samples(outdir, to)
    typer.echo(f"{rep.added} new digit images from {rep.fields_used} fields into {to} "
               f"({rep.duplicates} already there, {rep.relabelled} relabelled, "
               f"{len(rep.skipped_fields)} fields skipped)")
    for page_id, name, why in rep.skipped_fields[:10]:
        typer.echo(f"  skipped page {page_id} field {name}: {why}")
    typer.echo("per digit: " + " ".join(f"{d}:{n}" for d, n in enumerate(rep.per_digit)))


@edge
def retrain_cmd(
    samples: Path = typer.Option(..., "--samples", help="Local samples folder (DIR/<digit>/*.png)."),
    model: Path | None = typer.Option(None, "--model", help="Model to fine-tune (default: the one in use)."),
    out: Path | None = typer.Option(None, "--out", help="New version's path (default: <model>-r<N>.npz)."),
    held_out: float = typer.Option(0.3, "--held-out", min=0.05, max=0.8,
                                   help="Share of each digit's samples kept for measuring."),
    epochs: int = typer.Option(6, "--epochs", min=1, max=1000, help="Fine-tuning epochs."),
    margin: float = typer.Option(0.005, "--margin", min=0.0, max=0.5,
                                 help="Most accuracy an original test part may lose for promotion."),
    min_gain: float = typer.Option(0.01, "--min-gain", min=-0.5, max=0.5,
                                   help="Least held-out local accuracy gain for promotion."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seeds the split, the original-data sample and training."),
    promote_inherited: bool = typer.Option(
        False, "--promote-inherited", help="Put the new version in use (when it helps) although its fitted "
                                          "decisions are the parent's; `formread learn` refits them instead."),
    as_json: bool = typer.Option(False, "--json", help="Machine-readable report."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Fine-tune the model on local samples and write a new version (a part of `formread learn`).

    The new version keeps the parent's fitted decisions (inherited), so it is put in use only with
    --promote-inherited; `formread learn` fine-tunes, refits the decisions and promotes in one step.
    """
    model_path = model or in_use_path()
    bar = ProgressBar("fine-tuning", unit="batches", enabled=not quiet and not as_json)
    rep = retrain(model_path, samples, out=out, held_out=held_out, epochs=epochs, margin=margin,
                  min_gain=min_gain, seed=seed, promote_inherited=promote_inherited, progress=bar)
    if as_json:
        typer.echo(json.dumps(rep.as_dict(), indent=2))
        return
    typer.echo(f"local samples: {rep.n_local_train} for fine-tuning, {rep.n_local_held_out} held out; "
               f"{rep.n_original} original training images mixed in")
    typer.echo(f"held-out local accuracy: {rep.local_before:.4f} -> {rep.local_after:.4f}")
    for part in rep.original_before or {}:
        typer.echo(f"{part} accuracy: {rep.original_before[part]:.4f} -> {rep.original_after[part]:.4f}")
    typer.echo(f"wrote {rep.model_after} (temperature {rep.temperature:.3f})")
    typer.echo(("promoted: now in use. " if rep.promoted else "not promoted: ") + rep.reason)




def _pct(v) -> str:
    return "-" if v is None else f"{100 * v:.1f}%"


def _render_learn(rep) -> list[str]:
    b, a = rep.before, rep.after
    lines = [f"learnt from {rep.fields_clerk} fields decided by a clerk ({rep.fields_known} with a known value); "
             f"{rep.split}",
             f"digit samples: {rep.samples} from the fitting pages ({rep.resegmented} fields cut again to their "
             f"decided length, {len(rep.skipped)} fields gave none)",
             "held-out pages                before    after",
             f"  field accuracy              {_pct(b['field_accuracy']):>6}   {_pct(a['field_accuracy']):>6}",
             f"  review rate at the target   {_pct(b['review_rate']):>6}   {_pct(a['review_rate']):>6}",
             f"  error among accepted        {_pct(b['error_among_accepted']):>6}"
             f"   {_pct(a['error_among_accepted']):>6}"
             f"   (95% upper bound after: {_pct(a['upper_95'])}, {a['wrong_accepted']} of {a['accepted']})"]
    for form, f in a["forms"].items():
        t = "no threshold meets it" if f["threshold"] is None else f"threshold {f['threshold']:.4f}"
        lines.append(f"  {form}: target {_pct(f['target'])} -> {t}")
    for part in rep.original_before or {}:
        lines.append(f"{part} accuracy: {rep.original_before[part]:.4f} -> {rep.original_after[part]:.4f}")
    kept = rep.kept_network or {}
    tuned = kept.get("fine_tuned_bundle", rep.bundle_after)
    lines.append(f"wrote {tuned} (temperature {rep.temperature:.3f}; decoder and decisions refitted)")
    if kept:
        iu, rf = kept["in_use"], kept["refitted"]
        lines.append(f"network in use, held-out pages: decisions in use -> refitted on the fitting pages: review "
                     f"{_pct(iu['review_rate'])} -> {_pct(rf['review_rate'])}, error among accepted "
                     f"{_pct(iu['error_among_accepted'])} -> {_pct(rf['error_among_accepted'])}")
        if "fine_tuned_bundle" in kept:
            lines.append(f"wrote {rep.bundle_after} (the network in use, decisions refitted on every page)")
    lines.append(("promoted: now in use. " if rep.promoted else "not promoted: ") + rep.reason)
    return lines


@edge
def learn_cmd(
    runs: list[Path] = typer.Argument(..., metavar="RUN...", help="Output folders of reviewed `formread read` runs."),
    model: Path | None = typer.Option(None, "--model", help="Bundle to learn from (default: the one in use)."),
    out: Path | None = typer.Option(None, "--out", help="New version's path (default: the store's next -r<N>)."),
    target: float | None = typer.Option(
        None, "--target", min=1e-6, max=0.499, help="Error among accepted fields aimed at (default: each layout's "
                                                    "target_error, else 0.005)."),
    held_out: float = typer.Option(0.3, "--held-out", min=0.05, max=0.8,
                                   help="Share of the pages held out to measure and refit on."),
    epochs: int = typer.Option(6, "--epochs", min=1, max=1000, help="Fine-tuning epochs."),
    margin: float = typer.Option(0.005, "--margin", min=0.0, max=0.5,
                                 help="Most accuracy an original held-out part may lose for promotion."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seeds the page split, the original-data sample and training."),
    resume: bool = typer.Option(False, "--resume", help="Continue an interrupted fine-tuning from its checkpoint."),
    truth: list[Path] | None = typer.Option(None, "--truth", help="Known values of a run's pages (truth.jsonl), "
                                                                     "for development sets; one per run, in order."),
    refit_only: bool = typer.Option(False, "--refit-only", help="No training: fit the decoder's digit map and the "
                                                                "decisions of the bundle's own network on every page "
                                                                "(a new form, a new network)."),
    as_json: bool = typer.Option(False, "--json", help="Machine-readable report."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Learn the office's handwriting AND refit the decisions for the new network, from reviewed runs.

    Fine-tunes on the digits of the fields a clerk decided (pages split into fitting and held-out),
    refits the decoder and the thresholds on the held-out pages, and promotes the new bundle only
    when its review rate at the target falls there and the original held-out parts hold.  The next
    `formread read` uses it. Ctrl-C stops (exit 130, nothing promoted); --resume continues.
    """
    bar = ProgressBar("fine-tuning", unit="batches", enabled=not quiet and not as_json)
    cfg = LearnConfig(held_out=held_out, seed=seed, epochs=epochs, margin=margin, target=target,
                      refit_only=refit_only)
    rep = learn(runs, bundle=model, out=out, config=cfg, progress=bar, resume=resume, truth=truth)
    if as_json:
        typer.echo(json.dumps(rep.as_dict(), indent=2))
        return
    for line in _render_learn(rep):
        typer.echo(line)


def register(app: typer.Typer) -> None:
    """Add ``learn``, ``samples`` and ``retrain`` to the main app."""
    app.command("learn")(learn_cmd)
    app.command("samples")(samples_cmd)
    app.command("retrain")(retrain_cmd)
