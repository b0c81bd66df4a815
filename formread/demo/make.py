"""Make a demo set: filled, scanned water-meter cards with their ground truth.

The scenario is invented: plot holders of the fictional "Larkspur Lane Allotment
Cooperative" send monthly water-meter cards.  The handwriting comes ONLY from the held-out
test part of the MNIST sample (never from the training part the shipped model learned
from), so reading the demo measures the model on unseen writers.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image

from ..errors import ParameterError, check_param
from .card import LAYOUT_PATH, marks_mm, read_card_layout, render_card
from .fill import load_test_digits, random_writer, write_field
from .scan import random_scan_settings, simulate_scan, to_bilevel
from .values import MISTAKE_KINDS, card_values

__all__ = ["make_demo", "demo_layout_path", "TRUTH_NAME", "LAYOUT_NAME"]

TRUTH_NAME = "truth.jsonl"
PART_NAME = "truth.jsonl.part"
LAYOUT_NAME = "layout.toml"
_PDF_DATE = time.struct_time((2026, 1, 1, 0, 0, 0, 3, 1, 0))   # fixed, so the bytes repeat
_NOISE = {"jpeg": (0.5, 1.5), "pdf": (0.5, 1.5), "png": (0.0, 0.0), "tiff": (1.0, 3.0)}
_SUFFIX = {"jpeg": ".jpg", "png": ".png", "tiff": ".tif", "pdf": ".pdf"}


def demo_layout_path() -> Path:
    """The demo card's layout file (TOML, the format in DEVELOPERS.md)."""
    return LAYOUT_PATH


@dataclass
class _File:
    fmt: str          # "jpeg" | "png" | "tiff" (bilevel Group 4) | "pdf" (grey JPEG pages)
    pages: int
    dpi: int
    quality: int      # JPEG quality (jpeg and pdf)
    upside_down: bool = False
    name: str = ""


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
    first = 1
    for f in files:
        last = first + f.pages - 1
        stem = f"scan_{first:03d}" if f.pages == 1 else f"scan_{first:03d}-{last:03d}"
        f.name = stem + _SUFFIX[f.fmt]
        first = last + 1
    return files


def _sources(path: Path, *, strict: bool) -> set[str]:
    """File names listed in a truth file; a partial file (``strict=False``) skips broken lines."""
    names = set()
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        try:
            names.add(str(json.loads(line)["source"]))
        except (ValueError, KeyError, TypeError):
            if strict and line.strip():
                raise ParameterError(f"{path}: not a demo ground truth; choose a new or empty folder") from None
    return names


def _prepare(outdir: Path) -> None:
    """Make ``outdir`` ready: new, empty, or a previous (possibly interrupted) demo set whose
    listed scans and truth are removed.  Other files are never touched."""
    if outdir.exists() and not outdir.is_dir():
        raise ParameterError(f"{outdir}: not a folder")
    outdir.mkdir(parents=True, exist_ok=True)
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


def _save(path: Path, f: _File, scans: list[np.ndarray]) -> None:
    ims = [Image.fromarray(a) for a in scans]
    dpi = (f.dpi, f.dpi)
    if f.fmt == "jpeg":
        ims[0].save(path, "JPEG", quality=f.quality, dpi=dpi, optimize=True)
    elif f.fmt == "png":
        ims[0].save(path, "PNG", dpi=dpi, compress_level=9)
    elif f.fmt == "tiff":
        bil = [to_bilevel(a) for a in scans]
        bil[0].save(path, "TIFF", compression="group4", dpi=dpi, save_all=True, append_images=bil[1:])
    else:
        ims[0].save(path, "PDF", resolution=float(f.dpi), quality=f.quality, save_all=True,
                    append_images=ims[1:], title="Water meter cards", creationDate=_PDF_DATE,
                    modDate=_PDF_DATE)


def make_demo(outdir: str | Path, *, count: int = 30, seed: int = 7,
              progress: Callable[..., None] | None = None) -> dict:
    """Write ``count`` filled and scanned demo cards, the layout and the ground truth to ``outdir``.

    The digits come only from the MNIST sample's held-out test part
    (``mnist_split_indices()["test"]``), never from the part the shipped model trained on.
    Deterministic: the same ``count`` and ``seed`` give the same files, byte for byte.

    Parameters
    ----------
    outdir : folder, new or empty or a previous demo set (its scans and truth are replaced)
    count : number of pages (>= 1)
    seed : seed of the numpy Generator behind every random choice
    progress : called as ``progress(done, total, file=name)`` after each page

    Returns
    -------
    dict with ``pages``, ``files``, ``fields`` (field values in the truth), ``digits``
    (handwritten digits), ``mistakes`` (cards with a deliberate writer mistake), ``seconds``,
    and ``mnist_indices`` (list of int, the MNIST sample index of every digit drawn, in order).

    Raises
    ------
    ParameterError
        Bad ``count`` or ``seed``, or ``outdir`` is a non-empty folder that is not a demo set.
    """
    check_param(isinstance(count, int) and count >= 1, "count", "an integer >= 1", count)
    check_param(isinstance(seed, int) and seed >= 0, "seed", "an integer >= 0", seed)
    t0 = time.perf_counter()
    outdir = Path(outdir)
    _prepare(outdir)
    layout = read_card_layout(LAYOUT_PATH)
    bank = load_test_digits()
    seq = np.random.SeedSequence(seed)
    plan_seq, *page_seqs = seq.spawn(count + 1)
    plan_rng = np.random.default_rng(plan_seq)
    files = _plan(count, plan_rng)
    n_mistakes = max(1, round(0.06 * count)) if count >= 4 else 0
    mistake_pages = plan_rng.choice(count, size=n_mistakes, replace=False) if n_mistakes else []
    first_kind = int(plan_rng.integers(0, 2))
    mistakes = {int(p): MISTAKE_KINDS[(first_kind + k) % 2] for k, p in enumerate(sorted(mistake_pages))}

    records, used, digits, done = [], [], 0, 0
    shutil.copyfile(LAYOUT_PATH, outdir / LAYOUT_NAME)
    # the records of a file go to the partial truth BEFORE the file is written, so a run cut
    # short leaves a folder the next run can clear; the full truth appears only at the end
    with (outdir / PART_NAME).open("w", encoding="utf-8") as part:
        for f in files:
            scans, recs = [], []
            for k in range(f.pages):
                rng = np.random.default_rng(page_seqs[done + k])
                mistake = mistakes.get(done + k)
                values = card_values(rng, mistake=mistake, litres_empty=bool(rng.random() < 0.1))
                writer = random_writer(rng)
                card = render_card(layout, f.dpi)
                for fld in layout.fields:
                    write_field(card, fld, values[fld.name], writer, bank, f.dpi, rng)
                settings = random_scan_settings(
                    rng, dpi=f.dpi, page_mm=(layout.width_mm, layout.height_mm),
                    marks_mm=marks_mm(layout), upside_down=f.upside_down, noise=_NOISE[f.fmt])
                scans.append(simulate_scan(card, settings, rng))
                used += writer.used
                digits += len(writer.used)
                recs.append({"source": f.name, "page_number": k + 1, "fields": values,
                             "scan": settings.as_record(), "writer_mistakes": [mistake] if mistake else []})
                if progress is not None and k < f.pages - 1:
                    progress(done + k + 1, count, file=f.name)
            part.write("".join(json.dumps(r) + "\n" for r in recs))
            part.flush()
            _save(outdir / f.name, f, scans)
            records += recs
            done += f.pages
            if progress is not None:
                progress(done, count, file=f.name)
    os.replace(outdir / PART_NAME, outdir / TRUTH_NAME)
    return {"pages": count, "files": len(files), "fields": sum(len(r["fields"]) for r in records),
            "digits": digits, "mistakes": len(mistakes), "seconds": round(time.perf_counter() - t0, 2),
            "mnist_indices": used}
