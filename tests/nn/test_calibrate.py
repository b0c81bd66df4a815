"""Temperature scaling (Guo et al. 2017): NLL minimum, argmax unchanged, ECE on the shipped model."""

from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from formread.nn.calibrate import T_MAX, T_MIN, fit_temperature, scaled_nll, softmax
from formread.nn.metrics import expected_calibration_error

MODEL = Path(__file__).resolve().parents[2] / "models" / "default.npz"


def _overconfident(seed=0, n=5000, t_true=2.5):
    """Logits z with labels drawn from softmax(z / t_true): z itself is overconfident."""
    rng = np.random.default_rng(seed)
    z = rng.normal(scale=5.0, size=(n, 10))
    p = softmax(z, t_true)
    y = (p.cumsum(1) > rng.random((n, 1))).argmax(1)
    return z, y


def test_fit_recovers_overconfidence():
    logits, y = _overconfident()
    t = fit_temperature(logits, y)
    assert t > 1.0  # overconfident logits are softened
    # the fitted value is the NLL minimum (reference: scipy's bounded scalar search, plain T)
    ref = minimize_scalar(lambda s: scaled_nll(logits, y, s), bounds=(T_MIN, T_MAX), method="bounded").x
    assert t == pytest.approx(ref, rel=1e-3)
    assert scaled_nll(logits, y, t) < scaled_nll(logits, y, 1.0)
    assert expected_calibration_error(softmax(logits, t), y) < expected_calibration_error(softmax(logits), y)


def test_fit_recovers_a_known_temperature():
    # labels drawn from softmax(z / 2.5): the NLL minimum sits near T = 2.5
    z, y = _overconfident(3, 20000)
    assert fit_temperature(z, y) == pytest.approx(2.5, rel=0.05)


def test_temperature_never_changes_the_argmax():
    logits, _ = _overconfident(1)
    for t in (0.1, 0.5, 2.0, 10.0):
        np.testing.assert_array_equal(softmax(logits, t).argmax(1), logits.argmax(1))


def test_empty_input_gives_one():
    assert fit_temperature(np.zeros((0, 10)), np.zeros(0, np.int64)) == 1.0


def test_shipped_model_ece_drops_on_held_out_mnist():
    """Temperature fitted on the training run's validation split lowers ECE on mnist:test
    (held out, never trained on) and leaves every prediction unchanged."""
    from formread.learn.datasets import load_dataset
    from formread.nn.modelfile import load_model
    from formread.nn.train import predict_logits

    model, header = load_model(MODEL)
    t = header["temperature"]
    assert t != 1.0
    test = load_dataset("mnist", "test")
    logits = predict_logits(model, test.x)
    raw, cal = softmax(logits), softmax(logits, t)
    np.testing.assert_array_equal(raw.argmax(1), cal.argmax(1))
    ece_raw = expected_calibration_error(raw, test.y)
    ece_cal = expected_calibration_error(cal, test.y)
    assert ece_cal < ece_raw
    assert header["metrics"]["mnist:test"]["ece_raw"] == pytest.approx(ece_raw, abs=1e-4)
    assert header["metrics"]["mnist:test"]["ece"] == pytest.approx(ece_cal, abs=1e-4)
