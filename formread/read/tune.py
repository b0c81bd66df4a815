"""Choosing the acceptance threshold from fields with known answers.

Raising the threshold sends more fields to review and lowers the error among the
fields accepted: Chow's error-reject trade-off (C. K. Chow, "On optimum recognition
error and reject tradeoff", IEEE Trans. Information Theory, 1970).  We pick the
lowest threshold (fewest fields to review) whose error among accepted fields is at
or below a target, and report beside it the one-sided Clopper-Pearson upper
confidence bound on that error, so the user sees how much the estimate can be
trusted with the number of fields at hand.  Selecting by the bound instead of the
estimate (``criterion="bound"``) follows the spirit of Geifman and El-Yaniv,
"Selective classification for deep neural networks" (NeurIPS 2017), whose
selection-with-guaranteed-risk method picks a threshold whose risk bound holds
with a chosen confidence (their bound is a union-bounded binomial tail; ours is
the plain Clopper-Pearson bound at the chosen threshold, without their
correction for having searched several thresholds).

Only fields whose rules hold take part: fields failing a rule, or with doubtful
segmentation, go to review whatever the threshold.  They still count in the
review rate (the denominator is every field).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import beta

from formread.errors import check_param

__all__ = ["TuneResult", "choose_threshold", "clopper_pearson_upper", "error_review_curve"]


def clopper_pearson_upper(errors: int, n: int, confidence_level: float = 0.95) -> float:
    """One-sided Clopper-Pearson upper bound on an error rate.

    The bound ``u`` such that observing ``errors`` or fewer in ``n`` trials has
    probability ``1 - confidence_level`` when the true rate is ``u``:
    ``beta.ppf(confidence_level, errors + 1, n - errors)``; 1.0 when ``errors == n``
    (including ``n == 0``: nothing observed, nothing known).
    """
    check_param(0 <= errors <= n, "errors", f"an integer in [0, n={n}]", errors)
    check_param(0.0 < confidence_level < 1.0, "confidence_level", "in (0, 1)", confidence_level)
    if errors >= n:
        return 1.0
    return float(beta.ppf(confidence_level, errors + 1, n - errors))


@dataclass
class TuneResult:
    """The chosen threshold and what it gives on the tuning fields.

    Attributes
    ----------
    threshold : float
        Accept a field when its confidence >= threshold (and its rules hold).
    review_rate : float
        Share of all fields sent to review (rule failures included).
    error_among_accepted : float
        Wrong accepted / accepted (0.0 when nothing is accepted).
    upper_bound : float
        One-sided Clopper-Pearson upper bound on that error at ``confidence_level``.
    accepted, wrong_accepted, fields : int
    target, confidence_level : float
    met : bool
        False when no threshold reaches the target except accepting nothing.
    curve : ndarray of shape (M, 4), float64
        Columns threshold, review_rate, error_among_accepted, upper_bound, one row
        per distinct candidate threshold, in increasing threshold order.
    """

    threshold: float
    review_rate: float
    error_among_accepted: float
    upper_bound: float
    accepted: int
    wrong_accepted: int
    fields: int
    target: float
    confidence_level: float
    met: bool
    curve: np.ndarray

    def summary(self) -> dict:
        """JSON-ready figures (the curve left out)."""
        return {k: getattr(self, k) for k in ("threshold", "review_rate", "error_among_accepted", "upper_bound",
                                               "accepted", "wrong_accepted", "fields", "target",
                                               "confidence_level", "met")}


def _inputs(confidences, correct, rules_ok):
    c = np.asarray(confidences, dtype=np.float64).reshape(-1)
    ok = np.asarray(correct, dtype=bool).reshape(-1)
    r = np.ones_like(ok) if rules_ok is None else np.asarray(rules_ok, dtype=bool).reshape(-1)
    check_param(ok.shape == c.shape and r.shape == c.shape, "correct/rules_ok",
                f"arrays of the same length as confidences ({c.size})", (ok.size, r.size))
    check_param(bool(np.isfinite(c).all()) and bool(((c >= 0) & (c <= 1)).all()), "confidences",
                "numbers in [0, 1]", "values outside [0, 1]")
    return c, ok, r


def error_review_curve(confidences, correct, rules_ok=None, *, confidence_level: float = 0.95) -> np.ndarray:
    """Error among accepted fields against review rate, for every distinct threshold.

    Parameters
    ----------
    confidences : array-like of shape (N,), float in [0, 1]
    correct : array-like of shape (N,), bool
        Whether the field's reading equals the true value.
    rules_ok : array-like of shape (N,), bool, or None
        Whether the field may be accepted at all (rules hold, segmentation sure);
        None = all may.

    Returns
    -------
    ndarray of shape (M, 4), float64
        Rows (threshold, review_rate, error_among_accepted, upper_bound), thresholds
        increasing: each distinct confidence of an eligible field, then one
        threshold above them all (accept nothing).
    """
    c, ok, r = _inputs(confidences, correct, rules_ok)
    n = c.size
    ce, we = c[r], ~ok[r]
    thresholds = np.unique(ce)
    top = float(np.nextafter(thresholds[-1] if thresholds.size else 1.0, np.inf))
    thresholds = np.append(thresholds, top)
    order = np.argsort(-ce, kind="stable")
    cs, ws = ce[order], we[order]
    rows = []
    for t in thresholds:
        acc = int(np.searchsorted(-cs, -t, side="right"))     # fields with confidence >= t
        wrong = int(ws[:acc].sum())
        err = wrong / acc if acc else 0.0
        rows.append((float(t), 1.0 - acc / n if n else 0.0, err,
                     clopper_pearson_upper(wrong, acc, confidence_level)))
    return np.array(rows, dtype=np.float64).reshape(-1, 4)


def choose_threshold(confidences, correct, rules_ok=None, *, target: float = 0.005,
                     confidence_level: float = 0.95, criterion: str = "estimate") -> TuneResult:
    """Pick the threshold that sends the fewest fields to review within the error target.

    Parameters
    ----------
    confidences : array-like of shape (N,), float in [0, 1]
        Field confidences from decoding.
    correct : array-like of shape (N,), bool
        Reading equals the true value.
    rules_ok : array-like of shape (N,), bool, or None
        Fields that may be accepted at all (rules hold); the others go to review
        anyway and only count in the review rate.
    target : float in [0, 1)
        Highest acceptable error among accepted fields (default 0.5%).
    confidence_level : float in (0, 1)
        For the one-sided Clopper-Pearson upper bound reported beside the error.
    criterion : {"estimate", "bound"}
        Hold the observed error ("estimate") or its upper bound ("bound") to the target.

    Returns
    -------
    TuneResult
        When no threshold meets the target, the threshold that accepts nothing
        (just above the highest confidence) with ``met=False``.
    """
    check_param(0.0 <= target < 1.0, "target", "in [0, 1)", target)
    check_param(criterion in ("estimate", "bound"), "criterion", "'estimate' or 'bound'", criterion)
    c, ok, r = _inputs(confidences, correct, rules_ok)
    check_param(c.size > 0, "confidences", "at least one field", c.size)
    curve = error_review_curve(c, ok, r, confidence_level=confidence_level)
    col = 2 if criterion == "estimate" else 3
    n = c.size
    accepted = np.rint((1.0 - curve[:, 1]) * n).astype(int)
    good = np.flatnonzero((curve[:, col] <= target) & (accepted > 0))
    if good.size:
        i = int(good[np.argmin(curve[good, 1])])    # fewest to review; ties -> lowest threshold
        met = True
    else:
        i, met = len(curve) - 1, False
    t, rr, err, ub = curve[i]
    acc = int(accepted[i])
    return TuneResult(threshold=float(t), review_rate=float(rr), error_among_accepted=float(err),
                      upper_bound=float(ub), accepted=acc, wrong_accepted=int(round(err * acc)), fields=n,
                      target=float(target), confidence_level=float(confidence_level), met=met, curve=curve)
