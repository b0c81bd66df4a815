"""The training recipe, defined once: what data, which network, which settings, and the file it makes.

:class:`Recipe` holds everything a training run depends on; its defaults are the shipped model's
recipe (``formread train --seed 1 --out models/default.npz`` reproduces it, see
models/MODEL_CARD.md), because they are :class:`formread.nn.train.TrainConfig`'s and
:class:`formread.nn.augment.AugmentConfig`'s own defaults.  :func:`train_recipe` runs it: loads the
data by name, trains, measures the held-out parts that go with the data, and writes a model bundle
whose header records the recipe, the split, the figures and the command that reproduces it.  The
CLI (``formread train``) only parses flags into a Recipe, calls this, and prints the result.
"""

from __future__ import annotations

import dataclasses
import shlex
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import check_param
from ..nn.augment import LATER_EFFECTS
from ..nn.metrics import classification_report
from ..nn.model import ARCHITECTURES, build_model
from ..nn.train import TrainConfig, TrainResult, evaluate, train
from ..read.bundle import Bundle, save_bundle, shipped_decoder
from .datasets import held_out_parts, load_named

__all__ = ["Recipe", "TrainedModel", "train_recipe", "held_out_figures", "evaluate_bundle"]

FIGURE_KEYS = ("n", "accuracy", "ece_raw", "ece", "nll_raw", "nll")


@dataclass
class Recipe:
    """A training run, completely.

    Attributes
    ----------
    dataset : str       training data name (formread.learn.datasets.load_named); its train part is used
    arch : str          architecture name (formread.nn.model.ARCHITECTURES)
    seed : int          seeds the weights, split, shuffling and augmentation (the shipped model: 1)
    config : TrainConfig  every training setting (its defaults are the shipped recipe)
    """

    dataset: str = "default"
    arch: str = "wide"
    seed: int = 1
    config: TrainConfig = field(default_factory=TrainConfig)

    def validate(self) -> None:
        """ParameterError for an impossible recipe (before any data is loaded)."""
        check_param(self.arch in ARCHITECTURES, "arch", f"one of {', '.join(sorted(ARCHITECTURES))}", self.arch)
        check_param(isinstance(self.seed, int) and not isinstance(self.seed, bool) and 0 <= self.seed < 2 ** 32,
                    "seed", "an integer in [0, 2**32)", self.seed)
        self.config.validate()

    def command(self, out) -> str:
        """The ``formread train`` command that reproduces this run, every setting spelled out."""
        cfg, a = self.config, self.config.augment
        args = ["formread", "train", "--dataset", self.dataset, "--arch", self.arch, "--epochs", str(cfg.epochs),
                "--batch-size", str(cfg.batch_size), "--optimizer", cfg.optimizer, "--lr", f"{cfg.lr:g}",
                "--schedule", cfg.schedule, "--weight-decay", f"{cfg.weight_decay:g}",
                "--label-smoothing", f"{cfg.label_smoothing:g}", "--val-fraction", f"{cfg.val_fraction:g}",
                "--patience", str(cfg.patience), "--affine" if a.affine else "--no-affine",
                "--elastic" if a.elastic else "--no-elastic", "--elastic-alpha", f"{a.elastic_alpha:g}",
                "--elastic-sigma", f"{a.elastic_sigma:g}"]
        args += [f"--{name}" if getattr(a, name) else f"--no-{name}" for name in LATER_EFFECTS]
        args += ["--seed", str(self.seed)]
        if cfg.workers != 1:
            args += ["--workers", str(cfg.workers)]
        args += ["--out", str(out)]
        return " ".join(shlex.quote(x) for x in args)


@dataclass
class TrainedModel:
    """What :func:`train_recipe` made: the bundle written, the run's result, the held-out figures."""

    bundle: Bundle
    result: TrainResult
    figures: dict


def held_out_figures(model, dataset: str, temperature: float) -> dict:
    """Accuracy and calibration on the held-out parts that go with training data ``dataset``.

    Returns ``{part: {n, accuracy, ece_raw, ece, nll_raw, nll}}`` (e.g. ``mnist:test``).
    """
    out = {}
    for part in held_out_parts(dataset):
        held = load_named(*part.split(":"))
        ev = evaluate(model, held.x, held.y, temperature)
        out[part] = {k: ev[k] for k in FIGURE_KEYS}
    return out


def evaluate_bundle(bundle: Bundle, x: np.ndarray, y: np.ndarray) -> dict:
    """:func:`formread.nn.train.evaluate`'s figures for a whole bundle (an ensemble averaged).

    x : ndarray of shape (N, 1, 28, 28), float32; y : ndarray of shape (N,), int
    """
    raw = classification_report(bundle.predict_proba(x, temperature=1.0), y)
    cal = classification_report(bundle.predict_proba(x), y)
    out = dict(raw)
    out.update(ece_raw=raw["ece"], nll_raw=raw["nll"], ece=cal["ece"], nll=cal["nll"],
               temperature=float(bundle.temperature))
    return out


def _finite(v):
    """JSON has no NaN: a figure that does not exist (no validation split) is null."""
    return None if v != v else v


def train_recipe(recipe: Recipe, out, *, progress: Callable | None = None, checkpoint=None,
                 resume: bool = False, on_data: Callable | None = None) -> TrainedModel:
    """Train by ``recipe`` and write the model bundle to ``out``.

    The new network starts with the shipped decoder constants, which count as fitted only when
    its weights are the shipped network's (the recipe reproduced exactly); otherwise they are
    inherited, and ``formread learn`` refits them.  Ctrl-C keeps the best weights so far
    (``result.interrupted``); ``resume`` continues from ``checkpoint``.  ``on_data(dataset)`` is
    called once the training data is loaded (the CLI says what it trains on).

    Raises
    ------
    ParameterError, DataError, ModelFileError
    """
    recipe.validate()
    data = load_named(recipe.dataset, "train")
    if on_data is not None:
        on_data(data)
    cfg = dataclasses.replace(recipe.config, seed=recipe.seed)
    model = build_model(recipe.arch, np.random.default_rng(recipe.seed))
    result = train(model, data.x, data.y, cfg, progress=progress, checkpoint=checkpoint, resume=resume)
    figures = {"validation": {"n": int(len(result.val_indices)), "accuracy": _finite(result.val_accuracy),
                              "loss": _finite(result.best_val_loss), "ece_raw": _finite(result.ece_val_raw),
                              "ece": _finite(result.ece_val_calibrated)}}
    figures.update(held_out_figures(model, recipe.dataset, result.temperature))
    header = {
        "training": {
            "dataset": data.name, "n_images": int(len(data)), "n_train": int(len(result.train_indices)),
            "n_validation": int(len(result.val_indices)),
            "split": f"stratified {cfg.val_fraction:g} of each class held back for validation (seed {recipe.seed})",
            "held_out": held_out_parts(recipe.dataset), "architecture_name": recipe.arch, "config": cfg.as_dict(),
            "epochs_run": result.epochs_run, "best_epoch": result.best_epoch,
            "stopped_early": result.stopped_early, "interrupted": result.interrupted,
            "seconds": round(result.seconds, 1), "command": recipe.command(out),
        },
        "seed": recipe.seed,
        "metrics": figures,
        "temperature": result.temperature,
    }
    decoder, fitted_for = shipped_decoder()
    bundle = save_bundle(Path(out), model, header, decoder=decoder, decoder_fitted_for=fitted_for,
                         decoder_fitted_on="the shipped network's development demo cards")
    return TrainedModel(bundle, result, figures)
