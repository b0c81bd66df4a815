"""Classification figures: accuracy, confusion matrix, per-class precision and recall,
and the expected calibration error (Guo, Pleiss, Sun and Weinberger 2017)."""

from __future__ import annotations

import numpy as np

from ..errors import check_param

__all__ = ["accuracy", "confusion_matrix", "precision_recall", "expected_calibration_error",
           "nll", "classification_report"]


def _labels(y, name: str) -> np.ndarray:
    y = np.asarray(y)
    check_param(y.ndim == 1 and (y.size == 0 or np.issubdtype(y.dtype, np.integer)),
                name, "a 1-D array of integer labels", getattr(y, "shape", y))
    return y.astype(np.int64, copy=False)


def accuracy(y_true, y_pred) -> float:
    """Share of correct predictions.

    Parameters
    ----------
    y_true, y_pred : ndarray of shape (N,), int

    Returns
    -------
    float in [0, 1] (0.0 for N = 0)
    """
    t, p = _labels(y_true, "y_true"), _labels(y_pred, "y_pred")
    check_param(t.shape == p.shape, "y_pred", f"the same length as y_true ({t.size})", p.size)
    return float(np.mean(t == p)) if t.size else 0.0


def confusion_matrix(y_true, y_pred, n_classes: int = 10) -> np.ndarray:
    """Counts of (true class, predicted class).

    Returns
    -------
    ndarray of shape (C, C), int64: row = true class, column = predicted class
    """
    t, p = _labels(y_true, "y_true"), _labels(y_pred, "y_pred")
    check_param(t.shape == p.shape, "y_pred", f"the same length as y_true ({t.size})", p.size)
    check_param(t.size == 0 or (min(t.min(), p.min()) >= 0 and max(t.max(), p.max()) < n_classes),
                "labels", f"in 0..{n_classes - 1}", (int(min(t.min(), p.min())), int(max(t.max(), p.max()))))
    return np.bincount(t * n_classes + p, minlength=n_classes * n_classes).reshape(n_classes, n_classes)


def precision_recall(cm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-class precision and recall from a confusion matrix.

    A class never predicted has precision 0; a class never present has recall 0
    (scikit-learn's ``zero_division=0``).

    Parameters
    ----------
    cm : ndarray of shape (C, C), row = true class, column = predicted class

    Returns
    -------
    precision, recall : ndarrays of shape (C,), float64
    """
    cm = np.asarray(cm, dtype=np.float64)
    tp = np.diag(cm)
    pred, true = cm.sum(axis=0), cm.sum(axis=1)
    precision = np.divide(tp, pred, out=np.zeros_like(tp), where=pred > 0)
    recall = np.divide(tp, true, out=np.zeros_like(tp), where=true > 0)
    return precision, recall


def expected_calibration_error(probs: np.ndarray, y, bins: int = 15) -> float:
    """Expected calibration error over equal-width confidence bins (Guo et al. 2017).

    ECE = sum over bins of (share of samples in the bin) x |accuracy - mean confidence|,
    where confidence is the largest class probability and bins are (k/B, (k+1)/B]
    (15 bins in the paper's reference code).

    Parameters
    ----------
    probs : ndarray of shape (N, C), float, rows summing to 1
    y : ndarray of shape (N,), int true labels
    bins : int

    Returns
    -------
    float in [0, 1] (0.0 for N = 0)
    """
    probs = np.asarray(probs, dtype=np.float64)
    y = _labels(y, "y")
    check_param(probs.ndim == 2 and probs.shape[0] == y.size, "probs",
                f"an array of shape (N={y.size}, C)", probs.shape)
    check_param(isinstance(bins, (int, np.integer)) and bins >= 1, "bins", "an integer >= 1", bins)
    if y.size == 0:
        return 0.0
    conf = probs.max(axis=1)
    correct = probs.argmax(axis=1) == y
    # bin k holds confidences in (k/B, (k+1)/B]; a confidence of exactly 0 goes to bin 0
    k = np.clip(np.ceil(conf * bins).astype(np.int64) - 1, 0, bins - 1)
    acc_sum = np.bincount(k, weights=correct.astype(np.float64), minlength=bins)
    conf_sum = np.bincount(k, weights=conf, minlength=bins)
    return float(np.abs(acc_sum - conf_sum).sum() / y.size)


def nll(probs: np.ndarray, y) -> float:
    """Mean negative log-likelihood of the true labels.

    Parameters
    ----------
    probs : ndarray of shape (N, C); y : ndarray of shape (N,), int
    """
    probs = np.asarray(probs, dtype=np.float64)
    y = _labels(y, "y")
    if y.size == 0:
        return 0.0
    return float(-np.mean(np.log(np.clip(probs[np.arange(y.size), y], 1e-12, 1.0))))


def classification_report(probs: np.ndarray, y, *, bins: int = 15) -> dict:
    """All evaluation figures for predicted probabilities, as plain JSON-ready values.

    Parameters
    ----------
    probs : ndarray of shape (N, C), float; y : ndarray of shape (N,), int

    Returns
    -------
    dict with ``n``, ``accuracy``, ``ece``, ``nll``, ``precision`` and ``recall`` (lists of C
    floats), ``confusion`` (C lists of C ints, row = true class).
    """
    probs = np.asarray(probs)
    y = _labels(y, "y")
    c = probs.shape[1]
    pred = probs.argmax(axis=1)
    cm = confusion_matrix(y, pred, c)
    p, r = precision_recall(cm)
    return {
        "n": int(y.size),
        "accuracy": accuracy(y, pred),
        "ece": expected_calibration_error(probs, y, bins),
        "nll": nll(probs, y),
        "precision": [float(v) for v in p],
        "recall": [float(v) for v in r],
        "confusion": cm.tolist(),
    }
