"""Model files: our own format, a ``.npz`` of named weight arrays plus a JSON header, no pickle.

The header is stored inside the archive as a uint8 array named ``header.json`` (UTF-8 JSON).

Format version 2 (written by this formread):

* ``networks``: the architecture spec of each network the file holds (one, or several whose
  probabilities are averaged); network ``i``'s arrays are named ``n<i>/<param>``;
* ``weights_sha256`` covers every weight array (sorted by name; for each: name, dtype, shape,
  raw bytes): it identifies the networks, and is what fitted decisions name as "fitted for";
* ``sha256`` covers ``weights_sha256`` and the whole header (canonical JSON, without ``sha256``
  itself), so a changed weight OR an edited header value (a temperature, a fitted constant) is
  caught on load.

Format version 1 (the first release) holds one network (``architecture``, arrays named by parameter)
and its ``sha256`` covers the weights only; such files still load (their header is not checked).

Files are written to a temporary file in the same folder and moved into place: a crash never
leaves half a model under the name.  This module knows nothing of what the header means beyond
the networks and the checksums; formread.read.bundle interprets the rest.
"""

from __future__ import annotations

import copy
import datetime as _dt
import hashlib
import io
import json
import math
import os
import zipfile
from pathlib import Path

import numpy as np

from ..digits import NORMALISATION, SIZE
from ..errors import FormreadError, ModelFileError
from ..fileio import atomic_open
from .model import Sequential, build_model

__all__ = ["FORMAT", "FORMAT_VERSION", "READABLE_VERSIONS", "HEADER_KEY", "MAX_HEADER_BYTES",
           "save_networks", "load_networks", "save_model", "load_model", "read_header", "weights_sha256",
           "header_sha256", "networks_sha256"]

FORMAT = "formread-model"
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)
HEADER_KEY = "header.json"
MAX_HEADER_BYTES = 4 << 20
"""A header larger than this is not a formread header (fitted decisions take tens of KB)."""
MAX_NETWORKS = 16


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


def networks_sha256(networks) -> str:
    """The ``weights_sha256`` a file holding ``networks`` (Sequential or a sequence) will carry."""
    nets = [networks] if isinstance(networks, Sequential) else list(networks)
    return weights_sha256(_arrays(nets))


def _arrays(nets: list[Sequential]) -> dict[str, np.ndarray]:
    return {f"n{i}/{k}": v for i, net in enumerate(nets) for k, v in net.state_dict().items()}


def header_sha256(header: dict) -> str:
    """Hex SHA-256 of a version-2 header without its ``sha256`` key (canonical JSON, sorted keys)."""
    body = {k: v for k, v in header.items() if k != "sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


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
    """A header value as plain JSON: numpy scalars and arrays become numbers and lists, tuples
    lists, and a figure that does not exist (NaN, infinite) becomes null (JSON has no NaN)."""
    if isinstance(obj, (np.generic, np.ndarray)):
        obj = obj.tolist()
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if obj is None or isinstance(obj, (bool, int, str)):
        return obj
    raise TypeError(f"{type(obj).__name__} is not JSON-serialisable")


def save_networks(path: str | os.PathLike, networks, header: dict | None = None) -> dict:
    """Write one or several networks and ``header`` to ``path`` atomically; return the header written.

    Parameters
    ----------
    path : file to write (``.npz``)
    networks : Sequential, or sequence of Sequential (an ensemble: probabilities are averaged)
    header : dict, optional
        JSON-ready values; ``format``, ``format_version``, ``networks``, ``weights_sha256``,
        ``sha256`` and ``created`` (UTC ISO 8601) are filled in, and ``input``, ``labels``,
        ``training``, ``seed``, ``metrics`` and ``temperature`` (1.0) get defaults when missing.
    """
    path = Path(path)
    nets = [networks] if isinstance(networks, Sequential) else list(networks)
    if not 1 <= len(nets) <= MAX_NETWORKS:
        raise ModelFileError(f"{path}: a model file holds 1 to {MAX_NETWORKS} networks; got {len(nets)}")
    arrays = _arrays(nets)
    full = _default_header()
    full.update(copy.deepcopy(header or {}))
    for key in ("architecture", "sha256"):
        full.pop(key, None)
    full["format"] = FORMAT
    full["format_version"] = FORMAT_VERSION
    full["networks"] = [net.spec for net in nets]
    full["temperature"] = float(full.get("temperature", 1.0))
    full["weights_sha256"] = weights_sha256(arrays)
    full["created"] = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    try:
        full = json.loads(json.dumps(_plain(full), sort_keys=True, allow_nan=False))
    except (TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: header is not JSON-serialisable ({e})") from None
    full["sha256"] = header_sha256(full)
    text = json.dumps(full, sort_keys=True)
    payload = dict(arrays)
    payload[HEADER_KEY] = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    with atomic_open(path) as f:
        np.savez(f, **payload)  # type: ignore[arg-type]  # numpy's stub lets **kwds fill allow_pickle: bool
    return full


def save_model(path: str | os.PathLike, model: Sequential, header: dict | None = None) -> dict:
    """:func:`save_networks` for one network."""
    return save_networks(path, [model], header)


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


def _number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _check_header(path: Path, header: dict) -> None:
    """The header's own values are of the types and ranges a model needs (one line otherwise)."""
    t = header.get("temperature", 1.0)
    if not _number(t) or not 1e-3 <= t <= 1e3:
        raise ModelFileError(f"{path}: damaged model file (temperature must be a number in [0.001, 1000]; "
                             f"got {str(t)[:40]!r})")
    inp = header.get("input") or {}
    if not isinstance(inp, dict):
        raise ModelFileError(f"{path}: damaged model file ('input' must be a table)")
    size, channels = inp.get("size", SIZE), inp.get("channels", 1)
    if (not isinstance(size, int) or isinstance(size, bool) or not 8 <= size <= 256
            or not isinstance(channels, int) or isinstance(channels, bool) or channels != 1):
        raise ModelFileError(f"{path}: damaged model file (input size {str(size)[:20]!r}, channels "
                             f"{str(channels)[:20]!r}: formread reads 1-channel images of 8 to 256 pixels)")
    labels = header.get("labels", [])
    if not isinstance(labels, list) or not 2 <= len(labels) <= 1000 or not all(isinstance(x, str) for x in labels):
        raise ModelFileError(f"{path}: damaged model file ('labels' must be a list of names)")


def _header_from(path: Path, npz) -> dict:
    if HEADER_KEY not in npz.files:
        raise ModelFileError(f"{path}: not a formread model file (no {HEADER_KEY} inside)")
    try:
        raw = npz[HEADER_KEY]
        if raw.dtype != np.uint8 or raw.ndim != 1 or raw.size > MAX_HEADER_BYTES:
            raise ValueError("header is not a small byte array")
        header = json.loads(raw.tobytes().decode("utf-8"))
    except _READ_ERRORS + (UnicodeDecodeError, RecursionError):
        raise ModelFileError(f"{path}: damaged model file (header unreadable)") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise ModelFileError(f"{path}: not a formread model file (format is not {FORMAT!r})")
    version = header.get("format_version")
    if version not in READABLE_VERSIONS:
        raise ModelFileError(f"{path}: unsupported model format version {str(version)[:20]} "
                             f"(this formread reads versions {', '.join(map(str, READABLE_VERSIONS))})")
    needed = ("architecture", "sha256") if version == 1 else ("networks", "weights_sha256", "sha256")
    for key in needed:
        if key not in header:
            raise ModelFileError(f"{path}: damaged model file (header lacks {key!r})")
    if version == 2:
        try:
            ok = header_sha256(header) == header["sha256"]
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise ModelFileError(f"{path}: checksum mismatch (header changed or damaged since saving)")
        nets = header["networks"]
        if not isinstance(nets, list) or not 1 <= len(nets) <= MAX_NETWORKS:
            raise ModelFileError(f"{path}: damaged model file ('networks' must list 1 to {MAX_NETWORKS} "
                                 "architectures)")
    header.setdefault("temperature", 1.0)
    _check_header(path, header)
    return header


def read_header(path: str | os.PathLike) -> dict:
    """The header of the model file at ``path`` (a version-2 header is verified; weights are not
    checked here).  Raises ModelFileError."""
    path = Path(path)
    with _open(path) as npz:
        return _header_from(path, npz)


def _build(path: Path, spec, arrays: dict[str, np.ndarray], header: dict) -> Sequential:
    try:
        model = build_model(spec, np.random.default_rng(0))
    except (FormreadError, TypeError, ValueError, KeyError) as e:
        raise ModelFileError(f"{path}: invalid architecture in header ({e})") from None
    try:
        model.load_state_dict(arrays)
    except (FormreadError, ValueError, KeyError) as e:
        raise ModelFileError(f"{path}: weights do not fit the architecture ({e})") from None
    inp = header.get("input") or {}
    size = int(inp.get("size", SIZE))
    try:
        out = model.forward(np.zeros((1, 1, size, size), dtype=np.float32))
    except (FormreadError, TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: architecture does not fit its {size}x{size} input ({e})") from None
    if out.shape[1] != len(header.get("labels", [])):
        raise ModelFileError(f"{path}: the network gives {out.shape[1]} classes but the header names "
                             f"{len(header.get('labels', []))} labels")
    return model


def load_networks(path: str | os.PathLike) -> tuple[list[Sequential], dict]:
    """Load (networks in float32, header) from ``path``, checking format, version, checksums and fit.

    Returns
    -------
    networks : list of Sequential (one, or an ensemble)
    header : dict (its checksum covers it when ``format_version`` is 2)

    Raises
    ------
    ModelFileError("<file>: <problem>") for a missing, empty, truncated, tampered, other-version
    or not-a-model file, or weights that do not fit the architecture.
    """
    path = Path(path)
    with _open(path) as npz:
        header = _header_from(path, npz)
        try:
            arrays = {name: npz[name] for name in npz.files if name != HEADER_KEY}
        except _READ_ERRORS:
            raise ModelFileError(f"{path}: damaged model file (weights unreadable; truncated?)") from None
    if header["format_version"] == 1:
        if weights_sha256(arrays) != header["sha256"]:
            raise ModelFileError(f"{path}: checksum mismatch (weights changed or damaged since saving)")
        return [_build(path, header["architecture"], arrays, header)], header
    if weights_sha256(arrays) != header["weights_sha256"]:
        raise ModelFileError(f"{path}: checksum mismatch (weights changed or damaged since saving)")
    nets = []
    for i, spec in enumerate(header["networks"]):
        prefix = f"n{i}/"
        nets.append(_build(path, spec, {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)},
                           header))
    return nets, header


def load_model(path: str | os.PathLike) -> tuple[Sequential, dict]:
    """:func:`load_networks` for a file of one network; ModelFileError for an ensemble file."""
    nets, header = load_networks(path)
    if len(nets) != 1:
        raise ModelFileError(f"{path}: holds {len(nets)} networks; load it as a model bundle")
    return nets[0], header
