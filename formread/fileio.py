"""Atomic file writes: readers see the old file or the whole new one, never a part.

Neutral (imports only the error types), so the network, the review side and the CLI share it.
The ledger keeps its own variant with fixed temp names under its write lock
(``formread.ledger.store.atomic_write``).
"""

from __future__ import annotations

import contextlib
import os
import re
import tempfile
from pathlib import Path

from .errors import WriteError

__all__ = ["atomic_open", "atomic_write", "spreadsheet_cell", "form_slug"]

_UMASK = os.umask(0)
os.umask(_UMASK)


@contextlib.contextmanager
def atomic_open(path: str | os.PathLike, mode: str = "wb", **kwargs):
    """Open a temporary file beside ``path``; on success fsync it and move it into place.

    ``mode`` is "wb" or "w" (text; pass ``encoding``/``newline`` in ``kwargs``).  On any
    exception the temporary file is removed and ``path`` is left as it was; a file that cannot be
    written (a folder in its place, a read-only folder, a full disk) is a one-line WriteError.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as e:
        blocked = next((p for p in path.parents if p.exists() and not p.is_dir()), None)
        why = f"{blocked} is a file, not a folder" if blocked is not None else (e.strerror or str(e))
        raise WriteError(f"{path}: cannot be written ({why})") from None
    try:
        os.chmod(tmp, 0o666 & ~_UMASK)      # as an ordinary new file would be, not mkstemp's 0600
        with os.fdopen(fd, mode, **kwargs) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as e:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(e, OSError):
            raise WriteError(f"{path}: cannot be written ({e.strerror or e})") from None
        raise


def atomic_write(path: str | os.PathLike, data: bytes | str) -> None:
    """Write ``data`` (bytes, or str as UTF-8) to ``path`` atomically."""
    if isinstance(data, str):
        with atomic_open(path, "w", encoding="utf-8", newline="") as f:
            f.write(data)
    else:
        with atomic_open(path, "wb") as f:
            f.write(data)


def spreadsheet_cell(text) -> str:
    """A CSV cell that a spreadsheet will not run as a formula (common practice: prefix ')."""
    s = "" if text is None else str(text)
    return "'" + s if s[:1] in ("=", "+", "-", "@", "\t", "\r") else s


def form_slug(name: str) -> str:
    """A form's name as part of a file name: ``readings-<slug>.csv`` (lower case letters, digits, dashes)."""
    slug = re.sub(r"[^a-z0-9]+", "-", str(name).lower()).strip("-")
    return (slug or "form")[:60]
