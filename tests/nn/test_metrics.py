"""Metrics against scikit-learn (reference library) and the ECE worked examples of Guo et al. 2017."""

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix as sk_confusion
from sklearn.metrics import precision_score, recall_score

from formread.errors import ParameterError
from formread.nn.metrics import (
    accuracy,
    classification_report,
    confusion_matrix,
    expected_calibration_error,
    precision_recall,
)


def _preds(seed=0, n=500):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 10, n)
    p = np.where(rng.random(n) < 0.7, y, rng.integers(0, 10, n))
    p[p == 7] = 3  # class 7 is never predicted: precision 0 by zero_division=0
    return y, p


def test_confusion_matches_scikit_learn():
    # reference: sklearn.metrics.confusion_matrix
    y, p = _preds()
    np.testing.assert_array_equal(confusion_matrix(y, p, 10), sk_confusion(y, p, labels=range(10)))


def test_precision_recall_match_scikit_learn():
    # reference: sklearn.metrics.precision_score / recall_score, average=None, zero_division=0
    y, p = _preds(1)
    prec, rec = precision_recall(confusion_matrix(y, p, 10))
    np.testing.assert_allclose(prec, precision_score(y, p, labels=range(10), average=None, zero_division=0))
    np.testing.assert_allclose(rec, recall_score(y, p, labels=range(10), average=None, zero_division=0))
    assert prec[7] == 0.0


def test_accuracy():
    assert accuracy(np.array([1, 2, 3, 4]), np.array([1, 2, 0, 4])) == 0.75


def _constant_conf(n_correct, conf=0.8, n=100):
    probs = np.full((n, 10), (1 - conf) / 9)
    probs[:, 0] = conf
    y = np.ones(n, np.int64)
    y[:n_correct] = 0
    return probs, y


def test_ece_worked_examples():
    # Guo et al. 2017 ECE; worked check values from the project primer:
    # 100 predictions at confidence 0.8, 80 correct -> 0; 60 correct -> 0.2
    assert expected_calibration_error(*_constant_conf(80)) == pytest.approx(0.0, abs=1e-12)
    assert expected_calibration_error(*_constant_conf(60)) == pytest.approx(0.2, abs=1e-12)


def test_ece_weights_bins_by_share():
    # two bins: 50 at 0.8 with 40 correct (gap 0), 50 at 0.95 with 40 correct (gap 0.15) -> 0.075
    a, ya = _constant_conf(40, 0.8, 50)
    b, yb = _constant_conf(40, 0.95, 50)
    assert expected_calibration_error(np.vstack([a, b]), np.concatenate([ya, yb])) == pytest.approx(0.075)


def test_ece_bin_edges_are_right_closed():
    # confidence exactly 0.8 = 12/15 belongs to bin (11/15, 12/15]; both groups share it -> gap of the pooled bin
    a, ya = _constant_conf(50, 0.8, 50)        # all correct
    b, yb = _constant_conf(0, 0.8 - 1e-9, 50)  # all wrong, same bin
    ece = expected_calibration_error(np.vstack([a, b]), np.concatenate([ya, yb]))
    assert ece == pytest.approx(abs(0.5 - 0.8), abs=1e-6)


def test_report_and_bad_input():
    y, p = _preds(2, 50)
    probs = np.eye(10)[p]
    rep = classification_report(probs, y)
    assert rep["n"] == 50 and rep["accuracy"] == accuracy(y, p)
    assert np.array(rep["confusion"]).sum() == 50
    with pytest.raises(ParameterError):
        confusion_matrix(y, p[:-1])
    with pytest.raises(ParameterError):
        expected_calibration_error(probs[:-1], y)
