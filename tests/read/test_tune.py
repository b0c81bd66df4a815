"""Threshold tuning and the Clopper-Pearson bound."""

import numpy as np
import pytest
from scipy.stats import binomtest

from formread.errors import ParameterError
from formread.read.tune import choose_threshold, clopper_pearson_upper, error_review_curve, fit_error_model


@pytest.mark.parametrize("k,n", [(0, 10), (1, 10), (3, 50), (5, 1000), (17, 200), (9, 10)])
def test_clopper_pearson_matches_scipy_exact_interval(k, n):
    # reference: scipy.stats.binomtest(...).proportion_ci(method='exact') is the Clopper-Pearson
    # interval; the upper end of the two-sided 90% interval is the one-sided 95% upper bound
    ref = binomtest(k, n).proportion_ci(confidence_level=0.90, method="exact").high
    assert clopper_pearson_upper(k, n, 0.95) == pytest.approx(ref, rel=1e-9)


def test_rule_of_three():
    # "rule of three" (common practice): 0 errors in n trials -> upper 95% bound about 3/n
    for n in (300, 1000, 10000):
        assert clopper_pearson_upper(0, n) == pytest.approx(3.0 / n, rel=0.01)


def test_clopper_pearson_edges():
    assert clopper_pearson_upper(0, 0) == 1.0
    assert clopper_pearson_upper(4, 4) == 1.0
    with pytest.raises(ParameterError):
        clopper_pearson_upper(5, 4)


def test_threshold_choice_on_hand_made_data():
    # 10 fields: the two wrong ones have confidences 0.6 and 0.8; one field fails its rules
    conf = [0.99, 0.98, 0.97, 0.95, 0.9, 0.85, 0.8, 0.7, 0.6, 0.99]
    correct = [1, 1, 1, 1, 1, 1, 0, 1, 0, 0]
    rules_ok = [1, 1, 1, 1, 1, 1, 1, 1, 1, 0]
    res = choose_threshold(conf, correct, rules_ok, target=0.0)
    # the lowest threshold with no wrong field accepted is 0.85: six accepted, four to review
    assert res.threshold == 0.85 and res.accepted == 6 and res.wrong_accepted == 0
    assert res.review_rate == pytest.approx(0.4) and res.error_among_accepted == 0.0 and res.met
    assert res.upper_bound == pytest.approx(1 - 0.05 ** (1 / 6))
    # allowing 1 error in 8 accepted (12.5%) lowers the threshold to 0.7
    res = choose_threshold(conf, correct, rules_ok, target=0.125)
    assert res.threshold == 0.7 and res.accepted == 8 and res.wrong_accepted == 1
    assert res.upper_bound == pytest.approx(clopper_pearson_upper(1, 8))
    # at 20% everything eligible is accepted (2 wrong of 9 = 22% > 20%, so not quite)
    assert choose_threshold(conf, correct, rules_ok, target=0.2).threshold == 0.7
    assert choose_threshold(conf, correct, rules_ok, target=0.25).threshold == 0.6


def test_bound_criterion_is_stricter():
    rng = np.random.default_rng(1)
    conf = rng.uniform(0.5, 1.0, 2000)
    correct = rng.uniform(size=2000) < conf ** 0.02      # errors concentrate at low confidence
    est = choose_threshold(conf, correct, target=0.01)
    bnd = choose_threshold(conf, correct, target=0.01, criterion="bound")
    assert est.met and bnd.met
    assert bnd.threshold >= est.threshold and bnd.upper_bound <= 0.01
    assert est.error_among_accepted <= 0.01


def test_unreachable_target_accepts_nothing():
    res = choose_threshold([0.9, 0.8], [0, 0], target=0.005)
    assert not res.met and res.accepted == 0 and res.review_rate == 1.0 and res.threshold > 0.9


def test_curve_shape_and_monotone_review_rate():
    conf = [0.2, 0.5, 0.5, 0.9]
    curve = error_review_curve(conf, [1, 0, 1, 1])
    assert curve.shape == (4, 4)
    assert curve[:, 0].tolist()[:3] == [0.2, 0.5, 0.9]
    assert curve[:, 1].tolist() == [0.0, 0.25, 0.75, 1.0]
    assert curve[:, 2].tolist()[:3] == pytest.approx([0.25, 1 / 3, 0.0])


def test_bad_inputs():
    with pytest.raises(ParameterError):
        choose_threshold([0.5, 1.2], [1, 1])
    with pytest.raises(ParameterError):
        choose_threshold([0.5], [1, 1])
    with pytest.raises(ParameterError):
        choose_threshold([], [])
    with pytest.raises(ParameterError):
        choose_threshold([0.5], [1], criterion="median")


def test_the_error_model_fits_confidences_far_from_calibrated():
    # Invented confidences that overstate: P(right) = c**8 (c = 0.98 is right only 85% of the time).
    # An undamped Newton fit diverged on these (a, b = -321, 401); the fitted model must follow the
    # observed error where the fields are.
    rng = np.random.default_rng(0)
    conf = rng.uniform(0.3, 1.0, 4000)
    wrong = rng.uniform(size=4000) >= conf ** 8
    a, b = fit_error_model(conf, wrong)
    assert np.isfinite([a, b]).all() and abs(a) < 20 and abs(b) < 20
    band = (conf > 0.95) & (conf < 0.99)
    predicted = 1 / (1 + np.exp(-(a + b * np.log10(1 - conf[band]))))
    assert 0.5 < predicted.mean() / wrong[band].mean() < 2   # two numbers for a curve: near, not exact
