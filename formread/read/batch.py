"""The batch job: scans in, one ledger row per page, every field read, checked and decided.

How it runs: the main process decodes the scan files page by page (a stream,
so a long multi-page file is spread over the workers too) and hashes each page;
a page not yet in the ledger goes to the page work (formread.read.pagework:
which form, register, cut, segment, recognise, decode, spot checks) in a worker
process when ``workers > 1`` (each pinned to one BLAS thread, with the run's
layouts and model bundle sent once; the page's pixels through an in-memory file
where the system has them, see ``_pixels_file``).  The main process takes the pages back in
input order and writes each (row, fields, image files) to the ledger in ONE
transaction.  With ``scheduler`` the page work runs on a Dask cluster instead
(formread.read.cluster), and the ledger is still written here, by this process
alone.  A page already in the ledger (same hash of the decoded pixels) is
skipped, so re-running the same command resumes a stopped batch; a page that
cannot be read is recorded with its reason and the batch goes on.
``readings.csv`` and ``fields.jsonl`` are rebuilt from the ledger at the end
(also after Ctrl-C).
"""

from __future__ import annotations

import dataclasses
import hashlib
import multiprocessing
import os
import signal
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from ..errors import LayoutError, LedgerError, check_param
from ..form.layout import Layout, parse_layout, read_layout_text
from ..form.thresholds import audit_rate, form_threshold, resolve_thresholds
from ..ledger.store import Ledger, open_ledger
from ..store import in_use_path
from .bundle import Bundle, load_bundle
from .outputs import write_outputs
from .pagework import PageWork, RunContext, read_page
from .runs import run_layouts
from .scans import SCAN_SUFFIXES, decoded_pages, display_name, known_page, list_scans

__all__ = ["SCAN_SUFFIXES", "BatchReport", "list_scans", "read_batch", "decoded_pages", "display_name"]

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


_STATE: dict = {}


def _init_worker(ctx: RunContext, pin_threads: bool, parent: int | None = None) -> None:
    """Worker start: keep the run's context; one BLAS thread; Ctrl-C left to the main process."""
    if pin_threads:
        signal.signal(signal.SIGINT, signal.SIG_IGN)   # Ctrl-C is the main process's business
        if parent is not None:
            _watch_parent(parent)
        _STATE["limits"] = threadpool_limits(limits=1)
    _STATE["ctx"] = ctx


def _watch_parent(parent: int) -> None:
    """End this worker when the reader that started it (pid ``parent``) is gone, instead of lingering.

    The pid is the reader's own, passed in: a reader killed while its workers still start up has
    already gone when they get here, so asking for the parent now would name init's pid instead."""
    if os.getppid() != parent:
        os._exit(0)

    def watch():
        while True:
            time.sleep(0.5)
            if os.getppid() != parent:
                os._exit(0)

    threading.Thread(target=watch, name="formread-parent-watch", daemon=True).start()


def _work(page, content_hash: str) -> PageWork:
    """One page in a worker process (or inline), with the context it was started with."""
    return read_page(page, content_hash, _STATE["ctx"])


_NEED_PIXELS = "pixels not found"
"""What a worker answers when it cannot open the page's in-memory file: send the pixels instead."""


def _pixels_file(gray) -> int | None:
    """An anonymous in-memory file (Linux ``memfd``) holding a page's pixels, as a descriptor of this
    process, or None where there is none to be had.

    Why: handing a worker a decoded page through the pool's pipe cost about 6 ms of CPU for a
    200 dpi page (pickling 4 MB, then 64 KB pipe writes, each a switch between the processes);
    writing it to such a file and reading it there costs about 1 ms.  The file lives in memory
    only and vanishes with the last descriptor, so nothing is left behind, even when this process
    is killed."""
    if not hasattr(os, "memfd_create"):
        return None
    try:
        fd = os.memfd_create("formread-page", os.MFD_CLOEXEC)
    except OSError:
        return None
    try:
        view = np.ascontiguousarray(gray).data.cast("B")
        done = 0
        while done < len(view):
            done += os.write(fd, view[done:])
    except OSError:
        os.close(fd)
        return None
    return fd


def _work_from_file(page, pid: int, fd: int, shape: tuple, content_hash: str):
    """``_work`` for a page whose pixels wait in the reader's in-memory file ``fd`` (process ``pid``);
    ``_NEED_PIXELS`` when that file cannot be opened or holds too little."""
    try:
        with open(f"/proc/{pid}/fd/{fd}", "rb") as fh:    # a fresh open: its own offset, at 0
            gray = np.fromfile(fh, np.uint8, count=shape[0] * shape[1]).reshape(shape)
    except (OSError, ValueError):
        return _NEED_PIXELS
    return _work(dataclasses.replace(page, gray=gray), content_hash)


class _Handed:
    """A page handed to a worker through an in-memory file: ``result()`` closes the file, and sends
    the pixels the ordinary way should the worker not have found them."""

    def __init__(self, pool, page, content_hash: str, fd: int, live: set):
        self._pool, self._page, self._hash, self._live = pool, page, content_hash, live
        self._fd: int | None = fd
        live.add(self)
        self._future = pool.submit(_work_from_file, dataclasses.replace(page, gray=None), os.getpid(), fd,
                                   tuple(page.gray.shape), content_hash)

    def result(self):
        try:
            res = self._future.result()
        finally:
            self.close()
        if isinstance(res, str) and res == _NEED_PIXELS:
            res = self._pool.submit(_work, self._page, self._hash).result()
        self._page = None
        return res

    def close(self) -> None:
        """Close the in-memory file (it is gone once the worker's descriptor is closed too)."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._live.discard(self)


# ------------------------------------------------------------------------------------------ the job
def _load_layouts(layouts) -> list[tuple[Layout, str, Path]]:
    """(Layout, its text, its path) for each layout given (paths, Layouts, or a folder of *.toml)."""
    items = [layouts] if isinstance(layouts, (str, os.PathLike, Layout)) else list(layouts)
    out = []
    for item in items:
        if isinstance(item, Layout):
            path = Path(item.source)
            out.append((item, read_layout_text(path) if path.is_file() else item.to_toml(), path))
            continue
        path = Path(item)
        if path.is_dir():
            files = sorted(path.glob("*.toml"))
            if not files:
                raise LayoutError(f"{path}: no layout files (*.toml) in this folder")
            out += _load_layouts(files)
            continue
        text = read_layout_text(path)
        out.append((parse_layout(text, str(path)), text, path))
    if not out:
        raise LayoutError("no layout given")
    names = [lay.name for lay, _, _ in out]
    for name in names:
        if names.count(name) > 1:
            paths = ", ".join(str(p) for lay, _, p in out if lay.name == name)
            raise LayoutError(f"{paths}: several layouts name the form {name!r}; every form of a batch needs its "
                              "own [form] name")
    return out


def read_batch(inputs: Iterable, layout, outdir, *, bundle=None, threshold: float | None = None,
               audit: float | None = None, audit_seed: int = 0, workers: int = 2,
               progress: Callable | None = None, command: str = "formread read", scheduler: str | None = None,
               send_bytes: bool = False) -> BatchReport:
    """Read scanned forms into the ledger of ``outdir``.

    Parameters
    ----------
    inputs : paths of scan files or folders of scans
    layout : the form's layout TOML (path), a Layout, a folder of layouts, or a list of those: with several
        forms each page is identified first and read against the one layout it fits (formread.read.pagework)
    outdir : output folder (made when missing): ``ledger.sqlite``, ``pages/``, ``fields/``, ``digits/``,
        ``readings.csv`` (``readings-<form>.csv`` per form when there are several), ``fields.jsonl``
    bundle : model bundle (Bundle or the path of a model file); the one in use by default
    threshold : acceptance threshold for every field (wins over the layout's; see formread.form.thresholds)
    audit : share of the fields that would have been accepted sent to review as spot checks; else each
        layout's ``audit``, else ``DEFAULT_AUDIT`` (formread.read.audit)
    audit_seed : seed of the spot-check draw
    workers : processes for the page work (1 = all in this process)
    progress : ``progress(done, total, **figures)`` called after every page
    command : the command line, recorded in ``runs``
    scheduler : address of a Dask scheduler (``tcp://host:8786``) to run the page work on its cluster
        (formread.read.cluster; needs the ``distributed`` extra); the ledger stays written here
    send_bytes : with ``scheduler``, send each scan's bytes to the workers instead of its path (for workers
        that do not share the scans' folder)

    Returns
    -------
    BatchReport

    Raises
    ------
    LedgerError, LayoutError, RuleError, ModelFileError, ImageError, ParameterError
        Before any page is read: unusable output folder, layout, rules or model, an unreachable
        scheduler, or a missing input.
    """
    check_param(isinstance(workers, int) and not isinstance(workers, bool) and 1 <= workers <= 64,
                "workers", "an integer in 1..64", workers)
    t_start = time.perf_counter()
    forms = _load_layouts(layout)
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle if bundle is not None else in_use_path())
    ctx = RunContext.for_bundle(bundle, layouts=tuple(lay for lay, _, _ in forms), thresholds={}, audit={},
                                audit_seed=int(audit_seed))
    run_thresholds = {}
    for lay, _, _ in forms:
        fitted = bundle.fitted_threshold(lay.name)
        ctx.thresholds[lay.name] = resolve_thresholds(lay, explicit=threshold, fitted=fitted)
        ctx.audit[lay.name] = audit_rate(lay, audit)
        run_thresholds[lay.name] = form_threshold(lay, explicit=threshold, fitted=fitted).value
    scans = list_scans(inputs)
    cluster = None
    if scheduler is not None:
        from .cluster import connect  # here: cluster imports this module's helpers (an import cycle)
        cluster = connect(scheduler)              # an unreachable scheduler: one line before any page
    ledger = open_ledger(outdir)
    try:
        for lay, _, _ in forms:
            _check_same_form(ledger, lay)
        first, first_text, first_path = forms[0]
        # absolute paths: the review page finds the layout from wherever it is started
        run_id = ledger.start_run(layout_path=str(first_path.resolve()),
                                  layout_sha256=hashlib.sha256(first_text.encode("utf-8")).hexdigest(),
                                  model_path=str(bundle.path.resolve()), model_sha256=bundle.sha256,
                                  threshold=run_thresholds[first.name], command=command, layout_text=first_text,
                                  bundle=bundle.summary(), audit_rate=ctx.audit[first.name])
        for lay, text, path in forms:
            ledger.add_run_form(run_id, form=lay.name, layout_path=str(path.resolve()),
                                layout_sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(), layout_text=text,
                                threshold=run_thresholds[lay.name], audit_rate=ctx.audit[lay.name])
        report = BatchReport(run_id=run_id, outdir=Path(outdir))
        try:
            if cluster is not None:
                from .cluster import run_on_cluster  # here: an import cycle, as above
                run_on_cluster(cluster, scans, ctx, ledger, report, progress, send_bytes=send_bytes,
                               write=_write)
            else:
                _run(scans, ctx, ledger, report, workers, progress)
            ledger.finish_run(run_id)
        finally:
            write_outputs(ledger)
            report.seconds = time.perf_counter() - t_start
    finally:
        ledger.close()
        if cluster is not None:
            cluster.close()
    return report


def _check_same_form(ledger: Ledger, layout: Layout) -> None:
    """Refuse to add pages read with another version of a form to a ledger (its tables would mix
    two sets of fields); a layout moved, re-commented or with other thresholds is the same form."""
    for (run_id, _form), earlier in run_layouts(ledger).items():
        if earlier is not None and earlier.name == layout.name and earlier.structure() != layout.structure():
            raise LedgerError(f"{ledger.outdir}: read with another version of the layout {layout.name!r} (run "
                              f"{run_id}); read into a new output folder, or use the layout of that run")


class _Done:
    """A result already at hand, queued in page order with the pool's futures."""

    def __init__(self, value):
        self.value = value

    def result(self):
        return self.value


def _run(scans, ctx: RunContext, ledger: Ledger, report: BatchReport, workers: int, progress) -> None:
    known = ledger.known_pages()
    pin = workers > 1
    pool = None
    if pin:
        mp = multiprocessing.get_context("spawn")
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=mp, initializer=_init_worker,
                                   initargs=(ctx, True, os.getpid()))
    else:
        _init_worker(ctx, False)

    # with workers busy on the other cores, the main process's BLAS keeps to one thread
    limits = threadpool_limits(limits=1) if pin else None
    counts = {"files": len(scans), "pages": 0}
    sources: set[str] = set()   # the files opened so far
    queued: set = set()
    handed: set = set()       # pages handed over through in-memory files (closed when done or at the end)

    def submit(item):
        if isinstance(item, PageWork):
            return _Done(item)
        page, h, load_s = item
        counts["pages"] += 1
        sources.add(page.source)
        report.imaging_seconds += load_s
        report.stages["load"] = report.stages.get("load", 0.0) + load_s
        prior = known.get(h)
        if (prior is not None and prior != "failed") or h in queued:
            return _Done(known_page(page.source, page.page_number, h))
        queued.add(h)
        if pool is None:
            return _Done(_work(page, h))
        fd = _pixels_file(page.gray) if page.gray.dtype == np.uint8 and page.gray.ndim == 2 else None
        if fd is None:
            return pool.submit(_work, page, h)
        return _Handed(pool, page, h, fd, handed)

    try:
        for work in _ordered(decoded_pages(scans), submit, window=3 * workers if pool else 1):
            _write(work, known, ledger, report)
            if progress is not None:
                # total: pages met so far plus one per file not opened yet
                total = counts["pages"] + max(0, counts["files"] - len(sources))
                progress(report.pages, max(total, report.pages), review=report.review, failed=len(report.problems))
    finally:
        if limits is not None:
            limits.restore_original_limits()
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
        for handing in list(handed):
            handing.close()


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
        yield res     # written first: in this process, the next page's work would otherwise come before it
        nxt = next(it, None)
        if nxt is not None:
            pending.append(submit(nxt))


def _write(work: PageWork, known: dict, ledger: Ledger, report: BatchReport) -> None:
    """Write one page's work to the ledger (once: a page already there is counted as skipped)."""
    row = work.row
    report.pages += 1
    report.imaging_seconds += work.seconds - work.recognition_seconds
    report.recognition_seconds += work.recognition_seconds
    for k, v in work.stages.items():
        report.stages[k] = report.stages.get(k, 0.0) + float(v)
    prior = known.get(row.content_hash)
    if row.status == "known" or (prior is not None and prior != "failed"):
        report.skipped += 1
        if prior == "unregistered":
            report.problems.append((row.source, row.page_number, prior, ledger.page_error(row.content_hash)))
        return
    t0 = time.perf_counter()
    ledger.write_page(report.run_id, row)
    report.writing_seconds += time.perf_counter() - t0
    known[row.content_hash] = row.status
    if row.status == "read":
        report.read += 1
    elif row.status == "unregistered":
        report.unregistered += 1
    else:
        report.failed += 1
    if row.status != "read":
        report.problems.append((row.source, row.page_number, row.status, row.error))
    report.fields += len(row.fields)
    report.accepted += sum(f.decision == "accepted" for f in row.fields)
    report.review += sum(f.decision != "accepted" for f in row.fields)
    report.audited += work.audited
