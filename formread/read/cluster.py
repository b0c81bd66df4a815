"""The page work on a Dask cluster, for batches beyond one machine (``formread read --scheduler ADDRESS``).

Start the cluster the standard way, on the machines that should do the work::

    dask scheduler                                        # prints tcp://HOST:8786
    dask worker tcp://HOST:8786 --nthreads 1 --nworkers 2 # on each worker machine (one per core)

Each scan file is one task: the worker loads it, hashes every page, skips the pages the ledger already
holds, and does the page work (formread.read.pagework: which form, imaging, recognition, decoding,
spot checks).  The ledger stays a single SQLite writer on the machine that runs ``formread read``, which
takes the pages as their tasks finish and writes each in one transaction, so resume, the content-hash
skip and the guarantees after a kill are those of a local run.  A worker that dies mid-batch loses no
page: Dask runs its tasks again on the other workers, and a page already written is not written again
(the content hash).  Scans go to the workers as file paths when they share the folder, or as bytes
(``send_bytes``) when they do not; the model bundle goes the same way.

Needs the ``distributed`` package (``pip install 'formread[dask]'``); without ``--scheduler`` nothing of
it is imported.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from ..errors import ClusterError, ImageError, one_line
from .pagework import PageWork, RunContext, failed_page, read_page
from .scans import decoded_pages, display_name, file_failure_hash, known_page

__all__ = ["connect", "run_on_cluster", "CONNECT_SECONDS"]

CONNECT_SECONDS = 10.0
"""How long to wait for the scheduler before giving up (before any page is touched)."""


def connect(address: str):
    """A Dask client of the scheduler at ``address``; ClusterError when it cannot be reached."""
    try:
        from distributed import Client  # here: the optional dask extra, imported only for --scheduler
    except ImportError:
        raise ClusterError("--scheduler needs the distributed package: pip install 'formread[dask]'") from None
    try:
        return Client(address, timeout=CONNECT_SECONDS, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as e:
        raise ClusterError(f"{address}: cannot reach the Dask scheduler ({one_line(e)})") from None


def _file_task(path: str, source: str, data: bytes | None, ctx: RunContext, known: frozenset) -> list[PageWork]:
    """On a worker: every page of one scan file (at ``path``, or given as ``data``), read or skipped
    when the ledger already holds it; ``source`` is the file's name as the ledger records it."""
    out: list[PageWork] = []
    with tempfile.TemporaryDirectory() as tmp:
        if data is not None:                      # the worker does not share the folder: a local copy
            path = str(Path(tmp) / "scan") + Path(source).suffix
            Path(path).write_bytes(data)
        try:
            for item in decoded_pages([(path, None)]):
                if isinstance(item, PageWork):
                    item.row.source = source
                    out.append(item)
                    continue
                page, h, _ = item
                if h in known:
                    out.append(known_page(source, page.page_number, h))
                    continue
                work = read_page(page, h, ctx)
                work.row.source = source
                out.append(work)
        except ImageError as e:                   # the file vanished or changed under the worker
            out.append(failed_page(source, len(out) + 1, file_failure_hash(source), one_line(e)))
    return out


def _scatter(client, items: list, tries: int = 3):
    """Send ``items`` to every worker (a list: scatter sends each item of a collection on its own); a
    worker lost meanwhile is tried without."""
    for attempt in range(tries):
        try:
            return client.scatter(items, broadcast=True)
        except OSError as e:               # a connection closed: a worker died while the data went out
            if attempt == tries - 1:
                raise ClusterError(f"cannot send the run's layouts and model to the workers ({one_line(e)})") from None
            time.sleep(1.0)


def run_on_cluster(client, scans, ctx: RunContext, ledger, report, progress, *, send_bytes: bool, write) -> None:
    """Submit one task per scan file and write the pages to ``ledger`` as the tasks finish."""
    from distributed import as_completed  # here: the optional dask extra, imported only for --scheduler

    known = ledger.known_pages()
    done_hashes = frozenset(h for h, status in known.items() if status != "failed")
    if send_bytes:
        ctx = RunContext(**{**ctx.__dict__, "bundle_bytes": Path(ctx.bundle_path).read_bytes()})
    ctx_f, known_f = _scatter(client, [ctx, done_hashes])
    futures = []
    for source, refusal in scans:
        name = display_name(source)
        if refusal is not None:
            write(failed_page(name, 1, file_failure_hash(source), f"{name}: {refusal}"), known, ledger, report)
            continue
        data = None
        if send_bytes:
            try:
                data = Path(source).read_bytes()
            except OSError as e:
                write(failed_page(name, 1, file_failure_hash(source), f"{name}: cannot be read ({e.strerror or e})"),
                      known, ledger, report)
                continue
        futures.append(client.submit(_file_task, str(source), name, data, ctx_f, known_f, pure=False, retries=2))
    files_done = 0
    for fut in as_completed(futures, loop=client.loop):
        try:
            works = fut.result()
        except Exception as e:                    # the task failed on every worker it was given to
            raise ClusterError(f"the cluster could not read a scan file: {one_line(e)}") from None
        for work in works:
            write(work, known, ledger, report)
        files_done += 1
        if progress is not None:
            progress(files_done, len(futures), review=report.review, failed=len(report.problems))
