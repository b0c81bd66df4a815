"""Where the shipped model and demo forms live (the repository's top-level folders)."""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["REPO_ROOT", "models_dir", "demo_dir", "default_model_path"]

REPO_ROOT = Path(__file__).resolve().parents[1]


def models_dir() -> Path:
    """Folder of model files: ``$FORMREAD_MODELS`` or the repository's ``models/``."""
    return Path(os.environ.get("FORMREAD_MODELS", REPO_ROOT / "models"))


def demo_dir() -> Path:
    """Folder of the shipped demo forms: the repository's ``demo_forms/``."""
    return REPO_ROOT / "demo_forms"


def default_model_path() -> Path:
    """The model in use: the one named by ``models/in_use.json`` if present, else ``models/default.npz``."""
    import json

    d = models_dir()
    pointer = d / "in_use.json"
    if pointer.is_file():
        try:
            name = json.loads(pointer.read_text())["model"]
            return d / name
        except (ValueError, KeyError, TypeError):
            pass
    return d / "default.npz"
