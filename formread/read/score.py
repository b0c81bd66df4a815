"""Scoring readings against known answers, and the error-versus-review curve as a PNG.

Truth file (``truth.jsonl``): one JSON object per line and per page::

    {"source": "cards_01.tif", "page_number": 1, "fields": {"meter": "04512", "note": ""}}

with ``""`` for a field left empty.  Blank lines are ignored.

Readings: records (dicts) with keys ``source``, ``page_number``, ``field`` (or
``name``), ``reading`` (str, '' empty, None no reading), ``confidence``,
``decision`` ('accepted' | 'review') and ``reason`` (may be missing).

Matching: a page is identified by (base name of its file, page number): the
truth's ``source`` and the readings' ``source`` are both reduced to their base
name (the truth's source is read relative to the truth file's folder, so
``batch1/cards_01.tif`` and ``/scans/batch1/cards_01.tif`` match).  Two
different files with the same base name on either side make the match ambiguous:
a :class:`DataError`.

Pages on one side only are **recorded differences**, not errors: the report lists
truth pages that were not read and read pages absent from the truth (and likewise
fields), and scores the pages found on both sides.  ``strict=True`` turns the first
difference into a one-line :class:`DataError`; no page in common is always one.

Figures (all over the fields of the matched pages that appear in the truth):

- ``field_accuracy_before_review``: share of fields whose reading equals the truth;
- ``review_rate``: share of fields sent to review;
- ``error_among_accepted``: wrong accepted / accepted;
- ``digit_accuracy``: position-wise share of digits equal to the truth, over the
  non-empty fields whose reading has the same length as the truth (a length
  error has no position-wise alignment; ``length_mismatches`` counts those).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path, PurePath, PureWindowsPath

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from formread.errors import DataError
from formread.read.tune import choose_threshold, error_review_curve

__all__ = ["TruthPage", "FieldScore", "ScoreReport", "load_truth", "score_readings", "write_curve_png"]


@dataclass(frozen=True)
class TruthPage:
    """One page of known answers; ``line`` is its line number in the truth file."""

    source: str
    page_number: int
    fields: dict[str, str]
    line: int = 0


@dataclass(frozen=True)
class FieldScore:
    """One field read and its true value."""

    source: str
    page_number: int
    field: str
    truth: str
    reading: str | None
    confidence: float
    decision: str
    reason: str | None
    correct: bool
    eligible: bool          # acceptable at some threshold: accepted now, or in review only for low confidence
    digits_compared: int
    digits_correct: int
    audit: bool = False     # would have been accepted; sent to review as a spot check


def _base(source: str) -> str:
    return PureWindowsPath(str(source)).name if "\\" in str(source) else PurePath(str(source)).name


MAX_PAGE_NUMBER = 1_000_000
"""Largest page number a truth record may name (a scan file of a million pages is not a form batch)."""


def load_truth(path) -> list[TruthPage]:
    """Read a ``truth.jsonl`` file; DataError("<file> line N: <problem>") on any bad line."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DataError(f"{p}: no such truth file") from None
    except IsADirectoryError:
        raise DataError(f"{p}: is a folder, not a truth file") from None
    except UnicodeDecodeError as e:
        raise DataError(f"{p}: not UTF-8 text (byte {e.start})") from None
    except OSError as e:
        raise DataError(f"{p}: cannot read the truth file ({e.strerror or e})") from None
    out: list[TruthPage] = []
    seen: dict[tuple[str, int], int] = {}
    for n, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        where = f"{p} line {n}"
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as e:
            raise DataError(f"{where}: not JSON ({e.msg})") from None
        except RecursionError:
            raise DataError(f"{where}: JSON nested too deeply to be a truth record") from None
        if not isinstance(obj, dict):
            raise DataError(f"{where}: expected a JSON object")
        src, page, fields = obj.get("source"), obj.get("page_number", 1), obj.get("fields")
        if not isinstance(src, str) or not src:
            raise DataError(f"{where}: 'source' must be a file name")
        if isinstance(page, bool) or not isinstance(page, int) or not 1 <= page <= MAX_PAGE_NUMBER:
            raise DataError(f"{where}: 'page_number' must be a whole number from 1 to {MAX_PAGE_NUMBER:,}; "
                            f"got {str(page)[:40]!r}")
        if not isinstance(fields, dict):
            raise DataError(f"{where}: 'fields' must be an object of field name -> digits")
        for k, v in fields.items():
            if not isinstance(v, str) or not all(c in "0123456789X" for c in v):
                raise DataError(f"{where}: field {k!r}: value must be a string of digits ('' when empty); "
                                f"got {v!r}")
        key = (_base(src), page)
        if key in seen:
            raise DataError(f"{where}: page {page} of {key[0]!r} is already given on line {seen[key]}")
        seen[key] = n
        out.append(TruthPage(src, page, dict(fields), n))
    return out


def _digits(truth: str, reading: str | None) -> tuple[int, int]:
    if not truth or reading is None or len(reading) != len(truth):
        return 0, 0
    return len(truth), sum(a == b for a, b in zip(truth, reading))


@dataclass
class ScoreReport:
    """Field-by-field comparison and the differences between readings and truth."""

    truth_name: str
    fields: list[FieldScore]
    pages: int
    truth_pages_not_read: list[tuple[str, int]] = field(default_factory=list)
    pages_not_in_truth: list[tuple[str, int]] = field(default_factory=list)
    truth_fields_not_read: list[tuple[str, int, str]] = field(default_factory=list)
    fields_not_in_truth: list[tuple[str, int, str]] = field(default_factory=list)

    @staticmethod
    def _figures(rows: list[FieldScore]) -> dict:
        n = len(rows)
        acc = [r for r in rows if r.decision == "accepted"]
        wrong_acc = sum(not r.correct for r in acc)
        compared = sum(r.digits_compared for r in rows)
        return {
            "fields": n,
            "accepted": len(acc),
            "review": n - len(acc),
            "audited": sum(r.audit for r in rows),
            "wrong_accepted": wrong_acc,
            "error_among_accepted": wrong_acc / len(acc) if acc else 0.0,
            "review_rate": (n - len(acc)) / n if n else 0.0,
            "field_accuracy_before_review": sum(r.correct for r in rows) / n if n else 0.0,
            "digit_accuracy": sum(r.digits_correct for r in rows) / compared if compared else None,
            "digits_compared": compared,
            "length_mismatches": sum(bool(r.truth) and r.reading is not None and len(r.reading) != len(r.truth)
                                     for r in rows),
        }

    def summary(self) -> dict:
        """JSON-ready figures: totals, differences, and ``per_field``."""
        out = {"truth": self.truth_name, "pages": self.pages, **self._figures(self.fields)}
        out.update({
            "truth_pages_not_read": len(self.truth_pages_not_read),
            "pages_not_in_truth": len(self.pages_not_in_truth),
            "truth_fields_not_read": len(self.truth_fields_not_read),
            "fields_not_in_truth": len(self.fields_not_in_truth),
        })
        if self.truth_pages_not_read:
            s, p = self.truth_pages_not_read[0]
            out["first_truth_page_not_read"] = f"{s} page {p}"
        names = sorted({r.field for r in self.fields})
        out["per_field"] = {n: self._figures([r for r in self.fields if r.field == n]) for n in names}
        return out

    def curve(self, confidence_level: float = 0.95) -> np.ndarray:
        """Error among accepted against review rate over thresholds; see ``tune.error_review_curve``.

        Returns ndarray of shape (M, 4), float64: threshold, review_rate, error, upper_bound.
        """
        if not self.fields:
            return np.zeros((0, 4))
        return error_review_curve([r.confidence for r in self.fields], [r.correct for r in self.fields],
                                  [r.eligible for r in self.fields], confidence_level=confidence_level)

    def tune(self, target: float = 0.005, confidence_level: float = 0.95, criterion: str = "estimate"):
        """The threshold these fields call for (``tune.choose_threshold``)."""
        return choose_threshold([r.confidence for r in self.fields], [r.correct for r in self.fields],
                                [r.eligible for r in self.fields], target=target,
                                confidence_level=confidence_level, criterion=criterion)


def score_readings(readings, truth, *, strict: bool = False, truth_name: str | None = None) -> ScoreReport:
    """Compare readings with known answers.

    Parameters
    ----------
    readings : iterable of dict
        Field records (see the module docstring).
    truth : path to a truth.jsonl file, or list of TruthPage
    strict : bool
        Raise DataError at the first page or field on one side only, instead of
        recording it.
    truth_name : str or None
        Name used in messages (default: the truth file's path).

    Raises
    ------
    DataError
        Bad truth file, ambiguous file names, malformed reading records, no page in
        common, or (``strict``) a difference.
    """
    if isinstance(truth, (str, Path)):
        name = truth_name or str(truth)
        pages = load_truth(truth)
    else:
        name = truth_name or "truth"
        pages = list(truth)
    truth_by_key: dict[tuple[str, int], TruthPage] = {}
    truth_src: dict[str, str] = {}
    for tp in pages:
        b = _base(tp.source)
        if truth_src.setdefault(b, tp.source) != tp.source:
            raise DataError(f"{name}: two files named {b!r} ({truth_src[b]!r}, {tp.source!r}); "
                            "file names must be unique")
        truth_by_key[(b, tp.page_number)] = tp

    read: dict[tuple[str, int], dict[str, dict]] = {}
    read_src: dict[str, str] = {}
    order: list[tuple[str, int]] = []
    for i, rec in enumerate(readings):
        try:
            src, page = str(rec["source"]), int(rec["page_number"])
            fname = rec["field"] if "field" in rec else rec["name"]
            if not isinstance(fname, str):
                raise TypeError("'field'")
            reading = rec.get("reading")
            conf = float(rec.get("confidence") or 0.0)
            decision = rec["decision"]
        except (KeyError, TypeError, ValueError) as e:
            raise DataError(f"{name}: reading record {i + 1}: missing or bad {e}") from None
        if reading is not None and not isinstance(reading, str):
            raise DataError(f"{name}: reading record {i + 1}: 'reading' must be text or null; got {reading!r}")
        if not (math.isfinite(conf) and 0.0 <= conf <= 1.0):
            raise DataError(f"{name}: reading record {i + 1}: 'confidence' must be in [0, 1]; got {conf!r}")
        b = _base(src)
        if read_src.setdefault(b, src) != src:
            raise DataError(f"{name}: two files read are named {b!r} ({read_src[b]!r}, {src!r}); "
                            "cannot match them to the truth")
        key = (b, page)
        if key not in read:
            read[key] = {}
            order.append(key)
        read[key][fname] = {"reading": reading, "confidence": conf, "decision": decision,
                            "reason": rec.get("reason"), "audit": bool(rec.get("audit", False))}

    truth_not_read = [(truth_by_key[k].source, k[1]) for k in truth_by_key if k not in read]
    not_in_truth = [(read_src[k[0]], k[1]) for k in order if k not in truth_by_key]
    if strict and truth_not_read:
        s, p = truth_not_read[0]
        raise DataError(f"{name}: page {p} of {s!r} is in the truth but was not read")
    if strict and not_in_truth:
        s, p = not_in_truth[0]
        raise DataError(f"{name}: page {p} of {s!r} was read but is not in the truth")
    common = [k for k in order if k in truth_by_key]
    if not common:
        first = next(iter(truth_by_key), None)
        hint = f" (first truth page: {first[0]} page {first[1]})" if first else " (the truth is empty)"
        raise DataError(f"{name}: no page read is in the truth{hint}")

    rows: list[FieldScore] = []
    truth_fields_not_read, fields_not_in_truth = [], []
    for key in common:
        tp, got = truth_by_key[key], read[key]
        for fname, true in tp.fields.items():
            if fname not in got:
                truth_fields_not_read.append((tp.source, key[1], fname))
                continue
            g = got[fname]
            dc, dok = _digits(true, g["reading"])
            eligible = g["decision"] == "accepted" or g["reason"] in ("low_confidence", "audit")
            rows.append(FieldScore(tp.source, key[1], fname, true, g["reading"], g["confidence"], g["decision"],
                                   g["reason"], g["reading"] == true, eligible, dc, dok, g["audit"]))
        fields_not_in_truth += [(tp.source, key[1], f) for f in got if f not in tp.fields]
    if strict and truth_fields_not_read:
        s, p, f = truth_fields_not_read[0]
        raise DataError(f"{name}: field {f!r} of {s!r} page {p} is in the truth but was not read")
    return ScoreReport(name, rows, len(common), truth_not_read, not_in_truth, truth_fields_not_read,
                       fields_not_in_truth)


# --- the curve as a PNG --------------------------------------------------------------------

def _nice_max(v: float) -> float:
    if v <= 0:
        return 1.0
    e = 10 ** math.floor(math.log10(v))
    for m in (1, 2, 2.5, 5, 10):
        if v <= m * e + 1e-12:
            return m * e
    return 10 * e


def write_curve_png(path, curve: np.ndarray, *, threshold: float | None = None, target: float | None = None,
                    title: str = "Error among accepted fields against review rate",
                    confidence_level: float = 0.95, size: tuple[int, int] = (720, 480)) -> Path:
    """Draw the error-versus-review curve with Pillow and save it as PNG.

    Parameters
    ----------
    path : str or Path
        Output file.
    curve : ndarray of shape (M, 4), float
        Rows (threshold, review_rate, error_among_accepted, upper_bound), as from
        ``ScoreReport.curve()`` or ``TuneResult.curve``.
    threshold : float or None
        A threshold to mark (the point of the curve with the smallest threshold >= it).
    target : float or None
        Target error, drawn as a dashed horizontal line.
    confidence_level : float
        Level of the curve's upper bound column, for the legend.
    size : (width, height) in pixels

    Returns
    -------
    Path of the written file.  DataError when it cannot be written.
    """
    c = np.asarray(curve, dtype=np.float64).reshape(-1, 4)
    c = c[c[:, 1] < 1.0 - 1e-12]          # nothing accepted: no error to show
    W, H = size
    img = Image.new("RGB", (W, H), "white")
    d = ImageDraw.Draw(img)
    font = ImageFont.load_default(size=13)
    small = ImageFont.load_default(size=11)
    left, right, top, bottom = 78, 24, 40, 58
    x0, x1, y0, y1 = left, W - right, top, H - bottom
    ymax_data = max([float(c[:, 2].max()) if len(c) else 0.0, target or 0.0]) * 100
    ymax = _nice_max(ymax_data * 1.05 if ymax_data > 0 else 1.0)

    def px(review, err):
        return x0 + (x1 - x0) * review, y1 - (y1 - y0) * min(err * 100 / ymax, 1.0)

    d.text((W / 2, 16), title, fill="black", font=font, anchor="mm")
    for i in range(6):                                   # x ticks: review rate 0..100 %
        x = x0 + (x1 - x0) * i / 5
        d.line([(x, y0), (x, y1)], fill=(232, 232, 232))
        d.line([(x, y1), (x, y1 + 5)], fill="black")
        d.text((x, y1 + 8), f"{i * 20}%", fill="black", font=small, anchor="mt")
    for i in range(6):                                   # y ticks: error 0..ymax %
        y = y1 - (y1 - y0) * i / 5
        d.line([(x0, y), (x1, y)], fill=(232, 232, 232))
        d.line([(x0 - 5, y), (x0, y)], fill="black")
        v = ymax * i / 5
        d.text((x0 - 8, y), f"{v:.3g}%", fill="black", font=small, anchor="rm")
    d.rectangle([x0, y0, x1, y1], outline="black")
    d.text(((x0 + x1) / 2, H - 14), "fields sent to review", fill="black", font=font, anchor="mm")
    label = Image.new("RGBA", (240, 20), (255, 255, 255, 0))
    ImageDraw.Draw(label).text((120, 10), "error among accepted fields", fill="black", font=font, anchor="mm")
    label = label.rotate(90, expand=True)
    img.paste(label, (6, int((y0 + y1) / 2 - label.height / 2)), label)

    if target is not None:
        ty = px(0, target)[1]
        for xs in range(int(x0), int(x1), 12):
            d.line([(xs, ty), (min(xs + 6, x1), ty)], fill=(200, 60, 60), width=1)
        d.text((x1 - 4, ty - 3), f"target {target * 100:.3g}%", fill=(200, 60, 60), font=small, anchor="rb")
    if len(c):
        order = np.argsort(c[:, 1], kind="stable")
        pts = [px(c[i, 1], c[i, 2]) for i in order]
        ub = [px(c[i, 1], c[i, 3]) for i in order]
        if len(pts) > 1:
            d.line(ub, fill=(150, 170, 220), width=1)
            d.line(pts, fill=(30, 70, 160), width=2)
        for p in pts:
            d.ellipse([p[0] - 2, p[1] - 2, p[0] + 2, p[1] + 2], fill=(30, 70, 160))
        d.line([(x0 + 8, y0 + 12), (x0 + 28, y0 + 12)], fill=(30, 70, 160), width=2)
        d.text((x0 + 34, y0 + 12), "error", fill="black", font=small, anchor="lm")
        d.line([(x0 + 8, y0 + 28), (x0 + 28, y0 + 28)], fill=(150, 170, 220), width=1)
        d.text((x0 + 34, y0 + 28), f"{confidence_level:.0%} upper bound", fill="black", font=small, anchor="lm")
        if threshold is not None:
            above = np.flatnonzero(c[:, 0] >= threshold)
            i = int(above[np.argmin(c[above, 0])]) if above.size else len(c) - 1
            x, y = px(c[i, 1], c[i, 2])
            d.line([(x, y0), (x, y1)], fill=(220, 120, 0), width=1)
            d.ellipse([x - 5, y - 5, x + 5, y + 5], outline=(220, 120, 0), width=2)
            text = (f"threshold {threshold:.3f}: review {c[i, 1] * 100:.1f}%, "
                    f"error {c[i, 2] * 100:.2f}%")
            anchor = "lb" if x < (x0 + x1) / 2 else "rb"
            d.text((x + (6 if anchor == "lb" else -6), y0 + 48), text, fill=(160, 80, 0), font=small,
                   anchor=anchor)
    out = Path(path)
    try:
        img.save(out, format="PNG")
    except OSError as e:
        raise DataError(f"{out}: cannot write the curve image: {e}") from None
    return out
