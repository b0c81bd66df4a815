"""Where things live: the shipped model and demo forms (package data), and the user's model store.

* The **shipped** model bundle and its card, and the demo forms, are package data, read with
  ``importlib.resources`` (the repository's top-level ``models/`` and ``demo_forms/`` folders are
  installed as the packages ``formread._models`` and ``formread._demo_forms``), so every kind of
  install finds them.  They are never written.
* The **store** holds the model bundles the user trains or learns, and ``in_use.json``, the pointer
  to the one in use.  It is ``$FORMREAD_HOME/models`` when ``FORMREAD_HOME`` is set, else the user
  data folder of the platform (platformdirs: ``~/.local/share/formread/models`` on Linux).
* The bundle **in use** is the one ``in_use.json`` names, else the shipped one.

A first-release checkout kept retrained versions and ``in_use.json`` in the repository's ``models/``
folder; :func:`migrate_checkout_models` copies them into the store once.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from importlib import resources
from pathlib import Path

from platformdirs import user_data_dir

from .errors import ModelFileError
from .fileio import atomic_write

__all__ = ["IN_USE", "SHIPPED_NAME", "shipped_model", "shipped_card", "demo_forms", "store_dir", "in_use_path",
           "promote", "next_version_path", "store_models", "migrate_checkout_models"]

IN_USE = "in_use.json"
SHIPPED_NAME = "default.npz"
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,120}\.npz\Z")


def _package(name: str) -> Path:
    return Path(str(resources.files(name)))


def shipped_model() -> Path:
    """The shipped model bundle (read-only package data)."""
    return _package("formread._models") / SHIPPED_NAME


def shipped_card() -> Path:
    """The shipped model's card (models/MODEL_CARD.md)."""
    return _package("formread._models") / "MODEL_CARD.md"


def demo_forms() -> Path:
    """The folder of the shipped demo forms (read-only package data)."""
    return _package("formread._demo_forms")


def store_dir() -> Path:
    """The user's model store: ``$FORMREAD_HOME/models``, else the platform's user data folder."""
    home = os.environ.get("FORMREAD_HOME")
    if home:
        return Path(home).expanduser() / "models"
    return Path(user_data_dir("formread", appauthor=False)) / "models"


def in_use_path() -> Path:
    """The model bundle in use: the one the store's ``in_use.json`` names, else the shipped one.

    Raises
    ------
    ModelFileError
        ``in_use.json`` exists but is not a pointer to a model file of the store (it is never ignored
        silently: reading with another model than the one promoted would change every decision).
    """
    pointer = store_dir() / IN_USE
    if not pointer.exists():
        return shipped_model()
    try:
        name = json.loads(pointer.read_text(encoding="utf-8"))["model"]
    except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError):
        raise ModelFileError(f"{pointer}: not a pointer to the model in use (expected {{\"model\": \"NAME.npz\"}}); "
                             "delete it to use the shipped model") from None
    if not isinstance(name, str) or not _NAME.match(name):
        raise ModelFileError(f"{pointer}: names {str(name)[:60]!r}, not a model file of the store")
    if name == SHIPPED_NAME and not (store_dir() / name).exists():
        return shipped_model()
    return store_dir() / name


def promote(path) -> None:
    """Make the bundle at ``path`` (a file of the store) the one in use, by writing ``in_use.json``."""
    path = Path(path)
    if path.resolve().parent != store_dir().resolve():
        raise ModelFileError(f"{path}: only a model of the store ({store_dir()}) can be put in use")
    atomic_write(store_dir() / IN_USE, json.dumps({"model": path.name}) + "\n")


def next_version_path(parent) -> Path:
    """The store's next free version of ``parent``: ``default.npz`` -> ``default-r1.npz``, -r2, ..."""
    stem = re.sub(r"-r\d+$", "", Path(parent).stem)
    d = store_dir()
    n = 1
    while (d / f"{stem}-r{n}.npz").exists():
        n += 1
    return d / f"{stem}-r{n}.npz"


def store_models() -> list[Path]:
    """The model files of the store, by name."""
    d = store_dir()
    return sorted(d.glob("*.npz")) if d.is_dir() else []


def migrate_checkout_models(checkout_models: Path | None = None) -> str | None:
    """Copy a first-release checkout's own versions and ``in_use.json`` into the store, once.

    Returns a one-line note for the person when something was copied, else None.  Files already in
    the store are never overwritten.
    """
    src = checkout_models or _package("formread._models")
    if not src.is_dir() or not (src / IN_USE).exists():
        return None
    dest = store_dir()
    copied = []
    for p in sorted(src.glob("*.npz")) + [src / IN_USE]:
        if p.name == SHIPPED_NAME or (dest / p.name).exists():
            continue
        dest.mkdir(parents=True, exist_ok=True)
        shutil.copy2(p, dest / p.name)
        copied.append(p.name)
    if not copied:
        return None
    return f"moved {len(copied)} file(s) of {src} ({', '.join(copied)}) to the model store {dest}"
