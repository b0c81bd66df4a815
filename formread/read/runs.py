"""What each run of a ledger read its pages with: the layout as it was then.

A run stores the layout file's text when it starts (schema version 2); review, scoring and learning
check values against that text, never against the file as it may have been edited or deleted
since.  A ledger of the first release has only the file's path and hash: the file is used while
its hash is unchanged.
"""

from __future__ import annotations

import hashlib
import logging
from pathlib import Path

from ..errors import LayoutError
from ..form.layout import Layout, parse_layout, read_layout_text

__all__ = ["run_layout", "run_layouts", "page_layout"]

log = logging.getLogger(__name__)


def run_layout(ledger, run_id: int, form: str | None = None) -> Layout | None:
    """The layout run ``run_id`` of ``ledger`` (an open formread.ledger.store.Ledger) read form ``form``
    with (None: the run's first, or only, layout); None when it cannot be known."""
    if form is not None:
        row = ledger.conn.execute("SELECT layout_path, layout_text FROM run_forms WHERE run_id = ? AND form = ?",
                                  (int(run_id), form)).fetchone()
        if row is not None:
            try:
                return parse_layout(row["layout_text"], str(row["layout_path"]))
            except LayoutError as e:
                log.warning("%s; field sizes and rules unknown", e)
                return None
    row = ledger.conn.execute("SELECT layout_path, layout_sha256, layout_text FROM runs WHERE id = ?",
                              (int(run_id),)).fetchone()
    if row is None:
        return None
    try:
        if row["layout_text"] is not None:
            return parse_layout(row["layout_text"], str(row["layout_path"]))
        cands = [Path(row["layout_path"])]
        if not cands[0].is_absolute():
            cands.append(ledger.outdir / row["layout_path"])
        for p in cands:
            if p.is_file():
                text = read_layout_text(p)
                if hashlib.sha256(p.read_bytes()).hexdigest() != row["layout_sha256"]:
                    log.warning("%s: changed since run %s read its pages; field sizes and rules unknown", p, run_id)
                    return None
                return parse_layout(text, str(p))
    except (LayoutError, OSError) as e:
        log.warning("%s; field sizes and rules unknown", e)
        return None
    log.warning("%s: layout of run %s not found; field sizes and rules unknown", row["layout_path"], run_id)
    return None


def run_layouts(ledger) -> dict[tuple, Layout | None]:
    """``{(run id, form): layout}`` of every run of ``ledger`` and every form it read (form None:
    the run's first layout, as a ledger of an earlier release names it)."""
    out: dict = {}
    for (run_id,) in ledger.conn.execute("SELECT id FROM runs").fetchall():
        out[(int(run_id), None)] = run_layout(ledger, int(run_id))
    for run_id, form in ledger.conn.execute("SELECT run_id, form FROM run_forms").fetchall():
        out[(int(run_id), form)] = run_layout(ledger, int(run_id), form)
    return out


def page_layout(layouts: dict, run_id: int, form: str | None) -> Layout | None:
    """From :func:`run_layouts`: the layout a page of run ``run_id`` read as ``form`` was read with."""
    return layouts.get((int(run_id), form)) or (layouts.get((int(run_id), None)) if form is None else None)
