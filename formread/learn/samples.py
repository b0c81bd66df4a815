"""Labelled local handwriting samples, taken from the fields a clerk confirmed or corrected.

The samples folder has the layout every training command reads (``DIR/<digit>/*.png``,
see :func:`formread.learn.datasets.load_samples_folder`) plus ``manifest.jsonl``: one record
per image with the page it came from (file, page number, content hash), the field, the
position in the field, the reviewer and the time it was added.

A field gives samples only when its digit images line up with the decided value: the
reader stores one normalised 28x28 image per character it read (``digits/<page>/<field>.npz``),
so the value must have exactly that many digits.  A boxed field corrected to another length,
or an open field whose segmentation does not match the corrected length, gives none (it is
counted as skipped).  An image already in the folder is not added twice (the file name is a
hash of its pixels); a field decided again with another value has its old samples relabelled.
"""

from __future__ import annotations

import hashlib
import io
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image

from ..errors import DataError, LedgerError
from ..fileio import atomic_write
from ..ledger.fieldfile import load_digits
from ..ledger.store import open_ledger
from ..review.queries import list_decided

__all__ = ["SamplesReport", "collect_samples", "MANIFEST"]

MANIFEST = "manifest.jsonl"


@dataclass
class SamplesReport:
    """What :func:`collect_samples` did.

    Attributes
    ----------
    added : int            new images written
    duplicates : int       images already in the folder with the same label
    relabelled : int       images whose label changed because the field was decided again
    skipped_fields : list of (page_id, field name, why)   decided fields that gave no samples
    fields_used : int      decided fields that gave samples
    per_digit : list of int (10,)   images in the folder per digit after the call
    """

    added: int = 0
    duplicates: int = 0
    relabelled: int = 0
    fields_used: int = 0
    skipped_fields: list = field(default_factory=list)
    per_digit: list = field(default_factory=lambda: [0] * 10)


def _to_png_array(digit: np.ndarray) -> np.ndarray:
    """(1, 28, 28) or (28, 28) float in [0, 1] -> (28, 28) uint8, ink light on dark."""
    return np.clip(np.rint(np.asarray(digit, np.float32).reshape(28, 28) * 255), 0, 255).astype(np.uint8)


def _png_bytes(img: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, format="PNG")
    return buf.getvalue()


_SAMPLE = re.compile(r"[0-9]/[0-9a-f]{20}\.png\Z")


def _inside(root: Path, rel) -> Path | None:
    """The sample file ``rel`` (as a manifest names it) inside ``root``, or None: a manifest record
    never makes formread touch a file outside the samples folder."""
    if not isinstance(rel, str) or not _SAMPLE.match(rel):
        return None
    p = (root / rel).resolve()
    return p if p.parent.parent == root.resolve() else None


def _read_manifest(path: Path) -> list[dict]:
    if not path.is_file():
        return []
    try:
        text = path.read_bytes().decode("utf-8")
    except UnicodeDecodeError as e:
        raise DataError(f"{path}: not UTF-8 text (byte {e.start})") from None
    out = []
    for n, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except (ValueError, RecursionError):
            raise DataError(f"{path}: line {n} is not JSON") from None
        if not isinstance(rec, dict) or "file" not in rec or "digit" not in rec:
            raise DataError(f"{path}: line {n} is not a sample record")
        if _inside(path.parent, rec["file"]) is None:
            raise DataError(f"{path}: line {n} names {str(rec['file'])[:60]!r}, not a sample of this folder "
                            "(<digit>/<name>.png)")
        out.append(rec)
    return out


def collect_samples(outdir: str | Path, samples_dir: str | Path, *,
                    statuses: tuple[str, ...] = ("confirmed", "corrected")) -> SamplesReport:
    """Write labelled digit images from a run's decided fields into ``samples_dir``.

    Parameters
    ----------
    outdir : path
        Output folder of ``formread read`` (holds ``ledger.sqlite`` and ``digits/``).
    samples_dir : path
        Samples folder, created if missing; existing samples are kept.
    statuses : tuple of str
        Which final statuses count as a clerk's label.

    Returns
    -------
    SamplesReport

    Raises
    ------
    LedgerError when the ledger cannot be opened; DataError for a damaged manifest.
    """
    outdir, root = Path(outdir), Path(samples_dir)
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        why = "a file is in its place" if root.exists() and not root.is_dir() else (e.strerror or str(e))
        raise DataError(f"{root}: samples folder cannot be created ({why})") from None
    manifest_path = root / MANIFEST
    records = _read_manifest(manifest_path)
    by_key = {(r.get("content_hash"), r.get("field"), r.get("position")): r for r in records}
    report = SamplesReport()

    with open_ledger(outdir, create=False) as led:
        decided = list_decided(led, statuses=statuses)
        pages = {r["id"]: dict(r) for r in led.conn.execute("SELECT id, source, page_number, content_hash FROM pages")}

    for d in decided:
        value = d.final_value or ""
        if not value.isdigit():
            report.skipped_fields.append((d.page_id, d.name, "no digits in the decided value"))
            continue
        if d.digits_path is None or not d.digits_path.is_file():
            report.skipped_fields.append((d.page_id, d.name, "no digit images stored"))
            continue
        try:
            images = load_digits(d.digits_path)
        except LedgerError as e:
            report.skipped_fields.append((d.page_id, d.name, str(e)))
            continue
        if len(images) != len(value):
            report.skipped_fields.append(
                (d.page_id, d.name, f"{len(images)} digit images for a {len(value)}-digit value"))
            continue
        page = pages.get(d.page_id)
        report.fields_used += 1
        for pos, (img, ch) in enumerate(zip(images, value)):
            digit = int(ch)
            arr = _to_png_array(img)
            name = hashlib.sha256(arr.tobytes()).hexdigest()[:20] + ".png"
            key = (page["content_hash"] if page else None, d.name, pos)
            old = by_key.get(key)
            if old is not None and old["digit"] == digit:
                report.duplicates += 1
                continue
            if old is not None:
                old_path = _inside(root, old["file"])
                assert old_path is not None  # _read_manifest checked every record
                old_path.unlink(missing_ok=True)
                records.remove(old)
                report.relabelled += 1
            rel = f"{digit}/{name}"
            if (root / rel).exists():  # the same pixels came from another field already
                report.duplicates += 1
                continue
            atomic_write(root / rel, _png_bytes(arr))
            if old is None:
                report.added += 1
            rec = {"file": rel, "digit": digit,
                   "source": page["source"] if page else None,
                   "page_number": page["page_number"] if page else None,
                   "content_hash": key[0], "field": d.name, "position": pos,
                   "status": d.final_status, "reviewer": d.reviewer, "decided": d.at}
            records.append(rec)
            by_key[key] = rec

    text = "".join(json.dumps(r, sort_keys=True) + "\n" for r in records)
    atomic_write(manifest_path, text.encode("utf-8"))
    report.per_digit = [len(list((root / str(k)).glob("*.png"))) if (root / str(k)).is_dir() else 0
                        for k in range(10)]
    return report
