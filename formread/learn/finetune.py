"""Fine-tuning a network on local handwriting without forgetting the writers it knew.

Shared by ``formread retrain`` (samples folder) and ``formread learn`` (a clerk's decisions): the
network in use is trained further on the local digits mixed with a sample of its own original
training data, with the augmentation and label smoothing of its recipe, a fresh temperature fitted
on the run's validation split, and the original held-out parts measured before and after.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import DataError
from ..nn.augment import PEN_AND_SCANNER, AugmentConfig
from ..nn.model import Sequential, build_model
from ..nn.train import TrainConfig, TrainResult, evaluate, train
from .datasets import Dataset, held_out_parts, load_named

__all__ = ["FineTuned", "fine_tune", "original_data", "accuracy"]


@dataclass
class FineTuned:
    """The new network and how it was made."""

    network: Sequential
    result: TrainResult
    config: TrainConfig
    n_original: int


def _training_name(header: dict) -> str:
    """The dataset name a model was trained on, without its part (e.g. ``default``)."""
    name = str((header.get("training") or {}).get("dataset") or "default")
    return name.rsplit(":", 1)[0] if name.split(":", 1)[0] in ("default", "mnist", "digits") else name


def original_data(header: dict) -> tuple[Dataset, dict[str, Dataset]]:
    """(the original training data, {held-out part name: Dataset}) named in a model header."""
    name = _training_name(header)
    return load_named(name, "train"), {p: load_named(*p.split(":")) for p in held_out_parts(name)}


def accuracy(model, x: np.ndarray, y: np.ndarray) -> float:
    """Share of ``x`` (N, 1, 28, 28) float32 read as ``y`` (N,) by ``model``; nan for no images."""
    return float(evaluate(model, x, y)["accuracy"]) if len(y) else float("nan")


def fine_tune(parent, header: dict, x_local: np.ndarray, y_local: np.ndarray, original: Dataset, *,
              epochs: int = 6, lr: float = 5e-4, original_ratio: float = 4.0, seed: int = 0,
              progress: Callable | None = None, checkpoint=None, resume: bool = False) -> FineTuned:
    """A copy of network ``parent`` trained further on local digits mixed with original data.

    Parameters
    ----------
    parent : formread.nn.model.Sequential (left unchanged)
    header : the parent's model header (its recipe: augmentation without the pen and scanner effects,
        batch size, label smoothing)
    x_local : ndarray of shape (N, 1, 28, 28), float32; y_local : ndarray of shape (N,), int64
    original : the parent's original training data
    original_ratio : original images drawn per local image (at least 1,000)

    Raises
    ------
    DataError for too few local digits.
    """
    if len(y_local) < 2:
        raise DataError(f"only {len(y_local)} local digits to learn from")
    rng = np.random.default_rng(seed)
    n_orig = int(min(len(original), max(1000, round(original_ratio * len(y_local)))))
    orig_idx = np.sort(rng.choice(len(original), size=n_orig, replace=False))
    x_mix = np.concatenate([original.x[orig_idx], x_local])
    y_mix = np.concatenate([original.y[orig_idx], y_local])
    new = build_model(parent.spec, np.random.default_rng(seed))
    new.load_state_dict(parent.state_dict())
    base = (header.get("training") or {}).get("config") or {}
    aug = base.get("augment")
    aug = AugmentConfig.from_dict(aug if isinstance(aug, dict) else {})
    # the parent's geometric distortions, without its pen and scanner effects: the local digits were
    # cut from the office's own scans, and degrading them further washed out what they teach (stippled
    # digits of a new writer, tests/learn/test_retrain.py: 0.74 -> 0.79 with the effects, 0.87 without)
    aug = dataclasses.replace(aug, **{name: False for name in PEN_AND_SCANNER})
    cfg = TrainConfig(epochs=epochs, lr=lr, optimizer="adam", schedule="cosine", warmup=0,
                      batch_size=int(base.get("batch_size", 64)), val_fraction=0.1,
                      label_smoothing=float(base.get("label_smoothing", 0.0)), patience=0, augment=aug, seed=seed)
    result = train(new, x_mix, y_mix, cfg, progress=progress, checkpoint=checkpoint, resume=resume)
    return FineTuned(new, result, cfg, n_orig)
