"""Training loop: mini-batches, shuffling, a validation split, early stopping, checkpoints.

``train(model, x, y, config)`` trains in place and returns a :class:`TrainResult`.

* A stratified share ``val_fraction`` of the data is held back as the validation split:
  it drives early stopping and is what the temperature is fitted on.  The weights kept
  are those with the lowest validation loss at that epoch's own best temperature, so
  the choice does not depend on how calibrated the raw outputs happen to be.
* Each epoch reshuffles the training split and (optionally) distorts every batch
  (:mod:`formread.nn.augment`).
* Progress goes to a ``progress(done, total, **figures)`` callback: ``done``/``total``
  count the batches of the current epoch; figures are ``epoch``, ``epochs``, ``loss``,
  ``acc`` (running training figures) and, on the epoch's last call, ``val_loss`` and ``val_acc``.
* Ctrl-C (KeyboardInterrupt) inside the loop stops training, restores the best
  weights seen so far and returns with ``interrupted=True``.
* With a ``checkpoint`` path, the whole state (weights, best weights, optimizer state,
  epoch, random generator states, history) is written atomically after every epoch as
  an ``.npz`` (arrays plus one JSON string; no pickle), and ``resume=True`` continues
  from it.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import time
import zipfile
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

import numpy as np

from ..errors import DataError, ParameterError, check_param
from ..fileio import atomic_open
from .augment import AugmentConfig, augment_batch, touching_pairs
from .calibrate import fit_temperature, scaled_nll, softmax
from .metrics import classification_report, expected_calibration_error
from .model import Sequential
from .optim import SGD, Adam, cosine_schedule, step_schedule
from .parallel import DataParallel

__all__ = ["TrainConfig", "TrainResult", "train", "stratified_split", "predict_logits", "evaluate", "OPTIMIZERS",
           "SCHEDULES",
           "CHECKPOINT_FORMAT"]

log = logging.getLogger(__name__)

CHECKPOINT_FORMAT = "formread-checkpoint-1"
OPTIMIZERS = ("adam", "sgd")
SCHEDULES = ("constant", "step", "cosine")


@dataclass
class TrainConfig:
    """Settings of one training run; the defaults are the shipped model's recipe (models/MODEL_CARD.md).

    Attributes
    ----------
    epochs : int            most epochs to run (early stopping may end sooner)
    batch_size : int
    optimizer : str         "adam" or "sgd" (SGD uses Nesterov momentum ``momentum``)
    lr : float              base learning rate
    momentum : float        SGD only
    schedule : str          "constant", "step" (x0.3 every ``step_epochs``) or "cosine"
    step_epochs : int
    warmup : int            cosine only: linear warm-up epochs (at most epochs - 1)
    weight_decay : float    on weights only (see formread.nn.optim)
    label_smoothing : float
    val_fraction : float    stratified share held back for early stopping and calibration
    patience : int          epochs without a better validation loss before stopping (0: never stop early)
    augment : AugmentConfig distortions of the training batches
    seed : int              seeds the split, shuffling and augmentation
    workers : int           1, or 2 to split each batch over two processes (formread.nn.parallel;
                            pays only with a second idle core; dropout masks then differ from a
                            1-process run, and a resumed 2-process run is not bit-identical)
    """

    epochs: int = 50
    batch_size: int = 64
    optimizer: str = "adam"
    lr: float = 2e-3
    momentum: float = 0.9
    schedule: str = "cosine"
    step_epochs: int = 10
    warmup: int = 1
    weight_decay: float = 0.0
    label_smoothing: float = 0.1
    val_fraction: float = 0.1
    patience: int = 12
    augment: AugmentConfig = field(default_factory=AugmentConfig)
    seed: int = 0
    workers: int = 1

    def validate(self) -> None:
        """Raise ParameterError for an impossible setting (every number finite and in its range)."""
        def num(v) -> bool:
            return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)

        for name in ("lr", "momentum", "weight_decay", "label_smoothing", "val_fraction"):
            check_param(num(getattr(self, name)), name, "a finite number", getattr(self, name))
        a = self.augment
        for name in ("rotate_deg", "scale", "shear", "shift_px", "elastic_alpha", "elastic_sigma", "prob"):
            v = getattr(a, name)
            check_param(num(v) and v >= 0, f"augment.{name}", "a finite number >= 0", v)
        check_param(a.elastic_sigma > 0 or not a.elastic, "augment.elastic_sigma", "a number > 0", a.elastic_sigma)
        check_param(a.scale < 1, "augment.scale", "a number in [0, 1)", a.scale)
        check_param(self.lr <= 10, "lr", "a number in (0, 10]", self.lr)
        check_param(isinstance(self.seed, int) and 0 <= self.seed < 2 ** 32, "seed", "an integer in [0, 2**32)",
                    self.seed)
        check_param(isinstance(self.epochs, int) and self.epochs >= 1, "epochs", "an integer >= 1", self.epochs)
        check_param(isinstance(self.batch_size, int) and self.batch_size >= 1, "batch_size",
                    "an integer >= 1", self.batch_size)
        check_param(self.optimizer in OPTIMIZERS, "optimizer", f"one of {', '.join(OPTIMIZERS)}", self.optimizer)
        check_param(self.schedule in SCHEDULES, "schedule", f"one of {', '.join(SCHEDULES)}", self.schedule)
        check_param(self.lr > 0, "lr", "a positive number", self.lr)
        check_param(0 <= self.val_fraction < 1, "val_fraction", "a number in [0, 1)", self.val_fraction)
        check_param(0 <= self.label_smoothing < 1, "label_smoothing", "a number in [0, 1)", self.label_smoothing)
        check_param(self.weight_decay >= 0, "weight_decay", "a non-negative number", self.weight_decay)
        check_param(isinstance(self.patience, int) and self.patience >= 0, "patience",
                    "an integer >= 0", self.patience)
        check_param(self.step_epochs >= 1, "step_epochs", "an integer >= 1", self.step_epochs)
        check_param(isinstance(self.warmup, int) and self.warmup >= 0, "warmup", "an integer >= 0", self.warmup)
        check_param(self.workers in (1, 2), "workers", "1 or 2", self.workers)
        for name in ("prob", "stroke_max", "degrade_prob", "remnants_prob", "breaks_prob"):
            v = getattr(a, name)
            check_param(num(v) and 0 <= v <= 1, f"augment.{name}", "a number in [0, 1]", v)
        check_param(num(a.pairs_share) and 0 <= a.pairs_share <= 0.5, "augment.pairs_share", "a number in [0, 0.5]",
                    a.pairs_share)

    def as_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> TrainConfig:
        d = dict(d)
        aug = AugmentConfig.from_dict(d.pop("augment", {}))
        known = {f.name for f in fields(cls)}
        return cls(augment=aug, **{k: v for k, v in d.items() if k in known})


@dataclass
class TrainResult:
    """What a training run produced.

    Attributes
    ----------
    model : Sequential          trained in place; holds the best weights (lowest validation loss
                               at the epoch's best temperature)
    history : list of dict     per epoch: epoch, lr, loss, acc, val_loss (raw), val_loss_t (at the
                               epoch's best temperature), val_acc, seconds
    best_epoch : int           1-based epoch of the weights kept (0 if no epoch finished)
    best_val_loss, val_accuracy : float   raw validation loss and accuracy of the kept weights
                               (nan without a validation split)
    temperature : float        fitted on the validation split (1.0 without one)
    ece_val_raw, ece_val_calibrated : float   validation ECE before/after the temperature
    epochs_run : int           epochs finished, including those before a resume
    interrupted : bool         stopped by Ctrl-C
    stopped_early : bool       stopped by the patience rule
    train_indices, val_indices : ndarray of shape (M,), int64   into the x given to train
    seconds : float            wall time of this call
    """

    model: Sequential
    history: list
    best_epoch: int
    best_val_loss: float
    val_accuracy: float
    temperature: float
    ece_val_raw: float
    ece_val_calibrated: float
    epochs_run: int
    interrupted: bool
    stopped_early: bool
    train_indices: np.ndarray
    val_indices: np.ndarray
    seconds: float


def stratified_split(y: np.ndarray, fraction: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Split indices into (train, val) with about ``fraction`` of each class in val.

    Parameters
    ----------
    y : ndarray of shape (N,), int
    fraction : float in [0, 1)
    rng : numpy.random.Generator

    Returns
    -------
    train, val : sorted ndarrays of int64 indices (disjoint, covering 0..N-1)
    """
    y = np.asarray(y)
    parts: list[np.ndarray] = []
    if fraction > 0:
        for c in np.unique(y):
            idx = np.flatnonzero(y == c)
            k = int(round(fraction * idx.size))
            if k >= idx.size:
                k = idx.size - 1
            if k > 0:
                parts.append(rng.choice(idx, size=k, replace=False))
    val = np.sort(np.concatenate(parts)) if parts else np.zeros(0, np.int64)
    mask = np.ones(y.size, bool)
    mask[val] = False
    return np.flatnonzero(mask).astype(np.int64), val.astype(np.int64)


def predict_logits(model: Sequential, x: np.ndarray, batch_size: int = 256) -> np.ndarray:
    """Raw network outputs in inference mode.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32

    Returns
    -------
    ndarray of shape (N, C), float32
    """
    outs = [model.forward(x[s:s + batch_size], train=False) for s in range(0, len(x), batch_size)]
    if not outs:
        return np.zeros((0, model.spec_classes()), np.float32)
    return np.concatenate(outs).astype(np.float32, copy=False)


def _make_optimizer(model: Sequential, cfg: TrainConfig):
    params = model.parameters()
    if cfg.optimizer == "adam":
        return Adam(params, lr=cfg.lr, weight_decay=cfg.weight_decay)
    return SGD(params, lr=cfg.lr, momentum=cfg.momentum, nesterov=cfg.momentum > 0,
               weight_decay=cfg.weight_decay)


def _make_schedule(cfg: TrainConfig) -> Callable[[int], float]:
    if cfg.schedule == "cosine":
        return cosine_schedule(cfg.lr, cfg.epochs, min_lr=cfg.lr * 0.01,
                               warmup=min(cfg.warmup, cfg.epochs - 1))
    if cfg.schedule == "step":
        return step_schedule(cfg.lr, cfg.step_epochs, 0.3)
    return lambda epoch: cfg.lr


# --- optimizer and generator state (the optimizers keep their moments in private lists) ---

def _optimizer_arrays(opt) -> tuple[dict[str, np.ndarray], dict]:
    arrays, meta = {}, {"t": int(getattr(opt, "t", 0))}
    for key in ("_m", "_v"):
        for i, a in enumerate(getattr(opt, key, []) or []):
            arrays[f"opt{key}/{i}"] = a
    return arrays, meta


def _restore_optimizer(opt, arrays: dict[str, np.ndarray], meta: dict, where: Path) -> None:
    for key in ("_m", "_v"):
        mine = getattr(opt, key, None)
        if mine is None:
            continue
        for i, a in enumerate(mine):
            saved = arrays.get(f"opt{key}/{i}")
            if saved is None or saved.shape != a.shape:
                raise DataError(f"{where}: checkpoint optimizer state does not fit this model")
            a[...] = saved
    if hasattr(opt, "t"):
        opt.t = int(meta.get("t", 0))


def _layer_rngs(model: Sequential) -> list[np.random.Generator]:
    rngs = [getattr(layer, "rng", None) for layer in model.layers]
    return [r for r in rngs if isinstance(r, np.random.Generator)]


def _fingerprint(x: np.ndarray, y: np.ndarray) -> str:
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(x, dtype=np.float32).tobytes())
    h.update(np.ascontiguousarray(y, dtype=np.int64).tobytes())
    return h.hexdigest()


def _atomic_savez(path: Path, arrays: dict[str, np.ndarray]) -> None:
    with atomic_open(path) as f:
        np.savez(f, **arrays)  # type: ignore[arg-type]  # numpy's stub lets **kwds fill allow_pickle: bool


def _save_checkpoint(path: Path, model, best_state, opt, rng, state: dict) -> None:
    arrays = {f"w/{k}": v for k, v in model.state_dict().items()}
    if best_state is not None:
        arrays.update({f"best/{k}": v for k, v in best_state.items()})
    opt_arrays, opt_meta = _optimizer_arrays(opt)
    arrays.update(opt_arrays)
    meta = dict(state)
    meta["format"] = CHECKPOINT_FORMAT
    meta["optimizer_state"] = opt_meta
    meta["rng"] = rng.bit_generator.state
    meta["layer_rngs"] = [g.bit_generator.state for g in _layer_rngs(model)]
    meta["spec"] = model.spec
    arrays["meta.json"] = np.frombuffer(json.dumps(meta).encode("utf-8"), dtype=np.uint8)
    _atomic_savez(path, arrays)


def _load_checkpoint(path: Path) -> tuple[dict, dict[str, np.ndarray]]:
    if not path.is_file():
        raise DataError(f"{path}: no checkpoint to resume from")
    try:
        with open(path, "rb") as fh:          # closed even when the archive is damaged
            npz = np.load(fh, allow_pickle=False)
            if not isinstance(npz, np.lib.npyio.NpzFile):
                raise ValueError("not an .npz archive")
            with npz:
                arrays = {k: npz[k] for k in npz.files}
        meta = json.loads(arrays.pop("meta.json").tobytes().decode("utf-8"))
    except (OSError, ValueError, KeyError, EOFError, UnicodeDecodeError, zipfile.BadZipFile, RecursionError):
        raise DataError(f"{path}: not a readable training checkpoint") from None
    if not isinstance(meta, dict) or meta.get("format") != CHECKPOINT_FORMAT:
        raise DataError(f"{path}: not a formread training checkpoint")
    return meta, arrays


def _evaluate(model: Sequential, x: np.ndarray, y: np.ndarray) -> tuple[float, float, np.ndarray]:
    logits = predict_logits(model, x)
    if len(y) == 0:
        return float("nan"), float("nan"), logits
    return scaled_nll(logits, y, 1.0), float(np.mean(logits.argmax(1) == y)), logits


def train(model: Sequential, x: np.ndarray, y: np.ndarray, config: TrainConfig | None = None, *,
          progress: Callable | None = None, checkpoint: str | os.PathLike | None = None,
          resume: bool = False) -> TrainResult:
    """Train ``model`` in place on (x, y) and keep the weights with the lowest validation loss.

    Parameters
    ----------
    model : Sequential (e.g. from ``build_model``)
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    y : ndarray of shape (N,), int labels 0..C-1
    config : TrainConfig
    progress : callable ``progress(done, total, **figures)``, optional
    checkpoint : path, optional
        Where the training state is written (atomically) after every epoch.
    resume : bool
        Continue from ``checkpoint`` (same data, same settings except ``epochs``).

    Returns
    -------
    TrainResult

    Raises
    ------
    ParameterError for bad settings; DataError for mismatched data or a bad checkpoint.
    """
    cfg = config or TrainConfig()
    cfg.validate()
    x = np.asarray(x)
    y = np.asarray(y)
    if x.ndim != 4 or x.shape[1] != 1:
        raise DataError(f"training images must be of shape (N, 1, H, W); got {x.shape}")
    if y.shape != (x.shape[0],) or not np.issubdtype(y.dtype, np.integer):
        raise DataError(f"training labels must be {x.shape[0]} integers; got shape {y.shape}, dtype {y.dtype}")
    if len(y) < 2:
        raise DataError(f"need at least 2 training images; got {len(y)}")
    if cfg.augment.pairs and x.shape[2:] != (28, 28):
        raise DataError(f"touching pairs (augment.pairs) are normalised as 28x28 digits; the images are {x.shape[2:]}")
    x = x.astype(np.float32, copy=False)
    y = y.astype(np.int64, copy=False)
    n_classes = model.spec_classes()
    if y.min() < 0 or y.max() >= n_classes:
        raise DataError(f"labels must lie in 0..{n_classes - 1}; got {int(y.min())}..{int(y.max())}")

    t0 = time.monotonic()
    rng = np.random.default_rng(cfg.seed)
    tr_idx, val_idx = stratified_split(y, cfg.val_fraction, rng)
    opt = _make_optimizer(model, cfg)
    schedule = _make_schedule(cfg)
    ckpt = Path(checkpoint) if checkpoint is not None else None
    fingerprint = _fingerprint(x, y)

    history: list[dict] = []
    best_state = None
    best_loss, best_epoch, bad_epochs, start = float("inf"), 0, 0, 0
    stopped_early = False
    if resume:
        if ckpt is None:
            raise ParameterError("parameter 'checkpoint' must be a path when resuming; got None")
        meta, arrays = _load_checkpoint(ckpt)
        if meta.get("fingerprint") != fingerprint:
            raise DataError(f"{ckpt}: checkpoint was made on other training data")
        saved_cfg = dict(meta.get("config", {}))
        mine = cfg.as_dict()
        free = ("epochs", "workers")  # may change between the interrupted run and its resumption
        differ = sorted(k for k in set(saved_cfg) | set(mine)
                        if k not in free and saved_cfg.get(k) != mine.get(k))
        if differ:
            raise DataError(f"{ckpt}: checkpoint was made with other settings ({', '.join(differ)})")
        if meta.get("spec") != model.spec:
            raise DataError(f"{ckpt}: checkpoint was made for another architecture")
        try:
            model.load_state_dict({k[2:]: v for k, v in arrays.items() if k.startswith("w/")})
            best = {k[5:]: v for k, v in arrays.items() if k.startswith("best/")}
            best_state = best or None
        except (ParameterError, ValueError):
            raise DataError(f"{ckpt}: checkpoint weights do not fit this model") from None
        _restore_optimizer(opt, arrays, meta.get("optimizer_state", {}), ckpt)
        rng.bit_generator.state = meta["rng"]
        for g, st in zip(_layer_rngs(model), meta.get("layer_rngs", [])):
            g.bit_generator.state = st
        history = list(meta.get("history", []))
        best_loss = float(meta.get("best_loss", float("inf")))
        best_epoch = int(meta.get("best_epoch", 0))
        bad_epochs = int(meta.get("bad_epochs", 0))
        start = int(meta.get("epoch", 0))
        stopped_early = bool(meta.get("stopped_early", False))

    x_tr, y_tr = x[tr_idx], y[tr_idx]
    x_val, y_val = x[val_idx], y[val_idx]
    n_batches = max(1, int(np.ceil(len(tr_idx) / cfg.batch_size)))
    interrupted = False
    epoch = start
    parallel = DataParallel(model, seed=cfg.seed) if cfg.workers == 2 else None
    grad_step = parallel.grad_step if parallel is not None else model.grad_step
    try:
        while epoch < cfg.epochs and not stopped_early:
            e0 = time.monotonic()
            opt.lr = schedule(epoch)
            order = rng.permutation(len(tr_idx))
            loss_sum, correct, seen, digits_seen = 0.0, 0, 0, 0
            for b in range(n_batches):
                sel = order[b * cfg.batch_size:(b + 1) * cfg.batch_size]
                xb, yb = x_tr[sel], y_tr[sel]
                if cfg.augment.enabled:
                    xb = augment_batch(xb, rng, cfg.augment)
                if cfg.augment.pairs:
                    xb, yb = touching_pairs(xb, yb, rng, cfg.augment.pairs_share)
                loss, ok = grad_step(xb, yb, cfg.label_smoothing)
                opt.step()
                loss_sum += loss * len(sel)
                correct += ok
                seen += len(sel)
                digits_seen += int((yb >= 0).sum())     # training accuracy is over the digits only
                if progress is not None and b + 1 < n_batches:
                    progress(b + 1, n_batches, epoch=epoch + 1, epochs=cfg.epochs,
                             loss=loss_sum / seen, acc=correct / max(digits_seen, 1))
            val_loss, val_acc, val_logits = _evaluate(model, x_val, y_val)
            # select on the validation loss at this epoch's best temperature: calibration is
            # fixed afterwards by the temperature, so it should not decide which weights to keep
            # (this matters with label smoothing, which makes the raw outputs under-confident)
            val_loss_t = (scaled_nll(val_logits, y_val, fit_temperature(val_logits, y_val))
                          if len(val_idx) else float("nan"))
            epoch += 1
            row = {"epoch": epoch, "lr": opt.lr, "loss": loss_sum / seen, "acc": correct / max(digits_seen, 1),
                   "val_loss": val_loss, "val_loss_t": val_loss_t, "val_acc": val_acc,
                   "seconds": time.monotonic() - e0}
            history.append(row)
            criterion = val_loss_t if len(val_idx) else row["loss"]
            if criterion < best_loss - 1e-6:
                best_loss, best_epoch, bad_epochs = criterion, epoch, 0
                best_state = model.state_dict()
            else:
                bad_epochs += 1
                if cfg.patience and bad_epochs >= cfg.patience:
                    stopped_early = True
            if ckpt is not None:
                _save_checkpoint(ckpt, model, best_state, opt, rng, {
                    "epoch": epoch, "history": history, "best_loss": best_loss, "best_epoch": best_epoch,
                    "bad_epochs": bad_epochs, "stopped_early": stopped_early,
                    "config": cfg.as_dict(), "fingerprint": fingerprint,
                })
            if progress is not None:
                figs = {"epoch": epoch, "epochs": cfg.epochs, "loss": row["loss"], "acc": row["acc"]}
                if len(val_idx):
                    figs.update(val_loss=val_loss, val_acc=val_acc)
                progress(n_batches, n_batches, **figs)
            log.info("epoch %d/%d loss %.4f acc %.4f val_loss %.4f val_acc %.4f",
                     epoch, cfg.epochs, row["loss"], row["acc"], val_loss, val_acc)
    except KeyboardInterrupt:
        interrupted = True
        log.info("training interrupted after %d epochs; keeping the best weights", epoch)
    finally:
        if parallel is not None:
            parallel.close()

    if best_state is not None:
        model.load_state_dict(best_state)
    val_loss, val_acc, logits = _evaluate(model, x_val, y_val)
    temperature, ece_raw, ece_cal = 1.0, float("nan"), float("nan")
    if len(val_idx):
        temperature = fit_temperature(logits, y_val)
        ece_raw = expected_calibration_error(softmax(logits), y_val)
        ece_cal = expected_calibration_error(softmax(logits, temperature), y_val)
    return TrainResult(
        model=model, history=history, best_epoch=best_epoch,
        best_val_loss=float(val_loss), val_accuracy=float(val_acc), temperature=temperature,
        ece_val_raw=ece_raw, ece_val_calibrated=ece_cal, epochs_run=epoch, interrupted=interrupted,
        stopped_early=stopped_early, train_indices=tr_idx, val_indices=val_idx,
        seconds=time.monotonic() - t0,
    )


# --- evaluation ------------------------------------------------------------------------------

def evaluate(model: Sequential, x: np.ndarray, y: np.ndarray, temperature: float = 1.0) -> dict:
    """Evaluation figures of ``model`` on (x, y), raw and temperature-scaled.

    Parameters
    ----------
    x : ndarray of shape (N, 1, 28, 28), float32; y : ndarray of shape (N,), int

    Returns
    -------
    dict: ``n``, ``accuracy``, ``precision``, ``recall``, ``confusion`` (see
    :func:`formread.nn.metrics.classification_report`), ``ece_raw`` and ``nll_raw`` at
    temperature 1, ``ece`` and ``nll`` at ``temperature``, and ``temperature``.
    """
    logits = predict_logits(model, x)
    raw = classification_report(softmax(logits), y)
    cal = classification_report(softmax(logits, temperature), y)
    out = dict(raw)
    out.update(ece_raw=raw["ece"], nll_raw=raw["nll"], ece=cal["ece"], nll=cal["nll"],
               temperature=float(temperature))
    return out
