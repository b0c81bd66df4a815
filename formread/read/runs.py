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

__all__ = ["run_layout", "run_layouts"]

log = logging.getLogger(__name__)


def run_layout(ledger, run_id: int) -> Layout | None:
    """The layout run ``run_id`` of ``ledger`` (an open formread.ledger.store.Ledger) read with; None
    when it cannot be known."""
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


def run_layouts(ledger) -> dict[int, Layout | None]:
    """``{run id: layout}`` of every run of ``ledger``."""
    return {int(r[0]): run_layout(ledger, int(r[0])) for r in ledger.conn.execute("SELECT id FROM runs")}
