"""Commands of the review group: the clerk's review page and the export of final values."""

from __future__ import annotations

import getpass
import signal
from pathlib import Path

import typer

from ..errors import LedgerError
from ..ledger.store import open_ledger
from ..review.bulk import apply_decisions, read_decisions
from ..review.export import export_final
from ..review.server import ReviewServer
from .common import EXIT_PAGES_FAILED, edge


def _login_name() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name in this environment
        return "unknown"


def _apply(outdir: Path, path: Path, reviewer: str) -> None:
    records = read_decisions(path)
    with open_ledger(outdir, create=False) as led:
        rep = apply_decisions(led, records, reviewer=reviewer)
    for r in rep.refused:
        typer.echo(f"formread: refused: {path} line {r.line}: {r.why}", err=True)
    parts = ", ".join(f"{k} {v}" for k, v in sorted(rep.by_action.items()))
    typer.echo(f"{rep.applied} decision{'s' if rep.applied != 1 else ''} applied"
               + (f" ({parts})" if parts else "") + f", {len(rep.refused)} refused, from {path} as {reviewer}")
    if rep.refused:
        raise typer.Exit(EXIT_PAGES_FAILED)


@edge
def review(
    outdir: Path = typer.Argument(..., help="Output folder of `formread read` (holds ledger.sqlite)."),
    port: int = typer.Option(0, "--port", min=0, max=65535, help="Port on 127.0.0.1; 0 picks a free one."),
    reviewer: str = typer.Option(None, "--reviewer", help="Name recorded with each decision (default: login name)."),
    apply: Path | None = typer.Option(
        None, "--apply", help="Apply decisions from a JSON Lines or CSV file (source, page_number, field, value; "
                              "\"\" = blank, action \"unreadable\") instead of opening the page. Exit 3 when "
                              "some lines were refused."),
) -> None:
    """Check the flagged fields in a local web page (127.0.0.1 only; Ctrl-C stops, exit code 0),
    or apply a file of decisions keyed elsewhere (--apply)."""
    name = (reviewer or _login_name()).strip() or "unknown"
    if apply is not None:
        return _apply(outdir, apply, name)
    try:
        server = ReviewServer(outdir, reviewer=name, port=port)
    except OSError as e:
        raise LedgerError(f"127.0.0.1:{port}: cannot open the review page's port ({e.strerror or e})") from None
    def _stop(signum, frame):  # a polite kill (SIGTERM) stops like Ctrl-C
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _stop)
    typer.echo(f"Review page for {outdir} (checking as {name}):")
    typer.echo(f"  {server.url}")
    typer.echo("Open it in a browser on this computer. Ctrl-C stops.")
    try:
        server.serve_forever(poll_interval=0.2)
    except KeyboardInterrupt:
        server.server_close()
        n = sum(server.saved.values())
        parts = ", ".join(f"{k} {v}" for k, v in sorted(server.saved.items()))
        typer.echo(f"\nStopped. {n} decision{'s' if n != 1 else ''} saved in the ledger"
                   + (f" ({parts})." if parts else "."))
        # Ctrl-C is how the page is closed: a normal end, exit code 0
    finally:
        server.server_close()


@edge
def export(
    outdir: Path = typer.Argument(..., help="Output folder of `formread read` (holds ledger.sqlite)."),
    out: Path = typer.Option(None, "--out", help="Folder for the export files (default: OUTDIR)."),
) -> None:
    """Write the final values: final_values.csv (a row per page) and final_values.jsonl (a record per field)."""
    res = export_final(outdir, out)
    tables = ", ".join(str(p) for p in res.csv_paths) if len(res.csv_paths) > 1 else str(res.csv_path)
    typer.echo(f"Wrote {tables} ({res.pages} pages) and {res.jsonl_path} ({res.fields} fields).")
    typer.echo("  " + ", ".join(f"{k} {v}" for k, v in res.counts.items()))
    if res.counts.get("pending"):
        typer.echo(f"  {res.counts['pending']} field(s) still wait for review: `formread review {outdir}`.")


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
    app.command("review")(review)
    app.command("export")(export)
