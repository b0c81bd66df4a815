"""Make a demo set: filled, scanned forms with their ground truth.

The scenario is invented: plot holders of the fictional "Larkspur Lane Allotment
Cooperative" send monthly water-meter cards (form ``meter``, the shipped demo) and hand in
produce delivery slips with their crates (form ``slip``).  The handwriting comes ONLY from
the held-out test part of the MNIST sample (never from the training part the shipped model
learned from), so reading a demo set measures the model on unseen writers; ``half="a"`` or
``"b"`` draws only from one fixed half of it (:func:`formread.demo.fill.mnist_test_halves`).
``style`` picks the writer and scanner populations (:mod:`formread.demo.styles`).

Truth records: every set writes ``source``, ``page_number``, ``fields``, ``scan`` and
``writer_mistakes`` per page (DEVELOPERS.md).  A set other than the shipped kind (style
``demo``, form ``meter``, no half) also records ``style``, ``form``, ``half``, the page's
``writer`` (population and drawn values), more of the ``scan`` (scanner population, file
format, blur, bilevel threshold, JPEG quality) and ``mnist``: per field, the MNIST sample
index of each digit written, in writing order.  The shipped kind keeps its record form, so
``formread demo make --count 30 --seed 7`` still makes demo_forms/ byte for byte.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image

from ..errors import ParameterError, check_param
from .card import (
    LAYOUT_PATH,
    METER_TEXT,
    SLIP_LAYOUT_PATH,
    SLIP_TEXT,
    CardText,
    marks_mm,
    read_card_layout,
    render_card,
)
from .fill import HALVES, load_test_digits, random_writer, write_field
from .scan import random_scan_settings, simulate_scan, to_bilevel
from .styles import SCANNERS, STYLES, WRITERS, ScannerPopulation, draw_writer, style_populations
from .values import MISTAKE_KINDS, SLIP_MISTAKE_KINDS, card_values, slip_values

__all__ = ["make_demo", "demo_layout_path", "TRUTH_NAME", "LAYOUT_NAME", "FORMS", "DemoForm"]

MAX_COUNT = 100_000
"""Most pages one demo set holds (a mistyped count would otherwise fill the disk for days)."""
TRUTH_NAME = "truth.jsonl"
PART_NAME = "truth.jsonl.part"
LAYOUT_NAME = "layout.toml"
_PDF_DATE = time.struct_time((2026, 1, 1, 0, 0, 0, 3, 1, 0))   # fixed, so the bytes repeat
_NOISE = {"jpeg": (0.5, 1.5), "pdf": (0.5, 1.5), "png": (0.0, 0.0), "tiff": (1.0, 3.0)}
_SUFFIX = {"jpeg": ".jpg", "png": ".png", "tiff": ".tif", "pdf": ".pdf"}


@dataclass(frozen=True)
class DemoForm:
    """One invented form: its layout file, printed words, what is written on it and its mistakes."""

    name: str
    layout_path: Path
    text: CardText
    values: Callable[..., dict]          # values(rng, mistake) -> field name -> digits written
    mistake_kinds: tuple[str, ...]       # cycled over the pages that get a deliberate mistake
    mistake_share: float                 # share of pages with a mistake (at least one from 4 pages)
    pdf_title: str


FORMS = {
    "meter": DemoForm("meter", LAYOUT_PATH, METER_TEXT,
                      lambda rng, mistake: card_values(rng, mistake=mistake,
                                                       litres_empty=bool(rng.random() < 0.1)),
                      MISTAKE_KINDS, 0.06, "Water meter cards"),
    "slip": DemoForm("slip", SLIP_LAYOUT_PATH, SLIP_TEXT,
                     lambda rng, mistake: slip_values(rng, mistake=mistake),
                     SLIP_MISTAKE_KINDS, 0.10, "Produce delivery slips"),
}
"""The demo forms by name: ``meter`` (the shipped water-meter card) and ``slip`` (the delivery slip)."""


def demo_layout_path(form: str = "meter") -> Path:
    """A demo form's layout file (TOML, the format in DEVELOPERS.md); the meter card by default."""
    check_param(form in FORMS, "form", f"one of {', '.join(FORMS)}", form)
    return FORMS[form].layout_path


@dataclass
class _File:
    fmt: str          # "jpeg" | "png" | "tiff" (bilevel Group 4) | "pdf" (grey JPEG pages)
    pages: int
    dpi: int
    quality: int      # JPEG quality (jpeg and pdf)
    upside_down: bool = False
    name: str = ""
    scanner: str = "demo"   # scanner population (formread.demo.styles.SCANNERS)


def _name_files(files: list[_File]) -> None:
    first = 1
    for f in files:
        last = first + f.pages - 1
        stem = f"scan_{first:03d}" if f.pages == 1 else f"scan_{first:03d}-{last:03d}"
        f.name = stem + _SUFFIX[f.fmt]
        first = last + 1


def _restyle(files: list[_File], scanners: list[str], rng: np.random.Generator) -> None:
    """Give each file a scanner population (drawn from ``scanners``) and that population's
    formats, resolution and JPEG quality; then name the files again."""
    for f in files:
        f.scanner = scanners[int(rng.integers(0, len(scanners)))] if len(scanners) > 1 else scanners[0]
        pop: ScannerPopulation = SCANNERS[f.scanner]
        if pop.formats == "tiff":
            f.fmt = "tiff"
        elif pop.formats == "jpeg":
            f.fmt = "jpeg" if f.pages == 1 else "pdf"
        if pop.jpeg_quality is not None:
            f.quality = int(rng.integers(pop.jpeg_quality[0], pop.jpeg_quality[1] + 1))
        if pop.dpis is not None:
            f.dpi = int(pop.dpis[int(rng.integers(0, len(pop.dpis)))])
    _name_files(files)


def _plan(count: int, rng: np.random.Generator) -> list[_File]:
    """Which files hold which pages: one 3-page TIFF, one 2-page PDF (when count allows),
    the rest single pages, mostly JPEG, some grey PNG and bilevel TIFF, one upside down."""
    files: list[_File] = []
    singles = count
    if count >= 6:
        files += [_File("tiff", 3, 200, 0), _File("pdf", 2, 200, int(rng.integers(70, 86)))]
        singles -= 5
    n_png = min(max(1, round(0.08 * singles)), singles - 1) if singles >= 2 else 0
    n_tiff = min(max(1, round(0.25 * singles)), singles - 1 - n_png) if singles >= 3 else 0
    kinds = ["png"] * n_png + ["tiff"] * n_tiff + ["jpeg"] * (singles - n_png - n_tiff)
    n_300 = max(1, round(0.15 * singles)) if singles >= 3 else 0
    for k, fmt in enumerate(kinds):
        # some pages at 300 dpi: the first TIFF, then JPEGs (never PNG: files stay small)
        first_tiff = fmt == "tiff" and k == n_png
        dpi = 300 if (first_tiff or (fmt == "jpeg" and k - n_png - n_tiff < n_300 - 1)) else 200
        files.append(_File(fmt, 1, dpi, int(rng.integers(70, 91))))
    rng.shuffle(files)
    if count >= 2:
        jpegs = [f for f in files if f.fmt == "jpeg" and f.pages == 1]
        jpegs[int(rng.integers(0, len(jpegs)))].upside_down = True
    _name_files(files)
    return files


def _sources(path: Path, *, strict: bool) -> set[str]:
    """File names listed in a truth file; a partial file (``strict=False``) skips broken lines."""
    names = set()
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        try:
            names.add(str(json.loads(line)["source"]))
        except (ValueError, KeyError, TypeError, RecursionError):
            if strict and line.strip():
                raise ParameterError(f"{path}: not a demo ground truth; choose a new or empty folder") from None
    return names


def _prepare(outdir: Path) -> None:
    """Make ``outdir`` ready: new, empty, or a previous (possibly interrupted) demo set whose
    listed scans and truth are removed.  Other files are never touched."""
    if outdir.exists() and not outdir.is_dir():
        raise ParameterError(f"{outdir}: not a folder")
    try:
        outdir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        blocked = next((p for p in outdir.parents if p.exists() and not p.is_dir()), None)
        why = f"{blocked} is a file, not a folder" if blocked is not None else (e.strerror or str(e))
        raise ParameterError(f"{outdir}: cannot be made ({why})") from None
    try:                                   # a folder that cannot be written is said before any work
        fd, probe = tempfile.mkstemp(prefix=".formread-probe.", dir=outdir)
        os.close(fd)
        os.unlink(probe)
    except OSError as e:
        raise ParameterError(f"{outdir}: cannot be written ({e.strerror or e})") from None
    truth, part = outdir / TRUTH_NAME, outdir / PART_NAME
    if not truth.is_file() and not part.is_file():
        if any(p.name not in (LAYOUT_NAME, "README.md") for p in outdir.iterdir()):
            raise ParameterError(f"{outdir}: folder is not empty and holds no demo {TRUTH_NAME}; "
                                 "choose a new or empty folder")
        return
    old = _sources(truth, strict=True) if truth.is_file() else set()
    old |= _sources(part, strict=False) if part.is_file() else set()
    for name in old:
        p = outdir / name
        if p.parent == outdir and p.is_file():
            p.unlink()
    truth.unlink(missing_ok=True)
    part.unlink(missing_ok=True)


def _save(path: Path, f: _File, scans: list[np.ndarray], thresholds: list[float], title: str) -> None:
    ims = [Image.fromarray(a) for a in scans]
    dpi = (f.dpi, f.dpi)
    if f.fmt == "jpeg":
        ims[0].save(path, "JPEG", quality=f.quality, dpi=dpi, optimize=True)
    elif f.fmt == "png":
        ims[0].save(path, "PNG", dpi=dpi, compress_level=9)
    elif f.fmt == "tiff":
        bil = [to_bilevel(a, round(t)) for a, t in zip(scans, thresholds)]
        bil[0].save(path, "TIFF", compression="group4", dpi=dpi, save_all=True, append_images=bil[1:])
    else:
        ims[0].save(path, "PDF", resolution=float(f.dpi), quality=f.quality, save_all=True,
                    append_images=ims[1:], title=title, creationDate=_PDF_DATE,
                    modDate=_PDF_DATE)


def _writer_record(population: str, w) -> dict:
    return {"population": population, "size": round(w.size, 3), "size_open": round(w.size_open, 3),
            "slant": round(w.slant, 3), "ink": round(w.ink, 1),
            "pen_mm": None if w.pen_mm is None else round(w.pen_mm, 3), "blotch": round(w.blotch, 3)}


def make_demo(outdir: str | Path, *, count: int = 30, seed: int = 7, style: str = "demo", form: str = "meter",
              half: str | None = None, progress: Callable[..., None] | None = None) -> dict:
    """Write ``count`` filled and scanned demo forms, the layout and the ground truth to ``outdir``.

    The digits come only from the MNIST sample's held-out test part
    (``mnist_split_indices()["test"]``), never from the part the shipped model trained on.
    Deterministic: the same arguments give the same files, byte for byte.

    Parameters
    ----------
    outdir : folder, new or empty or a previous demo set (its scans and truth are replaced)
    count : number of pages (>= 1)
    seed : seed of the numpy Generator behind every random choice
    style : writer and scanner population, one of :data:`formread.demo.styles.STYLES`
        (``"demo"``: the shipped demo's)
    form : ``"meter"`` (the water-meter card) or ``"slip"`` (the produce delivery slip)
    half : None (the whole MNIST test part), ``"a"`` or ``"b"`` (only that fixed half of it)
    progress : called as ``progress(done, total, file=name)`` after each page

    Returns
    -------
    dict with ``pages``, ``files``, ``fields`` (field values in the truth), ``digits``
    (handwritten digits), ``mistakes`` (forms with a deliberate writer mistake), ``seconds``,
    ``mnist_indices`` (list of int, the MNIST sample index of every digit drawn, in order),
    ``mnist_by_page`` (per page in truth order, field name -> list of those indices),
    ``style``, ``form`` and ``half``.

    Raises
    ------
    ParameterError
        Bad ``count``, ``seed``, ``style``, ``form`` or ``half``, or ``outdir`` is a non-empty
        folder that is not a demo set.
    """
    check_param(isinstance(count, int) and 1 <= count <= MAX_COUNT, "count", f"an integer in 1..{MAX_COUNT:,}",
                count)
    check_param(isinstance(seed, int) and seed >= 0, "seed", "an integer >= 0", seed)
    check_param(style in STYLES, "style", f"one of {', '.join(STYLES)}", style)
    check_param(form in FORMS, "form", f"one of {', '.join(FORMS)}", form)
    check_param(half is None or half in HALVES, "half", "None, 'a' or 'b'", half)
    t0 = time.perf_counter()
    outdir = Path(outdir)
    _prepare(outdir)
    spec = FORMS[form]
    legacy = style == "demo" and form == "meter" and half is None   # the shipped demo's record form
    layout = read_card_layout(spec.layout_path)
    bank = load_test_digits(half)
    seq = np.random.SeedSequence(seed)
    plan_seq, *page_seqs = seq.spawn(count + 1)
    plan_rng = np.random.default_rng(plan_seq)
    files = _plan(count, plan_rng)
    kinds = spec.mistake_kinds
    n_mistakes = max(1, round(spec.mistake_share * count)) if count >= 4 else 0
    mistake_pages: np.ndarray | list[int] = plan_rng.choice(count, size=n_mistakes, replace=False) if n_mistakes else []
    first_kind = int(plan_rng.integers(0, len(kinds)))
    mistakes = {int(p): kinds[(first_kind + k) % len(kinds)] for k, p in enumerate(sorted(mistake_pages))}
    writer_pops, scanner_pops = style_populations(style)
    if style != "demo":
        # drawn from a further child of the seed: the shipped kind's draws stay as they were
        _restyle(files, scanner_pops, np.random.default_rng(seq.spawn(1)[0]))

    records, used, by_page, digits, done = [], [], [], 0, 0
    shutil.copyfile(spec.layout_path, outdir / LAYOUT_NAME)
    # the records of a file go to the partial truth BEFORE the file is written, so a run cut
    # short leaves a folder the next run can clear; the full truth appears only at the end
    with (outdir / PART_NAME).open("w", encoding="utf-8") as part:
        for f in files:
            scans, recs, thresholds = [], [], []
            scanner = SCANNERS[f.scanner]
            for k in range(f.pages):
                rng = np.random.default_rng(page_seqs[done + k])
                mistake = mistakes.get(done + k)
                values = spec.values(rng, mistake)
                if style == "demo":
                    population, writer = "demo", random_writer(rng)
                else:
                    population = writer_pops[int(rng.integers(0, len(writer_pops)))]
                    writer = draw_writer(WRITERS[population], rng)
                card = render_card(layout, f.dpi, spec.text)
                per_field = {}
                for fld in layout.fields:
                    n0 = len(writer.used)
                    write_field(card, fld, values[fld.name], writer, bank, f.dpi, rng)
                    per_field[fld.name] = writer.used[n0:]
                settings = random_scan_settings(
                    rng, dpi=f.dpi, page_mm=(layout.width_mm, layout.height_mm),
                    marks_mm=marks_mm(layout), upside_down=f.upside_down, noise=_NOISE[f.fmt],
                    blur=scanner.blur)
                scans.append(simulate_scan(card, settings, rng))
                lo_hi = scanner.bilevel_threshold
                thresholds.append(float(rng.uniform(*lo_hi)) if lo_hi is not None else 150.0)
                used += writer.used
                digits += len(writer.used)
                by_page.append(per_field)
                rec: dict[str, Any] = {"source": f.name, "page_number": k + 1, "fields": values,
                       "scan": settings.as_record(), "writer_mistakes": [mistake] if mistake else []}
                if not legacy:
                    rec["scan"].update(scanner=f.scanner, format=f.fmt, blur_px=round(settings.blur_px, 3))
                    if f.fmt == "tiff":
                        rec["scan"]["bilevel_threshold"] = round(thresholds[-1])
                    if f.fmt in ("jpeg", "pdf"):
                        rec["scan"]["jpeg_quality"] = f.quality
                    rec.update(style=style, form=form, half=half, writer=_writer_record(population, writer),
                               mnist=per_field)
                recs.append(rec)
                if progress is not None and k < f.pages - 1:
                    progress(done + k + 1, count, file=f.name)
            part.write("".join(json.dumps(r) + "\n" for r in recs))
            part.flush()
            _save(outdir / f.name, f, scans, thresholds, spec.pdf_title)
            records += recs
            done += f.pages
            if progress is not None:
                progress(done, count, file=f.name)
    os.replace(outdir / PART_NAME, outdir / TRUTH_NAME)
    return {"pages": count, "files": len(files), "fields": sum(len(r["fields"]) for r in records),
            "digits": digits, "mistakes": len(mistakes), "seconds": round(time.perf_counter() - t0, 2),
            "mnist_indices": used, "mnist_by_page": by_page, "style": style, "form": form, "half": half}
