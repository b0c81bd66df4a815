"""Model files: our own format, a ``.npz`` of named weight arrays plus a JSON header, no pickle.

The header is stored inside the archive as a uint8 array named ``header.json`` (UTF-8 JSON). Its
``sha256`` covers the weight arrays (sorted by name; for each: name, dtype, shape, raw bytes), so a
changed or damaged weight is caught on load. Files are written to a temporary file in the same
folder and moved into place with ``os.replace``: a crash never leaves half a model under the name.
"""

from __future__ import annotations

import copy
import datetime as _dt
import hashlib
import io
import json
import os
import zipfile
from pathlib import Path

import numpy as np

from formread.digits import NORMALISATION, SIZE
from formread.errors import FormreadError, ModelFileError
from formread.fileio import atomic_open
from formread.nn.model import Sequential, build_model

__all__ = ["FORMAT", "FORMAT_VERSION", "HEADER_KEY", "save_model", "load_model", "read_header",
           "weights_sha256"]

FORMAT = "formread-model"
FORMAT_VERSION = 1
HEADER_KEY = "header.json"


def weights_sha256(arrays: dict[str, np.ndarray]) -> str:
    """Hex SHA-256 over the arrays: sorted names; per array its name, dtype, shape and C-order bytes."""
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(name.encode("utf-8") + b"\0")
        h.update(a.dtype.str.encode("ascii") + b"\0")
        h.update(json.dumps(list(a.shape)).encode("ascii") + b"\0")
        h.update(a.tobytes())
    return h.hexdigest()


def _default_header() -> dict:
    return {
        "input": {"size": SIZE, "channels": 1, "normalisation": NORMALISATION},
        "labels": [str(d) for d in range(10)],
        "training": {},
        "seed": None,
        "metrics": {},
        "temperature": 1.0,
    }


def _plain(obj):
    """numpy scalars and arrays in a header become plain JSON numbers and lists."""
    if isinstance(obj, (np.generic, np.ndarray)):
        return obj.tolist()
    raise TypeError(f"{type(obj).__name__} is not JSON-serialisable")


def save_model(path: str | os.PathLike, model: Sequential, header: dict | None = None) -> dict:
    """Write ``model`` and ``header`` to ``path`` atomically; return the full header written.

    Fills ``format``, ``format_version``, ``architecture`` (the model's spec), ``sha256`` and
    ``created`` (UTC ISO 8601), and defaults for ``input``, ``labels``, ``training``, ``seed``,
    ``metrics`` and ``temperature`` (1.0) when the given header lacks them.
    """
    path = Path(path)
    arrays = model.state_dict()
    full = _default_header()
    full.update(copy.deepcopy(header or {}))
    full["format"] = FORMAT
    full["format_version"] = FORMAT_VERSION
    full["architecture"] = model.spec
    full["temperature"] = float(full.get("temperature", 1.0))
    full["sha256"] = weights_sha256(arrays)
    full["created"] = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    try:
        text = json.dumps(full, sort_keys=True, default=_plain)
    except (TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: header is not JSON-serialisable ({e})") from None
    full = json.loads(text)  # what a later read_header returns
    payload = dict(arrays)
    payload[HEADER_KEY] = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    with atomic_open(path) as f:
        np.savez(f, **payload)
    return full


_READ_ERRORS = (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile, zipfile.LargeZipFile)


def _open(path: Path):
    if not path.exists():
        raise ModelFileError(f"{path}: no such model file")
    if not path.is_file():
        raise ModelFileError(f"{path}: not a file")
    if path.stat().st_size == 0:
        raise ModelFileError(f"{path}: empty file (0 bytes)")
    try:
        # Read into memory first (model files are small): no file handle outlives a failed load.
        return np.load(io.BytesIO(path.read_bytes()), allow_pickle=False)
    except _READ_ERRORS:
        raise ModelFileError(f"{path}: not a formread model file (not a readable .npz archive; "
                             "truncated or another kind of file)") from None


def _header_from(path: Path, npz) -> dict:
    if HEADER_KEY not in npz.files:
        raise ModelFileError(f"{path}: not a formread model file (no {HEADER_KEY} inside)")
    try:
        raw = npz[HEADER_KEY]
        header = json.loads(raw.tobytes().decode("utf-8"))
    except _READ_ERRORS + (UnicodeDecodeError,):
        raise ModelFileError(f"{path}: damaged model file (header unreadable)") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise ModelFileError(f"{path}: not a formread model file (format is not {FORMAT!r})")
    version = header.get("format_version")
    if version != FORMAT_VERSION:
        raise ModelFileError(f"{path}: unsupported model format version {version!r} "
                             f"(this formread reads version {FORMAT_VERSION})")
    for key in ("architecture", "sha256"):
        if key not in header:
            raise ModelFileError(f"{path}: damaged model file (header lacks {key!r})")
    header.setdefault("temperature", 1.0)
    return header


def read_header(path: str | os.PathLike) -> dict:
    """The header of the model file at ``path`` (weights not checked). Raises ModelFileError."""
    path = Path(path)
    with _open(path) as npz:
        return _header_from(path, npz)


def load_model(path: str | os.PathLike) -> tuple[Sequential, dict]:
    """Load (model in float32, header) from ``path``, checking format, version, checksum and fit.

    Raises ModelFileError("<file>: <problem>") for a missing, empty, truncated, tampered,
    other-version or not-a-model file, or weights that do not fit the architecture.
    """
    path = Path(path)
    with _open(path) as npz:
        header = _header_from(path, npz)
        try:
            arrays = {name: npz[name] for name in npz.files if name != HEADER_KEY}
        except _READ_ERRORS:
            raise ModelFileError(f"{path}: damaged model file (weights unreadable; truncated?)") from None
    if weights_sha256(arrays) != header["sha256"]:
        raise ModelFileError(f"{path}: checksum mismatch (weights changed or damaged since saving)")
    try:
        model = build_model(header["architecture"], np.random.default_rng(0))
    except (FormreadError, TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: invalid architecture in header ({e})") from None
    try:
        model.load_state_dict(arrays)
    except (FormreadError, ValueError) as e:
        raise ModelFileError(f"{path}: weights do not fit the architecture ({e})") from None
    try:
        inp = header.get("input") or {}
        size, channels = int(inp.get("size", SIZE)), int(inp.get("channels", 1))
        model.forward(np.zeros((1, channels, size, size), dtype=np.float32))
    except (FormreadError, TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: architecture does not fit its input ({e})") from None
    return model, header
