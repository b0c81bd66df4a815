"""Temperature scaling (Guo, Pleiss, Sun and Weinberger 2017, "On calibration of modern
neural networks"): one scalar T divides the logits, chosen to minimise the negative
log-likelihood on held-back data.  Dividing by T > 0 never changes the argmax, so
accuracy is untouched; only the confidences move.

The temperature is fitted on a training run's VALIDATION split, never on a test part.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import logsumexp

from ..errors import check_param
from .metrics import expected_calibration_error

__all__ = ["fit_temperature", "scaled_nll", "softmax", "expected_calibration_error",
           "T_MIN", "T_MAX"]

T_MIN, T_MAX = 0.05, 20.0
"""Bounds of the fitted temperature."""


def softmax(logits: np.ndarray, temperature: float = 1.0) -> np.ndarray:
    """Class probabilities of temperature-scaled logits.

    Parameters
    ----------
    logits : ndarray of shape (N, C)
    temperature : float > 0

    Returns
    -------
    ndarray of shape (N, C), float64, rows summing to 1
    """
    z = np.asarray(logits, dtype=np.float64) / temperature
    return np.exp(z - logsumexp(z, axis=1, keepdims=True))


def scaled_nll(logits: np.ndarray, y: np.ndarray, temperature: float) -> float:
    """Mean negative log-likelihood of ``y`` under softmax(logits / temperature).

    Parameters
    ----------
    logits : ndarray of shape (N, C); y : ndarray of shape (N,), int
    """
    z = np.asarray(logits, dtype=np.float64) / temperature
    return float(np.mean(logsumexp(z, axis=1) - z[np.arange(len(y)), y]))


def fit_temperature(logits: np.ndarray, y: np.ndarray) -> float:
    """The temperature minimising the NLL of ``y`` (bounded scalar search on log T).

    Parameters
    ----------
    logits : ndarray of shape (N, C), float (the network's raw outputs on validation data)
    y : ndarray of shape (N,), int true labels

    Returns
    -------
    float in [T_MIN, T_MAX]; 1.0 when there is nothing to fit on (N = 0)
    """
    logits = np.asarray(logits, dtype=np.float64)
    y = np.asarray(y)
    check_param(logits.ndim == 2 and y.ndim == 1 and logits.shape[0] == y.shape[0], "logits",
                f"an array of shape (N={y.shape[0] if y.ndim == 1 else '?'}, C)", logits.shape)
    check_param(y.size == 0 or np.issubdtype(y.dtype, np.integer), "y", "integer labels", y.dtype)
    if y.size == 0:
        return 1.0
    y = y.astype(np.int64)
    res = minimize_scalar(lambda s: scaled_nll(logits, y, float(np.exp(s))),
                          bounds=(np.log(T_MIN), np.log(T_MAX)), method="bounded",
                          options={"xatol": 1e-5})
    return float(np.clip(np.exp(res.x), T_MIN, T_MAX))
