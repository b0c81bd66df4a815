"""One page's work, wherever it runs: which form, imaging, recognition, decoding, spot checks.

The batch (formread.read.batch) hands decoded pages to worker processes, and a Dask cluster
(formread.read.cluster) hands whole files to its workers; both call :func:`read_page` with the
run's :class:`RunContext` (the layouts, each form's thresholds and spot-check share, the model
bundle), built once per process.  What comes back is a :class:`PageWork`: the page's ledger row
(formread.ledger.store.PageRow, image and digit files included) and its timings.  Only the process
that owns the ledger writes it.

With one layout a page is registered to it, and a page that cannot be registered keeps one row per
field (``page_not_registered``), so a clerk can type its values from the page view.  With several,
the page is identified first (formread.imaging.identify): read against the one layout it fits, or
recorded as ``unregistered`` with no field rows and the reason ("no known form" with the closest
candidate's residual, or "ambiguous") - a page is never read against a layout it does not fit.
"""

from __future__ import annotations

import io
import struct
import tempfile
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image

from ..errors import FormreadError, ModelFileError, RegistrationError, one_line
from ..form.layout import Layout
from ..imaging.identify import identify_form
from ..imaging.pipeline import process_page
from ..ledger.fieldfile import FieldFile
from ..ledger.store import FieldRow, PageRow
from .audit import apply_audit
from .bundle import Bundle, load_bundle
from .decode import decode_page, unregistered_page
from .recognise import recognise_page

__all__ = ["RunContext", "PageWork", "read_page", "failed_page", "PAGE_DPI"]

PAGE_DPI = 100.0
"""Resolution of the stored page images (review view)."""
PAGE_JPEG_QUALITY = 85
"""JPEG quality of the stored page images."""


_BUNDLES: dict = {}
"""Model bundles loaded in this process, by checksum (a worker loads its run's bundle once)."""


@dataclass
class RunContext:
    """What every page of a run is read with (sent once to each worker).

    layouts : tuple of Layout (one, or the candidate forms of a mixed batch)
    thresholds : dict form name -> dict field name -> FieldThreshold (formread.form.thresholds)
    audit : dict form name -> spot-check share
    audit_seed : int
    bundle_path : str, bundle_sha256 : str
        The model bundle: a worker loads it from the path (once) and checks its checksum.
    bundle_bytes : bytes or None
        The bundle file itself, for workers that do not share its folder (a cluster).
    """

    layouts: tuple
    thresholds: dict
    audit: dict
    audit_seed: int
    bundle_path: str
    bundle_sha256: str
    bundle_bytes: bytes | None = None

    @classmethod
    def for_bundle(cls, bundle: Bundle, **kw) -> RunContext:
        _BUNDLES[bundle.sha256] = bundle          # this process has it loaded already
        return cls(bundle_path=str(bundle.path), bundle_sha256=bundle.sha256, **kw)

    @property
    def bundle(self) -> Bundle:
        """The run's bundle, loaded once per process (from its bytes when they were sent)."""
        b = _BUNDLES.get(self.bundle_sha256)
        if b is None:
            if self.bundle_bytes is not None:
                with tempfile.TemporaryDirectory() as tmp:
                    path = Path(tmp) / Path(self.bundle_path).name
                    path.write_bytes(self.bundle_bytes)
                    b = load_bundle(path)
            else:
                b = load_bundle(self.bundle_path)
            if b.sha256 != self.bundle_sha256:
                raise ModelFileError(f"{self.bundle_path}: changed while the batch was read (checksum differs)")
            _BUNDLES[self.bundle_sha256] = b
        return b


@dataclass
class PageWork:
    """A page ready to be written: its row and how long each step took (seconds)."""

    row: PageRow
    stages: dict = field(default_factory=dict)
    seconds: float = 0.0
    recognition_seconds: float = 0.0
    audited: int = 0


def failed_page(source: str, page_number: int, content_hash: str, error: str, seconds: float = 0.0) -> PageWork:
    """The work of a page (or the rest of a file) that could not be decoded."""
    return PageWork(PageRow(content_hash=content_hash, source=source, page_number=page_number, status="failed",
                            error=error), seconds=seconds)


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def _png(gray: np.ndarray, level: int = 1) -> bytes:
    """A field crop (h, w) uint8 as 8-bit greyscale PNG bytes (the PNG specification, filter type 1
    "Sub" on every row, deflate ``level``).

    Written here rather than by Pillow, whose adaptive filter choice took twice as long per crop
    (0.7-1.1 ms against 0.3-0.6) for files within a few percent of the same size."""
    g = np.ascontiguousarray(gray, dtype=np.uint8)
    h, w = g.shape
    raw = np.empty((h, w + 1), np.uint8)
    raw[:, 0] = 1                               # filter type: Sub, the difference to the pixel on the left
    raw[:, 1:2] = g[:, :1]
    np.subtract(g[:, 1:], g[:, :-1], out=raw[:, 2:])      # uint8 arithmetic wraps modulo 256, as the filter says
    return (b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0))
            + _png_chunk(b"IDAT", zlib.compress(raw.tobytes(), level)) + _png_chunk(b"IEND", b""))


def _page_jpeg(gray: np.ndarray, dpi: float) -> tuple[bytes, float]:
    """The page downscaled to about ``PAGE_DPI`` as JPEG bytes, and the scale used (stored px per page px).

    JPEG, not PNG: the page view is context for the clerk (the field crops, which the clerk reads,
    stay lossless PNG); a noisy scan took 20 ms and 360 kB as PNG, 1 ms and 65 kB as JPEG."""
    img = Image.fromarray(np.ascontiguousarray(gray, dtype=np.uint8))
    factor = int(float(dpi) // PAGE_DPI) if dpi else 1
    if factor >= 2:
        img = img.reduce(factor)                    # box average over factor x factor pixels: fast and clean
    buf = io.BytesIO()
    img.save(buf, format="JPEG", quality=PAGE_JPEG_QUALITY)
    return buf.getvalue(), 1.0 / max(1, factor)


def _box_px(reg, spec, scale: float) -> list[float]:
    """Bounding box [x0, y0, x1, y1] on the stored page image of a field's rectangle (mm)."""
    px = reg.to_pixels(spec.region.corners()) * scale
    return [float(px[:, 0].min()), float(px[:, 1].min()), float(px[:, 0].max()), float(px[:, 1].max())]


def _digits_file(fd, crop, reading) -> bytes | None:
    """The field's digit file (formread.ledger.fieldfile): the reading's digits, every candidate, the crop."""
    if not fd.candidates:
        return None
    i = reading.candidate
    chosen = i if i is not None and 0 <= i < len(fd.candidates) else -1
    d = (np.asarray(fd.candidates[chosen].digits, dtype=np.float32).reshape(-1, 1, 28, 28) if chosen >= 0
         else np.zeros((0, 1, 28, 28), np.float32))
    keep = np.asarray([p for p in reading.positions if 0 <= p < len(d)], dtype=np.int64)
    parts = [np.asarray(c.digits, np.float32).reshape(-1, 28, 28) for c in fd.candidates]
    sizes = np.array([len(p) for p in parts], np.int64)
    spans = np.column_stack([np.cumsum(sizes) - sizes, np.cumsum(sizes)])
    every = np.concatenate(parts) if sizes.sum() else np.zeros((0, 28, 28), np.float32)
    ff = FieldFile(digits=d[keep], positions=keep, chosen=chosen,
                   cand_digits=np.clip(np.rint(every * 255.0), 0, 255).astype(np.uint8), cand_spans=spans,
                   cand_costs=np.array([float(c.cost) for c in fd.candidates]),
                   blank=fd.blank if fd.blank is not None else np.zeros(0, bool),
                   doubtful=bool(fd.doubtful), reason=fd.reason or "")
    if crop is not None and fd.kind == "open":   # only open fields are ever cut again (to a decided length)
        ff.crop_gray, ff.crop_ink, ff.crop_rect = crop.gray, crop.ink, np.asarray(crop.rect, np.float64)
        ff.crop_geometry = np.array([crop.x0_mm, crop.y0_mm, crop.px_per_mm], np.float64)
        ff.crop_matrix = np.asarray(crop.matrix, np.float64)
    return ff.to_bytes()


def _jsonable(v):
    if isinstance(v, np.ndarray):
        return _jsonable(v.tolist())
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating, float)):
        return round(float(v), 6)
    return v


def _field_row(layout: Layout, r, threshold, *, image_png=None, digits=None, box_px=None,
               audit: bool = False) -> FieldRow:
    spec = layout.field(r.name)
    return FieldRow(
        name=spec.name, kind=spec.kind, reading=r.reading,
        confidence=None if r.confidence is None else float(r.confidence),
        decision=r.decision, reason=r.reason,
        alternatives=[[str(s), round(float(p), 6)] for s, p in (r.alternatives or [])],
        digit_probs=_jsonable(r.digit_probs or []),
        rules={str(k): bool(v) for k, v in (r.rules or {}).items()},
        box_px=box_px, image_png=image_png, digits_npz=digits,
        threshold=float(r.threshold), threshold_source=threshold.source, max_digits=layout.capacity(spec.name),
        audit=audit)


def _opt(v):
    if v is None:
        return None
    return bool(v) if isinstance(v, (bool, np.bool_)) else float(v)


def read_page(page, content_hash: str, ctx: RunContext) -> PageWork:
    """Identify, image, recognise and decode one decoded page (formread.imaging.load.Page)."""
    t0 = time.perf_counter()
    stages: dict = {}
    row = PageRow(content_hash=content_hash, source=page.source, page_number=page.page_number, status="read")
    registration = None
    if len(ctx.layouts) == 1:
        layout = ctx.layouts[0]
    else:
        ident = identify_form(page, ctx.layouts)
        stages["identify"] = time.perf_counter() - t0
        if not ident.identified:
            row.status, row.error = "unregistered", f"{page.source} page {page.page_number}: {ident.reason}"
            row.image_jpeg = _page_jpeg(page.gray, page.dpi)[0]
            return PageWork(row, stages, time.perf_counter() - t0)
        assert ident.index is not None  # identified: index and registration are set
        layout, registration = ctx.layouts[ident.index], ident.registration
    row.form = layout.name
    thresholds = ctx.thresholds[layout.name]
    try:
        pd = process_page(page, layout, timings=stages, registration=registration)
    except RegistrationError as e:
        row.status, row.error = "unregistered", one_line(e)
        row.image_jpeg = _page_jpeg(page.gray, page.dpi)[0]
        readings = unregistered_page(layout, thresholds=thresholds)
        row.fields = [_field_row(layout, r, thresholds[n]) for n, r in readings.items()]
        return PageWork(row, stages, time.perf_counter() - t0)
    except FormreadError as e:
        row.status, row.error = "failed", one_line(e)
        row.image_jpeg = _page_jpeg(page.gray, page.dpi)[0]
        return PageWork(row, stages, time.perf_counter() - t0)
    reg = pd.registration
    row.image_jpeg, scale = _page_jpeg(reg.image if reg.image is not None else page.gray, page.dpi)
    row.residual_mm, row.rotated_180, row.skew_deg = _opt(reg.residual_mm), _opt(reg.rotated_180), _opt(reg.skew_deg)
    row.turn_deg = int(reg.turn_deg)
    imaged = time.perf_counter()
    evidence = recognise_page(pd.fields, ctx.bundle)
    readings = decode_page(evidence, layout, confidence=ctx.bundle.decoder, thresholds=thresholds)
    audited = apply_audit(readings, ctx.audit[layout.name], content_hash, ctx.audit_seed)
    recognised = time.perf_counter()
    for name, r in readings.items():
        fd = pd.fields.get(name)
        row.fields.append(_field_row(
            layout, r, thresholds[name], image_png=None if fd is None or fd.image is None else _png(fd.image),
            digits=None if fd is None else _digits_file(fd, pd.crops.get(name), r),
            box_px=_box_px(reg, layout.field(name), scale), audit=name in audited))
    return PageWork(row, stages, time.perf_counter() - t0, recognised - imaged, len(audited))
