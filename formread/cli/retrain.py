"""Commands that close the loop: ``samples`` (from a clerk's decisions) and ``retrain``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer

from .common import ProgressBar, edge


@edge
def samples_cmd(
    outdir: Path = typer.Argument(..., metavar="OUTDIR", help="Output folder of `formread read` (reviewed)."),
    to: Path = typer.Option(Path("samples"), "--to", help="Samples folder (DIR/<digit>/*.png + manifest.jsonl)."),
):
    """Add labelled digit images from confirmed and corrected fields to a samples folder."""
    from ..learn.samples import collect_samples

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
    model: Optional[Path] = typer.Option(None, "--model", help="Model to fine-tune (default: the one in use)."),
    out: Optional[Path] = typer.Option(None, "--out", help="New version's path (default: <model>-r<N>.npz)."),
    held_out: float = typer.Option(0.3, "--held-out", help="Share of each digit's samples kept for measuring."),
    epochs: int = typer.Option(6, "--epochs", help="Fine-tuning epochs."),
    margin: float = typer.Option(0.005, "--margin",
                                 help="Most accuracy an original test part may lose for promotion."),
    min_gain: float = typer.Option(0.01, "--min-gain", help="Least held-out local accuracy gain for promotion."),
    seed: int = typer.Option(0, "--seed", help="Seeds the split, the original-data sample and training."),
    as_json: bool = typer.Option(False, "--json", help="Machine-readable report."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Fine-tune the model on local samples; write a new version; promote it only if it helps."""
    from ..paths import default_model_path
    from ..learn.retrain import retrain

    model_path = model or default_model_path()
    bar = ProgressBar("fine-tuning", enabled=not quiet and not as_json)
    rep = retrain(model_path, samples, out=out, held_out=held_out, epochs=epochs, margin=margin,
                  min_gain=min_gain, seed=seed, progress=bar)
    if as_json:
        typer.echo(json.dumps(rep.as_dict(), indent=2))
        return
    typer.echo(f"local samples: {rep.n_local_train} for fine-tuning, {rep.n_local_held_out} held out; "
               f"{rep.n_original} original training images mixed in")
    typer.echo(f"held-out local accuracy: {rep.local_before:.4f} -> {rep.local_after:.4f}")
    for part in rep.original_before:
        typer.echo(f"{part} accuracy: {rep.original_before[part]:.4f} -> {rep.original_after[part]:.4f}")
    typer.echo(f"wrote {rep.model_after} (temperature {rep.temperature:.3f})")
    typer.echo(("promoted: now in use. " if rep.promoted else "not promoted: ") + rep.reason)


def register(app: typer.Typer) -> None:
    """Add ``samples`` and ``retrain`` to the main app."""
    app.command("samples")(samples_cmd)
    app.command("retrain")(retrain_cmd)
