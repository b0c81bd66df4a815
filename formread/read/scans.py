"""The batch's inputs: which files are scans, their names as the ledger holds them, their pages.

Shared by the local batch (formread.read.batch) and the page work on a Dask cluster
(formread.read.cluster): the main process lists the inputs, decodes them page by page and hashes
each page, whoever then does the page work.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import stat
import time
from collections.abc import Iterable
from pathlib import Path

from ..errors import ImageError, one_line
from ..imaging.load import iter_pages
from ..ledger.store import PageRow, page_hash
from .pagework import PageWork, failed_page

__all__ = ["SCAN_SUFFIXES", "list_scans", "display_name", "file_failure_hash", "decoded_pages", "known_page"]

SCAN_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".pdf")
"""File suffixes taken as scans when a folder is given (case-insensitive)."""


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
        key: Path | str
        try:
            key = Path(source).resolve()
        except (OSError, RuntimeError):
            key = source
        if key in seen:
            continue
        seen.add(key)
        unique.append((source, refusal))
    return unique


_CONTROL = {**{c: f"\\x{c:02x}" for c in (*range(32), 0x7F)}, 0x0A: "\\n", 0x0D: "\\r", 0x09: "\\t"}


def display_name(path) -> str:
    """A file name as the ledger and messages hold it: undecodable bytes (a name from another system's
    encoding) are shown as backslash escapes instead of stopping every batch, and control characters
    (a newline in a name) as escapes too, so that a message naming the file stays one line."""
    return os.fsencode(str(path)).decode("utf-8", "backslashreplace").translate(_CONTROL)


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


def file_failure_hash(source: str) -> str:
    """Key of a whole-file failure: one row per source file, replaced when the file is tried again."""
    return "failed:" + hashlib.sha256(source.encode("utf-8", "surrogateescape")).hexdigest()


# ------------------------------------------------------------------------------------------ the page work
def decoded_pages(scans):
    """Stream the inputs page by page: ``(page, content_hash, load_seconds)``, or a failed PageWork for
    a file that is not a scan or cannot be (fully) decoded."""
    for source, refusal in scans:
        name = display_name(source)
        if refusal is not None:
            yield failed_page(name, 1, file_failure_hash(source), f"{name}: {refusal}")
            continue
        n = 0
        t0 = time.perf_counter()
        try:
            for page in iter_pages(source):
                n += 1
                h = page_hash(page.gray)
                if page.source != name:
                    page = dataclasses.replace(page, source=name)
                yield page, h, time.perf_counter() - t0
                t0 = time.perf_counter()
        except ImageError as e:
            # pages decoded before the failure are kept; the rest of the file is one failed record
            msg = str(e)
            if msg.startswith(str(source)):            # the message names the file as the ledger does
                msg = name + msg[len(str(source)):]
            yield failed_page(name, n + 1, file_failure_hash(source), one_line(ImageError(msg)),
                              time.perf_counter() - t0)


def known_page(source: str, page_number: int, content_hash: str) -> PageWork:
    """A page already in the ledger (or met twice in this run): nothing to read."""
    return PageWork(PageRow(content_hash=content_hash, source=source, page_number=page_number, status="known"))
