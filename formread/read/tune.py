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

Selecting with ``criterion="calibrated"`` holds a smoothed error to the target: the errors
observed among the accepted fields plus :data:`PRIOR_FIELDS` pseudo-fields at the error a
logistic model predicts for them (:func:`fit_error_model`, two numbers fitted on all the
fields, starting from the confidence taken at its word).  On a few hundred fields the observed
error is often 0 at thresholds far too low (no error happened to fall there: the lowest such
threshold is a lucky one); the model, fitted on every field, does not vanish with small counts,
while on thousands of fields the observation decides.  This is how a model bundle's fitted
decisions turn a target into a threshold (formread.read.bundle).

Only fields whose rules hold take part: fields failing a rule, or with doubtful
segmentation, go to review whatever the threshold.  They still count in the
review rate (the denominator is every field).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import beta

from formread.errors import check_param

__all__ = ["TuneResult", "choose_threshold", "clopper_pearson_upper", "error_review_curve", "fit_error_model",
           "CRITERIA"]

CRITERIA = ("estimate", "bound", "calibrated")


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


_E_FLOOR = 1e-6
PRIOR_FIELDS = 200
"""Weight, in accepted fields, of the fitted error model against the errors observed (criterion "calibrated")."""


def _sigmoid(z: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * np.asarray(z, np.float64)))     # no overflow for large |z|


def fit_error_model(confidences, wrong, *, prior: float = 1.0) -> tuple[float, float]:
    """Logistic model of a field being wrong given its confidence: P(wrong) = sigmoid(a + b log10(1 - c)).

    Fitted by maximum a posteriori (Newton's method) with a Gaussian prior of precision ``prior`` on
    (a, b) centred on (0, ln 10), which is P(wrong) close to 1 - c (the confidence taken at its
    word), so that a handful of fields, or fields all right, move it only as far as they say.

    Parameters
    ----------
    confidences : array-like of shape (N,), float in [0, 1]
    wrong : array-like of shape (N,), bool

    Returns
    -------
    (a, b) : float
    """
    x = np.log10(np.maximum(1.0 - np.asarray(confidences, np.float64), _E_FLOOR))
    y = np.asarray(wrong, np.float64)
    mu = np.array([0.0, np.log(10.0)])
    w = mu.copy()
    X = np.column_stack([np.ones_like(x), x])

    def objective(v: np.ndarray) -> float:     # the negative log posterior (convex)
        z = X @ v
        return float(np.sum(np.logaddexp(0.0, z) - y * z) + 0.5 * prior * np.sum((v - mu) ** 2))

    f = objective(w)
    for _ in range(100):
        p = _sigmoid(X @ w)
        g = X.T @ (p - y) + prior * (w - mu)
        h = (X * (p * (1 - p))[:, None]).T @ X + prior * np.eye(2)
        step = np.linalg.solve(h, g)
        # Newton's step, halved until the objective falls: a full step overshoots when the
        # confidences are far from calibrated (measured: it diverged to (-321, 401))
        t = 1.0
        while t > 1e-10:
            f_new = objective(w - t * step)
            if f_new <= f:
                break
            t *= 0.5
        w, f = w - t * step, min(f, f_new)
        if np.abs(t * step).max() < 1e-9:
            break
    return float(w[0]), float(w[1])


def _predicted_error(conf: np.ndarray, wrong: np.ndarray, thresholds: np.ndarray) -> np.ndarray:
    """Mean predicted P(wrong) (:func:`fit_error_model` on these fields) over the fields with
    confidence >= each threshold (0 when none)."""
    a, b = fit_error_model(conf, wrong)
    cs = np.sort(conf)[::-1]
    pw = _sigmoid(a + b * np.log10(np.maximum(1.0 - cs, _E_FLOOR)))
    tail = np.concatenate([[0.0], np.cumsum(pw)])
    k = np.searchsorted(-cs, -thresholds, side="right")
    return np.where(k > 0, tail[k] / np.maximum(k, 1), 0.0)


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
    criterion : {"estimate", "bound", "calibrated"}
        Hold the observed error ("estimate"), its upper bound ("bound"), or the observed error
        smoothed by the error :func:`fit_error_model` predicts ("calibrated") to the target.

    Returns
    -------
    TuneResult
        When no threshold meets the target, the threshold that accepts nothing
        (just above the highest confidence) with ``met=False``.
    """
    check_param(0.0 <= target < 1.0, "target", "in [0, 1)", target)
    check_param(criterion in CRITERIA, "criterion", "one of " + ", ".join(CRITERIA), criterion)
    c, ok, r = _inputs(confidences, correct, rules_ok)
    check_param(c.size > 0, "confidences", "at least one field", c.size)
    curve = error_review_curve(c, ok, r, confidence_level=confidence_level)
    n = c.size
    accepted = np.rint((1.0 - curve[:, 1]) * n).astype(int)
    if criterion == "calibrated":
        # the observed error shrunk towards the model's by PRIOR_FIELDS pseudo-fields: the model decides
        # when few fields are accepted, the observation when many are
        acc_e = np.rint((1.0 - curve[:, 1]) * n)
        wrong = curve[:, 2] * acc_e
        held = (wrong + PRIOR_FIELDS * _predicted_error(c[r], ~ok[r], curve[:, 0])) / (acc_e + PRIOR_FIELDS)
    else:
        held = curve[:, 2 if criterion == "estimate" else 3]
    good = np.flatnonzero((held <= target) & (accepted > 0))
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
