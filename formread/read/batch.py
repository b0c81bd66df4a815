"""The batch job: scans in, one ledger row per page, every field read, checked and decided.

How it runs: the main process decodes the scan files page by page (a stream,
so a long multi-page file is spread over the workers too) and hashes each page;
a page not yet in the ledger goes to the imaging step (register, cut, segment,
page and crop images) in a worker process when ``workers > 1`` (each pinned to
one BLAS thread).  The main process takes the pages back in input order, runs
the network on all the digits of a page in one call, decodes each field with
its rules, and writes the page (row, fields, image files) to the ledger in ONE
transaction.  A page already in the ledger (same hash of the
decoded pixels) is skipped, so re-running the same command resumes a stopped
batch; a page that cannot be read is recorded with its reason and the batch
goes on.  ``readings.csv`` and ``fields.jsonl`` are rebuilt from the ledger at
the end (also after Ctrl-C).
"""

from __future__ import annotations

import hashlib
import io
import multiprocessing
import os
import stat
import time
from collections import deque
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image

from ..errors import FormreadError, ImageError, LedgerError, RegistrationError, check_param, one_line
from ..form.layout import Layout, load_layout, read_layout_text
from ..form.thresholds import audit_rate, form_threshold, resolve_thresholds
from ..imaging.load import iter_pages
from ..imaging.pipeline import process_page
from ..ledger.fieldfile import FieldFile
from ..ledger.store import FieldRow, Ledger, PageRow, open_ledger, page_hash
from ..store import in_use_path
from .audit import apply_audit
from .bundle import Bundle, load_bundle
from .decode import decode_page, unregistered_page
from .outputs import write_outputs
from .recognise import recognise_page
from .runs import run_layouts

__all__ = ["SCAN_SUFFIXES", "PAGE_DPI", "BatchReport", "list_scans", "read_batch"]

SCAN_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".pdf")
"""File suffixes taken as scans when a folder is given (case-insensitive)."""
PAGE_DPI = 100.0
"""Resolution of the stored page images (review view)."""


@dataclass
class BatchReport:
    """What a run did. Times are wall-clock seconds; ``imaging_seconds`` sums the workers' time."""

    run_id: int
    outdir: Path
    pages: int = 0                 # pages met in the inputs (files that failed count as one page)
    read: int = 0                  # newly read (status 'read')
    skipped: int = 0               # already in the ledger (or a duplicate of a page of this run)
    unregistered: int = 0          # newly recorded as 'unregistered'
    failed: int = 0                # newly recorded as 'failed'
    fields: int = 0
    accepted: int = 0
    review: int = 0                # sent to review, spot checks included
    audited: int = 0               # of which spot checks (formread.read.audit)
    problems: list = field(default_factory=list)   # [(source, page_number, status, error)] incl. skipped ones
    seconds: float = 0.0
    imaging_seconds: float = 0.0
    recognition_seconds: float = 0.0
    writing_seconds: float = 0.0
    stages: dict = field(default_factory=dict)     # imaging stage -> seconds, as reported by process_page

    @property
    def pages_per_second(self) -> float:
        return self.pages / self.seconds if self.seconds > 0 else 0.0

    @property
    def all_read(self) -> bool:
        """True when no page of the inputs is failed or unregistered (in this run or before)."""
        return not self.problems


# ------------------------------------------------------------------------------------------ inputs
def list_scans(inputs: Iterable) -> list[tuple[str, str | None]]:
    """Expand the inputs into scan files, in order.

    Parameters
    ----------
    inputs : paths of files or folders (a folder gives its files with a scan suffix, sorted by name)

    Returns
    -------
    list of ``(source, refusal)``: ``refusal`` is None for a file to read, or the reason
    a file found in a folder is not read (e.g. "not a scan").

    Raises
    ------
    ImageError
        An input path does not exist.
    """
    out: list[tuple[str, str | None]] = []
    seen: set = set()
    for p in inputs:
        path = Path(p)
        if path.is_dir():
            try:
                children = sorted(path.iterdir(), key=lambda c: c.name)
            except OSError as e:
                raise ImageError(f"{display_name(path)}: folder cannot be listed ({e.strerror or e})") from None
            found = 0
            for child in children:
                if child.name.startswith(".") or child.is_dir():
                    continue
                found += 1
                if child.suffix.lower() not in SCAN_SUFFIXES:
                    out.append((str(child), f"not a scan (suffix {child.suffix or 'none'!r}; "
                                            f"expected one of {', '.join(SCAN_SUFFIXES)})"))
                else:
                    out.append((str(child), _not_regular(child)))
            if not found:
                raise ImageError(f"{display_name(path)}: no scans in this folder")
        elif path.exists() or path.is_symlink():
            out.append((str(path), _not_regular(path)))
        else:
            raise ImageError(f"{display_name(path)}: no such file or folder")
    # the same file named twice (or by two paths) is read once
    unique = []
    for source, refusal in out:
        try:
            key = Path(source).resolve()
        except (OSError, RuntimeError):
            key = source
        if key in seen:
            continue
        seen.add(key)
        unique.append((source, refusal))
    return unique


def display_name(path) -> str:
    """A file name as the ledger and messages hold it: undecodable bytes (a name from another system's
    encoding) are shown as backslash escapes instead of stopping every batch."""
    return os.fsencode(str(path)).decode("utf-8", "backslashreplace")


def _not_regular(path: Path) -> str | None:
    """Why ``path`` cannot be read as a scan (a named pipe would block the batch; a link loop, a
    device), or None for a regular file."""
    try:
        st = path.stat()
    except OSError as e:
        return f"cannot be opened ({e.strerror or e})"
    if not stat.S_ISREG(st.st_mode):
        return "not a regular file (a pipe, a device or a socket is never read)"
    return None


def _file_failure_hash(source: str) -> str:
    """Key of a whole-file failure: one row per source file, replaced when the file is tried again."""
    return "failed:" + hashlib.sha256(source.encode("utf-8", "surrogateescape")).hexdigest()


# ------------------------------------------------------------------------------------------ imaging step
@dataclass
class _Imaged:
    """One page after the imaging step, small enough to send between processes."""

    source: str
    page_number: int
    content_hash: str
    status: str                         # 'ok' | 'known' | 'unregistered' | 'failed'
    error: str | None = None
    fields: dict | None = None          # name -> FieldDigits
    crops: dict = field(default_factory=dict)   # name -> FieldCrop
    page_png: bytes | None = None
    field_png: dict = field(default_factory=dict)
    box_px: dict = field(default_factory=dict)
    residual_mm: float | None = None
    rotated_180: bool | None = None
    skew_deg: float | None = None
    seconds: float = 0.0
    stages: dict = field(default_factory=dict)


_STATE: dict = {}


def _init_imaging(layout: Layout, pin_threads: bool, parent: int | None = None) -> None:
    """Worker start: keep the run's layout; one BLAS thread; Ctrl-C left to the main process."""
    import signal

    if pin_threads:
        signal.signal(signal.SIGINT, signal.SIG_IGN)   # Ctrl-C is the main process's business
        if parent is not None:
            _watch_parent(parent)
        from threadpoolctl import threadpool_limits

        _STATE["limits"] = threadpool_limits(limits=1)
    _STATE["layout"] = layout


def _watch_parent(parent: int) -> None:
    """End this worker when the reader that started it (pid ``parent``) is gone, instead of lingering.

    The pid is the reader's own, passed in: a reader killed while its workers still start up has
    already gone when they get here, so asking for the parent now would name init's pid instead."""
    import threading

    if os.getppid() != parent:
        os._exit(0)

    def watch():
        while True:
            time.sleep(0.5)
            if os.getppid() != parent:
                os._exit(0)

    threading.Thread(target=watch, name="formread-parent-watch", daemon=True).start()


def _png(gray: np.ndarray, level: int = 1) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(gray, dtype=np.uint8)).save(buf, format="PNG", compress_level=level)
    return buf.getvalue()


def _page_png(gray: np.ndarray, dpi: float) -> tuple[bytes, float]:
    """The page downscaled to about ``PAGE_DPI`` as PNG bytes, and the scale used (stored px per page px)."""
    img = Image.fromarray(np.ascontiguousarray(gray, dtype=np.uint8))
    factor = int(float(dpi) // PAGE_DPI) if dpi else 1
    if factor >= 2:
        img = img.reduce(factor)                    # box average over factor x factor pixels: fast and clean
    buf = io.BytesIO()
    img.save(buf, format="PNG", compress_level=1)
    return buf.getvalue(), 1.0 / max(1, factor)


def _box_px(reg, spec, scale: float) -> list[float]:
    """Bounding box [x0, y0, x1, y1] on the stored page image of a field's rectangle (mm)."""
    px = reg.to_pixels(spec.region.corners()) * scale
    return [float(px[:, 0].min()), float(px[:, 1].min()), float(px[:, 0].max()), float(px[:, 1].max())]


def _image_page(page, content_hash: str) -> _Imaged:
    """Imaging step for one decoded page: register, cut, segment; page and crop PNGs (worker or inline)."""
    layout = _STATE["layout"]
    t0 = time.perf_counter()
    base = dict(source=page.source, page_number=page.page_number, content_hash=content_hash)
    stages: dict = {}
    try:
        pd = process_page(page, layout, timings=stages)
    except RegistrationError as e:
        png, _ = _page_png(page.gray, page.dpi)
        return _Imaged(status="unregistered", error=one_line(e), page_png=png,
                       seconds=time.perf_counter() - t0, stages=stages, **base)
    except FormreadError as e:
        png, _ = _page_png(page.gray, page.dpi)
        return _Imaged(status="failed", error=one_line(e), page_png=png,
                       seconds=time.perf_counter() - t0, stages=stages, **base)
    reg = pd.registration
    image = getattr(reg, "image", None)
    png, scale = _page_png(image if image is not None else page.gray, page.dpi)
    specs = {f.name: f for f in layout.fields}
    box = {name: _box_px(reg, specs[name], scale) for name in pd.fields if name in specs}
    field_png = {name: _png(fd.image) for name, fd in pd.fields.items() if fd.image is not None}
    return _Imaged(status="ok", fields=dict(pd.fields), crops=dict(pd.crops), page_png=png, field_png=field_png, box_px=box,
                   residual_mm=_opt(reg, "residual_mm"), rotated_180=_opt(reg, "rotated_180"),
                   skew_deg=_opt(reg, "skew_deg"), seconds=time.perf_counter() - t0, stages=stages, **base)


def _decoded_pages(scans):
    """Stream the inputs page by page: ``(page, content_hash, load_seconds)``, or an ``_Imaged``
    failure record for a file that is not a scan or cannot be (fully) decoded."""
    for source, refusal in scans:
        if refusal is not None:
            yield _Imaged(source=source, page_number=1, content_hash=_file_failure_hash(source), status="failed",
                          error=f"{display_name(source)}: {refusal}")
            continue
        n = 0
        t0 = time.perf_counter()
        try:
            for page in iter_pages(source):
                n += 1
                h = page_hash(page.gray)
                yield page, h, time.perf_counter() - t0
                t0 = time.perf_counter()
        except ImageError as e:
            # pages decoded before the failure are kept; the rest of the file is one failed record
            yield _Imaged(source=source, page_number=n + 1, content_hash=_file_failure_hash(source),
                          status="failed", error=one_line(e), seconds=time.perf_counter() - t0)


def _opt(obj, name):
    v = getattr(obj, name, None)
    if v is None:
        return None
    return bool(v) if isinstance(v, (bool, np.bool_)) else float(v)


# ------------------------------------------------------------------------------------------ reading step
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


def _field_row(layout: Layout, spec, r, threshold, *, image_png=None, digits=None, box_px=None,
               audit: bool = False) -> FieldRow:
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


class _Reader:
    """The main process's half: network, decoding, ledger rows."""

    def __init__(self, layout: Layout, bundle: Bundle, thresholds: dict, audit: float, audit_seed: int):
        self.layout, self.bundle, self.thresholds = layout, bundle, thresholds
        self.audit, self.audit_seed = audit, audit_seed
        self.specs = {f.name: f for f in layout.fields}

    def page_row(self, im: _Imaged, report: BatchReport) -> PageRow:
        row = PageRow(content_hash=im.content_hash, source=display_name(im.source), page_number=im.page_number,
                      status="read", error=im.error, residual_mm=im.residual_mm, rotated_180=im.rotated_180,
                      skew_deg=im.skew_deg, image_png=im.page_png)
        if im.status == "failed":
            row.status = "failed"
            return row
        if im.status == "unregistered":
            row.status = "unregistered"
            readings = unregistered_page(self.layout, thresholds=self.thresholds)
            row.fields = [_field_row(self.layout, self.specs[n], r, self.thresholds[n]) for n, r in readings.items()]
            return row
        t0 = time.perf_counter()
        evidence = recognise_page(im.fields, self.bundle)
        readings = decode_page(evidence, self.layout, confidence=self.bundle.decoder, thresholds=self.thresholds)
        audited = apply_audit(readings, self.audit, im.content_hash, self.audit_seed)
        report.recognition_seconds += time.perf_counter() - t0
        for name, r in readings.items():
            fd = im.fields.get(name)
            row.fields.append(_field_row(
                self.layout, self.specs[name], r, self.thresholds[name], image_png=im.field_png.get(name),
                digits=None if fd is None else _digits_file(fd, im.crops.get(name), r),
                box_px=im.box_px.get(name), audit=name in audited))
        report.audited += len(audited)
        return row


# ------------------------------------------------------------------------------------------ the job
def read_batch(inputs: Iterable, layout, outdir, *, bundle=None, threshold: float | None = None,
               audit: float | None = None, audit_seed: int = 0, workers: int = 2,
               progress: Callable | None = None, command: str = "formread read") -> BatchReport:
    """Read scanned forms into the ledger of ``outdir``.

    Parameters
    ----------
    inputs : paths of scan files or folders of scans
    layout : the form's layout TOML (path), or a Layout already loaded from one
    outdir : output folder (made when missing): ``ledger.sqlite``, ``pages/``, ``fields/``, ``digits/``,
        ``readings.csv``, ``fields.jsonl``
    bundle : model bundle (Bundle or the path of a model file); the one in use by default
    threshold : acceptance threshold for every field (wins over the layout's; see formread.form.thresholds)
    audit : share of the fields that would have been accepted sent to review as spot checks; else the
        layout's ``audit``, else ``DEFAULT_AUDIT`` (formread.read.audit)
    audit_seed : seed of the spot-check draw
    workers : processes for the imaging step (1 = all in this process)
    progress : ``progress(done, total, **figures)`` called after every page
    command : the command line, recorded in ``runs``

    Returns
    -------
    BatchReport

    Raises
    ------
    LedgerError, LayoutError, RuleError, ModelFileError, ImageError, ParameterError
        Before any page is read: unusable output folder, layout, rules or model, or a missing input.
    """
    check_param(isinstance(workers, int) and not isinstance(workers, bool) and 1 <= workers <= 64,
                "workers", "an integer in 1..64", workers)
    t_start = time.perf_counter()
    if isinstance(layout, Layout):
        layout_path = Path(layout.source)
        layout_text = read_layout_text(layout_path) if layout_path.is_file() else layout.to_toml()
    else:
        layout_path = Path(layout)
        layout_text = read_layout_text(layout_path)
        layout = load_layout(layout_path)
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle if bundle is not None else in_use_path())
    fitted = bundle.fitted_threshold(layout.name)
    thresholds = resolve_thresholds(layout, explicit=threshold, fitted=fitted)
    run_threshold = form_threshold(layout, explicit=threshold, fitted=fitted).value
    rate = audit_rate(layout, audit)
    scans = list_scans(inputs)
    ledger = open_ledger(outdir)
    try:
        _check_same_form(ledger, layout)
        # absolute paths: the review page finds the layout from wherever it is started
        run_id = ledger.start_run(layout_path=str(layout_path.resolve()),
                                  layout_sha256=hashlib.sha256(layout_text.encode("utf-8")).hexdigest(),
                                  model_path=str(bundle.path.resolve()), model_sha256=bundle.sha256,
                                  threshold=run_threshold, command=command, layout_text=layout_text,
                                  bundle=bundle.summary(), audit_rate=rate)
        report = BatchReport(run_id=run_id, outdir=Path(outdir))
        reader = _Reader(layout, bundle, thresholds, rate, audit_seed)
        try:
            _run(scans, layout, ledger, reader, report, workers, progress, t_start)
            ledger.finish_run(run_id)
        finally:
            write_outputs(ledger)
            report.seconds = time.perf_counter() - t_start
    finally:
        ledger.close()
    return report


def _check_same_form(ledger: Ledger, layout: Layout) -> None:
    """Refuse to add pages read with another version of a form to a ledger (its tables would mix
    two sets of fields); a layout moved, re-commented or with other thresholds is the same form."""
    for run_id, earlier in run_layouts(ledger).items():
        if earlier is not None and earlier.name == layout.name and earlier.structure() != layout.structure():
            raise LedgerError(f"{ledger.outdir}: read with another version of the layout {layout.name!r} (run "
                              f"{run_id}); read into a new output folder, or use the layout of that run")


class _Done:
    """A result already at hand, queued in page order with the pool's futures."""

    def __init__(self, value):
        self.value = value

    def result(self):
        return self.value


def _run(scans, layout: Layout, ledger: Ledger, reader: _Reader, report: BatchReport, workers: int,
         progress, t_start: float) -> None:
    known = ledger.known_pages()
    pin = workers > 1
    pool = None
    if pin:
        ctx = multiprocessing.get_context("spawn")
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_imaging,
                                   initargs=(layout, True, os.getpid()))
    else:
        _init_imaging(layout, False)
    from threadpoolctl import threadpool_limits

    # with workers busy on the other cores, the main process's BLAS keeps to one thread
    limits = threadpool_limits(limits=1) if pin else None
    counts = {"files": len(scans), "pages": 0, "sources": set()}
    queued: set = set()

    def submit(item):
        if isinstance(item, _Imaged):
            return _Done(item)
        page, h, load_s = item
        counts["pages"] += 1
        counts["sources"].add(page.source)
        report.imaging_seconds += load_s
        report.stages["load"] = report.stages.get("load", 0.0) + load_s
        prior = known.get(h)
        if (prior is not None and prior != "failed") or h in queued:
            return _Done(_Imaged(source=page.source, page_number=page.page_number, content_hash=h, status="known"))
        queued.add(h)
        if pool is None:
            return _Done(_image_page(page, h))
        return pool.submit(_image_page, page, h)

    try:
        for im in _ordered(_decoded_pages(scans), submit, window=3 * workers if pool else 1):
            _one_page(im, known, ledger, reader, report)
            if progress is not None:
                # total: pages met so far plus one per file not opened yet
                total = counts["pages"] + max(0, counts["files"] - len(counts["sources"]))
                progress(report.pages, max(total, report.pages), review=report.review, failed=len(report.problems))
    finally:
        if limits is not None:
            limits.restore_original_limits()
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


def _ordered(items, submit, window: int):
    """Submit items at most ``window`` ahead; yield their results in input order."""
    it = iter(items)
    pending: deque = deque()
    for item in it:
        pending.append(submit(item))
        if len(pending) >= window:
            break
    while pending:
        res = pending.popleft().result()
        nxt = next(it, None)
        if nxt is not None:
            pending.append(submit(nxt))
        yield res


def _one_page(im: _Imaged, known: dict, ledger: Ledger, reader: _Reader, report: BatchReport) -> None:
    report.pages += 1
    report.imaging_seconds += im.seconds
    for k, v in im.stages.items():
        report.stages[k] = report.stages.get(k, 0.0) + float(v)
    prior = known.get(im.content_hash)
    if im.status == "known" or (prior is not None and prior != "failed"):
        report.skipped += 1
        if prior == "unregistered":
            report.problems.append((im.source, im.page_number, prior, ledger.page_error(im.content_hash)))
        return
    row = reader.page_row(im, report)
    t0 = time.perf_counter()
    ledger.write_page(report.run_id, row)
    report.writing_seconds += time.perf_counter() - t0
    known[im.content_hash] = row.status
    if row.status == "read":
        report.read += 1
    elif row.status == "unregistered":
        report.unregistered += 1
    else:
        report.failed += 1
    if row.status != "read":
        report.problems.append((im.source, im.page_number, row.status, row.error))
    report.fields += len(row.fields)
    report.accepted += sum(f.decision == "accepted" for f in row.fields)
    report.review += sum(f.decision != "accepted" for f in row.fields)
