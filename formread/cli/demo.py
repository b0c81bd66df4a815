"""Commands of the demo group: ``demo`` (read the shipped demo forms and score them) and ``demo make``."""

from __future__ import annotations

import json
from enum import Enum
from pathlib import Path

import typer

from .. import store
from ..demo import make_demo
from ..demo.fill import HALVES
from ..demo.make import FORMS
from ..demo.styles import STYLES
from ..read.batch import SCAN_SUFFIXES, read_batch
from ..read.evaluate import score_ledger
from .common import EXIT_PAGES_FAILED, ProgressBar, edge, fail
from .read import render_batch, render_summary

DEFAULT_OUT = Path("formread-demo-out")

demo_app = typer.Typer(
    help="Try formread on the shipped demo forms: 'formread demo' reads and scores them.",
    invoke_without_command=True, no_args_is_help=False, add_completion=False,
)


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
    app.add_typer(demo_app, name="demo")


def demo_scans(folder: Path) -> list[Path]:
    """The scan files of a demo folder (its layout, truth and notes left out), sorted by name."""
    return sorted((p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in SCAN_SUFFIXES),
                  key=lambda p: p.name)


@demo_app.callback()
@edge
def demo_cmd(
    ctx: typer.Context,
    out: Path = typer.Option(DEFAULT_OUT, "--out", "-o", help="Output folder for the demo run."),
    as_json: bool = typer.Option(False, "--json", help="Print the summary as one JSON object."),
    workers: int = typer.Option(2, "--workers", "-w", help="Processes for the imaging step."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Read the shipped demo forms with the shipped model, score them against their known answers.

    Prints pages, fields, accepted, sent to review, wrong among accepted, error
    among accepted, review rate and field accuracy before review, and where the
    outputs are (open them with the review page).
    """
    if ctx.invoked_subcommand is not None:
        return
    folder = store.demo_forms()   # looked up when called (tests put a folder of their own in its place)
    layout, truth = folder / "layout.toml", folder / "truth.jsonl"
    if not layout.is_file() or not truth.is_file():
        fail(f"{folder}: the demo forms are missing (no layout.toml or truth.jsonl)")
    scans = demo_scans(folder)
    if not scans:
        fail(f"{folder}: the demo forms are missing (no scans)")
    bar = ProgressBar("reading demo", unit="pages", enabled=not quiet)
    report = read_batch(scans, layout, out, workers=workers, progress=bar, command="formread demo")
    summary = score_ledger(out, truth)
    if as_json:
        typer.echo(json.dumps(summary))
    else:
        render_batch(report)
        typer.echo("")
        typer.echo(render_summary(summary))
        typer.echo("")
        if report.skipped:
            typer.echo(f"note: {report.skipped} pages were already in {out} from an earlier run and were not "
                       "read again; use a new --out to read them afresh")
        typer.echo(f"outputs in {out}/: ledger.sqlite, readings.csv, fields.jsonl, pages/, fields/")
        typer.echo(f"next: review the doubtful fields of {out} on the review page")
    if not report.all_read:
        raise typer.Exit(EXIT_PAGES_FAILED)


# the choices, listed by --help and checked by typer (exit 2 for anything else)
Style = Enum("Style", {name: name for name in STYLES}, type=str)  # type: ignore[misc]
FormName = Enum("FormName", {name: name for name in FORMS}, type=str)  # type: ignore[misc]
Half = Enum("Half", {name: name for name in HALVES}, type=str)  # type: ignore[misc]


@demo_app.command("make")
@edge
def make_cmd(
    outdir: Path = typer.Argument(..., help="New or empty folder (or an earlier demo set, replaced)."),
    count: int = typer.Option(30, "--count", "-n", help="Number of pages."),
    seed: int = typer.Option(7, "--seed", help="Seed: the same count and seed give the same files."),
    style: Style = typer.Option("demo", "--style", help="Writers and scanners (formread/demo/styles.py)."),
    form: FormName = typer.Option("meter", "--form", help="Which form: meter (water-meter card) or slip "
                                                          "(produce delivery slip)."),
    half: Half | None = typer.Option(None, "--half",
                                        help="Draw the handwriting from one fixed half of the MNIST test "
                                             "part only."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
):
    """Make a fresh demo set: filled and scanned demo forms, their layout.toml and truth.jsonl.

    The styles are described in formread/demo/styles.py; the defaults make the shipped demo set.
    """
    bar = ProgressBar("making forms", unit="pages", enabled=not quiet)
    info = make_demo(outdir, count=count, seed=seed, style=style.value, form=form.value,
                     half=None if half is None else half.value, progress=bar)
    typer.echo(f"{info['pages']} pages in {info['files']} files, {info['fields']} fields, "
               f"{info['mistakes']} forms with a writer's mistake, in {outdir}/ ({info['seconds']} s)")
    typer.echo(f"read them: formread read {outdir}/scan_* --layout {outdir}/layout.toml --out OUT")
