"""Commands of the layout group: ``layout proof`` (check a layout on a scan), ``layout draft`` and
``layout fingerprint`` (record the look of a blank form's header in its layout)."""

from __future__ import annotations

import io
from pathlib import Path

import typer

from ..errors import ImageError, LayoutError
from ..fileio import atomic_write
from ..form.edit import set_header_fingerprint
from ..form.layout import load_layout, parse_layout
from ..imaging.draft import draft_layout
from ..imaging.fingerprint import blank_fingerprint
from ..imaging.load import iter_pages
from ..imaging.pipeline import process_page
from ..imaging.proof import render_proof
from .common import edge

group = typer.Typer(name="layout", help="Make and check form layouts.", no_args_is_help=True)


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
    app.add_typer(group, name="layout")


def _page(scan: Path, number: int):
    """Page ``number`` (1-based) of a scan file; ImageError naming the file when it has no such page."""
    if number < 1:
        raise ImageError(f"{scan}: no page {number} (pages count from 1)")
    count = 0
    for pg in iter_pages(scan):
        count += 1
        if count == number:
            return pg
    raise ImageError(f"{scan}: no page {number} (the file has {count} page{'s' if count != 1 else ''})")


@group.command("proof")
@edge
def proof_cmd(
    scan: Path = typer.Argument(..., help="Scanned form (PNG, TIFF, JPEG or PDF)."),
    layout_file: Path = typer.Option(..., "--layout", "-l", help="Layout file (TOML) to check."),
    out: Path | None = typer.Option(None, "--out", "-o",
                                       help="PNG to write (default: SCAN's name with .proof-pN.png)."),
    page: int = typer.Option(1, "--page", "-p", help="Page of SCAN to use (1 = first)."),
    scale: float = typer.Option(0.5, "--scale", help="Size of the picture relative to the scan."),
):
    """Draw the layout's fields, cells and the digits found over a scan, to check the layout by eye.

    Blue: field rectangles and cells; amber: digit boxes; grey dot: blank cell;
    plum: a doubtful field with its reason; green rings: registration marks used.
    """
    layout = load_layout(layout_file)
    pg = _page(scan, page)
    result = process_page(pg, layout)
    img = render_proof(result, layout, scale=scale)
    target = out if out is not None else scan.with_name(f"{scan.stem}.proof-p{page}.png")
    buf = io.BytesIO()
    img.save(buf, format="PNG")
    atomic_write(target, buf.getvalue())
    reg = result.registration
    typer.echo(f"{scan} page {page}: {reg.marks_found} marks, residual {reg.residual_mm:.2f} mm, "
               f"skew {reg.skew_deg:+.2f} deg" + (f", turned {reg.turn_deg} deg" if reg.turn_deg else ""))
    for name, fd in result.fields.items():
        if fd.kind == "boxed" and fd.blank is not None:
            what = f"{int((~fd.blank).sum())} of {len(fd.blank)} cells written"
        else:
            what = (f"{len(fd.candidates[0].boxes)} digits ({len(fd.candidates)} splits)"
                    if fd.candidates else "no digits")
        doubt = f"  DOUBTFUL: {fd.reason}" if fd.doubtful else ""
        typer.echo(f"  {name}: {what}{doubt}")
    typer.echo(f"wrote {target}")


@group.command("draft")
@edge
def draft_cmd(
    blank_form: Path = typer.Argument(..., help="Straight scan of the blank form (PNG, TIFF, JPEG or PDF)."),
    out: Path | None = typer.Option(None, "--out", "-o",
                                       help="Layout file to write (default: BLANK_FORM's name with .draft.toml)."),
    page: int = typer.Option(1, "--page", "-p", help="Page of BLANK_FORM to use (1 = first)."),
    name: str | None = typer.Option(None, "--name", help="The form's name in the layout."),
    force: bool = typer.Option(False, "--force", help="Overwrite OUT if it exists."),
):
    """Draft a layout from a blank form: its corner squares and printed rectangles.

    Fields are named field_1, field_2, ... in reading order; rename them, add rules,
    and check the result with `formread layout proof`.
    """
    target = out if out is not None else blank_form.with_name(f"{blank_form.stem}.draft.toml")
    if target.exists() and not force:
        raise LayoutError(f"{target}: already exists (use --force to overwrite)")
    pg = _page(blank_form, page)
    layout = draft_layout(pg, name=name)
    text = ("# Drafted by `formread layout draft` from "
            f"{blank_form.name} page {page}: name the fields, set optional/rules, then check with "
            "`formread layout proof`.\n" + layout.to_toml())
    parse_layout(text, str(target))  # what is written must load back
    atomic_write(target, text.encode("utf-8"))
    kinds = [f.kind for f in layout.fields]
    hd = layout.header
    head = ("no header (no print above the first field)" if hd is None else
            f"header x={hd.x:g} y={hd.y:g} w={hd.w:g} h={hd.h:g} mm"
            + (" with its fingerprint" if layout.header_fingerprint else ""))
    typer.echo(f"{blank_form} page {page}: {len(layout.marks)} marks, {len(kinds)} fields "
               f"({kinds.count('boxed')} boxed, {kinds.count('open')} open), {head}")
    typer.echo(f"wrote {target}")


@group.command("fingerprint")
@edge
def fingerprint_cmd(
    blank_form: Path = typer.Argument(..., help="Scan of the blank form (PNG, TIFF, JPEG or PDF), any way round."),
    layout_file: Path = typer.Option(..., "--layout", "-l",
                                     help="The form's layout (TOML), with a [form.header] region."),
    out: Path | None = typer.Option(None, "--out", "-o",
                                       help="Layout file to write (default: update LAYOUT in place)."),
    page: int = typer.Option(1, "--page", "-p", help="Page of BLANK_FORM to use (1 = first)."),
):
    """Record the look of the blank form's header in its layout ([form.header] fingerprint).

    With fingerprints, pages of forms that share their marks and fields are told apart by their
    printed headers; the rest of the layout file, comments included, is kept as it is.
    """
    layout = load_layout(layout_file)
    if layout.header is None:
        raise LayoutError(f"{layout_file}: no [form.header] region (add x, y, w, h around the printed title first)")
    pg = _page(blank_form, page)
    fp = blank_fingerprint(pg, layout)
    target = out if out is not None else layout_file
    text = set_header_fingerprint(layout_file.read_bytes().decode("utf-8"), fp, str(target))
    atomic_write(target, text.encode("utf-8"))
    rows, cols = fp.split(":", 1)[0].split("x")
    typer.echo(f"{blank_form} page {page}: header fingerprint of {rows} x {cols} cells")
    typer.echo(f"wrote {target}")
