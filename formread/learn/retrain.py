"""Fine-tune the model in use on a clerk's local samples, and promote it only when it helps.

Local samples (``DIR/<digit>/*.png``, see :mod:`formread.learn.samples`) are split once, stratified
and seeded, into a fine-tuning part and a held-out part.  The current model is fine-tuned on
the fine-tuning part mixed with a sample of its own original training data (so it does not
forget the writers it knew), with the geometric augmentation of its training (not the pen and
scanner effects), and its temperature is refitted on the run's validation split.  Accuracy is
measured before and after on the held-out local samples and on the original held-out test parts
(the MNIST sample's test part and the second half of scikit-learn's digits for the shipped model).

The new model is always written as a new version in the model store (``<name>-r<N>.npz``,
formread/store.py); the model in use is never overwritten.  Its decoder constants and fitted
decisions are the parent's, inherited: they were fitted for the parent network, and a retrained
network is more confident, so they would keep its review load where it was.  So ``retrain`` does
not put it in use unless asked (``promote_inherited``), and then only when held-out local accuracy
improves by at least ``min_gain`` and no original test part loses more than ``margin``;
``formread learn`` is the step that refits the decisions and promotes.  Samples with wrong labels
cannot improve held-out local accuracy (their held-out part is wrong in the same random way), so
such a model is refused.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from ..errors import DataError, check_param
from ..nn.train import evaluate, stratified_split
from ..read.bundle import load_bundle
from ..store import in_use_path, next_version_path, promote, store_dir
from .datasets import Dataset, load_samples_folder
from .finetune import accuracy, fine_tune, original_data

__all__ = ["RetrainReport", "retrain"]

MIN_LOCAL_SAMPLES = 20


@dataclass
class RetrainReport:
    """Figures and outcome of one retraining.

    Attributes
    ----------
    model_before, model_after : str     paths of the model fine-tuned and of the new version
    n_local_train, n_local_held_out, n_original : int   images used
    local_before, local_after : float   accuracy on the held-out local samples
    original_before, original_after : dict[str, float]   accuracy per original test part
    temperature : float                 refitted temperature of the new version
    promoted : bool
    reason : str                        why it was or was not promoted
    seconds : float
    """

    model_before: str
    model_after: str
    n_local_train: int
    n_local_held_out: int
    n_original: int
    local_before: float
    local_after: float
    original_before: dict = field(default_factory=dict)
    original_after: dict = field(default_factory=dict)
    temperature: float = 1.0
    promoted: bool = False
    reason: str = ""
    seconds: float = 0.0

    def as_dict(self) -> dict:
        return asdict(self)


def retrain(model_path: str | Path, samples_dir: str | Path, *, out: str | Path | None = None,
            held_out: float = 0.3, epochs: int = 6, lr: float = 5e-4, original_ratio: float = 4.0,
            margin: float = 0.005, min_gain: float = 0.01, seed: int = 0, promote_inherited: bool = False,
            original: Dataset | None = None, original_tests: dict[str, Dataset] | None = None,
            progress: Callable | None = None) -> RetrainReport:
    """Fine-tune ``model_path`` on local samples; write a new version; promote it if it helps.

    Parameters
    ----------
    model_path : path of the model in use (never overwritten)
    samples_dir : path of ``DIR/<digit>/*.png`` local samples
    out : path of the new version (default: next ``-r<N>.npz`` beside ``model_path``)
    held_out : share of each digit's local samples kept for measuring
    epochs, lr : fine-tuning length and base learning rate (Adam, cosine schedule)
    original_ratio : original training images drawn per local fine-tuning image
    margin : most accuracy an original test part may lose for promotion
    min_gain : least held-out local accuracy gain for promotion
    seed : seeds the local split, the sample of original data and training
    promote_inherited : put the new version in use (when it helps) although its decisions are the
        parent's (never done silently: the reason says so)
    original, original_tests : override the original training data and test parts
        (x of shape (N, 1, 28, 28) float32); default: those named in the model header
    progress : ``progress(done, total, **figures)`` per epoch

    Returns
    -------
    RetrainReport (the new model's path is ``model_after``; ``promoted`` says whether it is in use)

    Raises
    ------
    ModelFileError for a bad model file; DataError for too few or unusable samples.
    """
    t0 = time.monotonic()
    model_path = Path(model_path)
    out_path = Path(out) if out is not None else next_version_path(model_path)
    if out_path.resolve() in (model_path.resolve(), in_use_path().resolve()):
        raise DataError(f"{out_path}: the new version must not overwrite the model in use")
    check_param(0 < held_out < 1, "held_out", "a number in (0, 1)", held_out)
    check_param(isinstance(epochs, int) and epochs >= 1, "epochs", "an integer >= 1", epochs)
    check_param(0 <= margin < 1, "margin", "a number in [0, 1)", margin)
    check_param(-1 < min_gain < 1, "min_gain", "a number in (-1, 1)", min_gain)
    parent = load_bundle(model_path)
    model, header = parent.networks[0], parent.header
    if len(parent.networks) != 1:
        raise DataError(f"{model_path}: holds {len(parent.networks)} networks; retraining fine-tunes one")
    local = load_samples_folder(samples_dir, min_share=0.0)
    if len(local) < MIN_LOCAL_SAMPLES:
        raise DataError(f"{samples_dir}: only {len(local)} local samples; retraining needs at least "
                        f"{MIN_LOCAL_SAMPLES}")
    rng = np.random.default_rng(seed)
    tune_idx, hold_idx = stratified_split(local.y, held_out, rng)
    if len(hold_idx) == 0 or len(tune_idx) == 0:
        raise DataError(f"{samples_dir}: too few local samples per digit to hold some out")
    x_hold, y_hold = local.x[hold_idx], local.y[hold_idx]

    if original is None or original_tests is None:
        default_original, default_tests = original_data(header)
        original = default_original if original is None else original
        original_tests = default_tests if original_tests is None else original_tests

    local_before = accuracy(model, x_hold, y_hold)
    original_before = {p: accuracy(model, d.x, d.y) for p, d in original_tests.items()}
    tuned = fine_tune(model, header, local.x[tune_idx], local.y[tune_idx], original, epochs=epochs, lr=lr,
                      original_ratio=original_ratio, seed=seed, progress=progress)
    new, result, cfg, n_orig = tuned.network, tuned.result, tuned.config, tuned.n_original

    local_after = accuracy(new, x_hold, y_hold)
    figures = {p: evaluate(new, d.x, d.y, result.temperature) for p, d in original_tests.items()}
    original_after = {p: float(ev["accuracy"]) for p, ev in figures.items()}

    gain = local_after - local_before
    drops = {p: original_before[p] - original_after[p] for p in original_tests}
    worst = max(drops.items(), key=lambda kv: kv[1]) if drops else (None, 0.0)
    if gain < min_gain:
        promoted, reason = False, (f"held-out local accuracy {local_before:.4f} -> {local_after:.4f} "
                                   f"did not improve by {min_gain:.3f}")
    elif worst[0] is not None and worst[1] > margin:
        promoted, reason = False, (f"{worst[0]} accuracy fell by {worst[1]:.4f}, more than the "
                                   f"margin {margin:.4f}")
    else:
        promoted, reason = True, (f"held-out local accuracy {local_before:.4f} -> {local_after:.4f}; "
                                  f"original test parts within the margin {margin:.4f}")

    if promoted and not promote_inherited:
        promoted, reason = False, (f"not put in use: {reason}, but its decisions are the parent's (inherited); "
                                   "`formread learn` refits them, or retrain with --promote-inherited")
    elif promoted:
        reason += "; put in use with the parent's decisions (inherited, as asked)"
    if promoted and out_path.resolve().parent != store_dir().resolve():
        promoted, reason = False, f"written outside the model store ({store_dir()}); not put in use"
    metrics = {p: {k: ev[k] for k in ("n", "accuracy", "ece_raw", "ece", "nll_raw", "nll")}
               for p, ev in figures.items()}
    metrics["validation"] = {"n": int(len(result.val_indices)), "accuracy": result.val_accuracy,
                             "ece_raw": result.ece_val_raw, "ece": result.ece_val_calibrated}
    metrics["local:held_out"] = {"n": int(len(hold_idx)), "accuracy": local_after, "before": local_before}
    training = dict(header.get("training") or {})
    training["retrained"] = {
        "parent": model_path.name, "parent_sha256": header.get("sha256"),
        "samples": str(samples_dir), "n_local_train": int(len(tune_idx)),
        "n_local_held_out": int(len(hold_idx)), "n_original": n_orig,
        "local_split": f"stratified {held_out:g} of each digit held out (seed {seed})",
        "config": cfg.as_dict(), "promoted": promoted, "reason": reason,
    }
    # the decoder constants were fitted for the parent network: the new version inherits them
    # (``formread learn`` refits them on held-out pages; shown as inherited wherever the model is shown)
    parent.save_successor(out_path, new, {"input": header.get("input"), "labels": header.get("labels"),
                                          "training": training, "seed": seed, "metrics": metrics,
                                          "temperature": result.temperature})
    if promoted:
        promote(out_path)
    return RetrainReport(
        model_before=str(model_path), model_after=str(out_path), n_local_train=int(len(tune_idx)),
        n_local_held_out=int(len(hold_idx)), n_original=n_orig, local_before=local_before,
        local_after=local_after, original_before=original_before, original_after=original_after,
        temperature=float(result.temperature), promoted=promoted, reason=reason,
        seconds=time.monotonic() - t0)
