"""Helpers for the batch-reading tests: a tiny model, many distinct pages made cheaply, readings per page.

Pages: the first few pages of the shipped demo forms (invented cards written with
held-out MNIST digits), copied as PNG files with one paper pixel changed per copy,
so every copy has its own content hash but reads exactly like its original.
"""

from __future__ import annotations

import sqlite3
import sys
from functools import lru_cache
from pathlib import Path

import numpy as np
from PIL import Image

from formread.imaging.load import load_pages
from formread.nn.model import build_model
from formread.nn.modelfile import save_model
from formread.store import demo_forms as demo_dir

SCAN_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".pdf")


def tiny_model(path: Path) -> Path:
    """A small random-weight model file (one dense layer): fast, deterministic readings."""
    model = build_model([{"type": "flatten"}, {"type": "dense", "in": 784, "out": 10}], np.random.default_rng(5))
    save_model(path, model, {"temperature": 1.5})
    return path


def demo_layout() -> Path:
    return demo_dir() / "layout.toml"


@lru_cache(maxsize=1)
def _base_pages(k: int):
    pages = []
    for f in sorted(p for p in demo_dir().iterdir() if p.suffix.lower() in SCAN_SUFFIXES):
        pages += load_pages(f)
        if len(pages) >= k:
            break
    assert len(pages) >= k, "the shipped demo forms hold too few pages"
    return tuple(pages[:k])


def write_copies(folder: Path, n: int, *, k: int = 3, prefix: str = "page") -> list[Path]:
    """Write ``n`` PNG pages to ``folder``: copies of the first ``k`` demo pages, each one pixel apart.

    The changed pixel is in the top margin (paper), flipped from 255 to 254 or
    so: invisible to imaging, enough for a distinct content hash.
    """
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for i in range(n):
        page = _base_pages(k)[i % k]
        g = page.gray.copy()
        r, c = 3 + i // 200, g.shape[1] // 2 + i % 200
        g[r, c] = 254 if g[r, c] == 255 else 255
        p = folder / f"{prefix}_{i:03d}.png"
        Image.fromarray(g).save(p, format="PNG", compress_level=1, dpi=(page.dpi, page.dpi))
        out.append(p)
    return out


def readings(outdir: Path) -> dict:
    """``{(file name, page number): {field: (reading, confidence, decision, reason)}}`` from a ledger."""
    conn = sqlite3.connect(Path(outdir) / "ledger.sqlite")
    try:
        rows = conn.execute("SELECT p.source, p.page_number, f.name, f.reading, f.confidence, f.decision, f.reason "
                            "FROM fields f JOIN pages p ON p.id = f.page_id").fetchall()
    finally:
        conn.close()
    out: dict = {}
    for src, page, name, reading, conf, decision, reason in rows:
        out.setdefault((Path(src).name, page), {})[name] = (reading, round(conf or 0.0, 6), decision, reason)
    return out


def formread_argv(*args: str) -> list[str]:
    """Command line running the formread CLI in a fresh interpreter."""
    return [sys.executable, "-c", "from formread.cli.main import main; main()", *args]
