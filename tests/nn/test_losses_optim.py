"""Loss values, optimizer steps worked by hand, schedules, and a tiny end-to-end fit."""

import math

import numpy as np
import pytest

from formread.errors import ParameterError
from formread.nn.layers import Param
from formread.nn.losses import log_softmax, softmax, softmax_cross_entropy
from formread.nn.model import build_model
from formread.nn.optim import SGD, Adam, cosine_schedule, step_schedule


def test_softmax_known_values_and_stability():
    # softmax([0, ln 3]) = [1/4, 3/4], worked by hand
    np.testing.assert_allclose(softmax(np.array([0.0, math.log(3)])), [0.25, 0.75])
    big = np.array([[1000.0, 1000.0], [-1000.0, 0.0]], dtype=np.float32)
    p = softmax(big, axis=1)
    assert p.dtype == np.float32 and np.isfinite(p).all()
    np.testing.assert_allclose(p, [[0.5, 0.5], [0.0, 1.0]])
    assert np.isfinite(log_softmax(big)).all()


def test_cross_entropy_hand_values():
    # uniform logits over C classes: loss = ln C (with or without smoothing)
    z = np.zeros((4, 10), dtype=np.float32)
    y = np.array([0, 3, 9, 2])
    loss, d = softmax_cross_entropy(z, y)
    assert loss == pytest.approx(math.log(10), rel=1e-6)
    assert d.dtype == np.float32 and d.shape == (4, 10)
    assert softmax_cross_entropy(z, y, smoothing=0.2)[0] == pytest.approx(math.log(10), rel=1e-6)
    # logits [ln 3, 0] with label 0: p = 3/4, loss = -ln(3/4)
    z2 = np.array([[math.log(3), 0.0]])
    assert softmax_cross_entropy(z2, np.array([0]))[0] == pytest.approx(-math.log(0.75))
    # smoothing 0.2 over 2 classes: target [0.9, 0.1]: loss = -(0.9 ln 0.75 + 0.1 ln 0.25)
    expect = -(0.9 * math.log(0.75) + 0.1 * math.log(0.25))
    assert softmax_cross_entropy(z2, np.array([0]), smoothing=0.2)[0] == pytest.approx(expect)
    # extreme logits stay finite
    loss, d = softmax_cross_entropy(np.array([[1e4, -1e4]], dtype=np.float32), np.array([1]))
    assert loss == pytest.approx(2e4, rel=1e-6) and np.isfinite(d).all()


def test_cross_entropy_of_no_class_is_against_the_uniform_target():
    # label -1 (no digit, outlier exposure): target 1/C on every class, smoothing or not.  Logits
    # [ln 3, 0]: p = [3/4, 1/4], loss = -(ln 3/4 + ln 1/4) / 2, gradient p - 1/2 (worked by hand)
    z = np.array([[math.log(3), 0.0]])
    for s in (0.0, 0.2):
        loss, d = softmax_cross_entropy(z, np.array([-1]), smoothing=s)
        assert loss == pytest.approx(-(math.log(0.75) + math.log(0.25)) / 2)
        np.testing.assert_allclose(d, [[0.25, -0.25]])
    # mixed with digit rows, each row counts as it would alone (mean over the batch)
    both = softmax_cross_entropy(np.vstack([z, z]), np.array([0, -1]))[0]
    assert both == pytest.approx((-math.log(0.75) - (math.log(0.75) + math.log(0.25)) / 2) / 2)


def test_cross_entropy_bad_labels():
    with pytest.raises(ParameterError):
        softmax_cross_entropy(np.zeros((2, 3)), np.array([0, 3]))
    with pytest.raises(ParameterError):
        softmax_cross_entropy(np.zeros((2, 3)), np.array([0, -2]))
    with pytest.raises(ParameterError):
        softmax_cross_entropy(np.zeros((2, 3)), np.array([0.0, 1.0]))


def _param(value, grad):
    p = Param(np.array(value, dtype=np.float64), "w")
    p.grad = np.array(grad, dtype=np.float64)
    return p


def test_sgd_plain_and_weight_decay_single_step():
    p = _param([[1.0, -2.0]], [[0.5, 0.5]])
    SGD([p], lr=0.1).step()
    np.testing.assert_allclose(p.value, [[0.95, -2.05]])
    # weight decay 0.1 adds 0.1 * w to the gradient of a weight (2-D): g = [0.6, 0.3]
    p = _param([[1.0, -2.0]], [[0.5, 0.5]])
    SGD([p], lr=0.1, weight_decay=0.1).step()
    np.testing.assert_allclose(p.value, [[0.94, -2.03]])
    # biases (1-D) are not decayed
    b = _param([1.0], [0.5])
    SGD([b], lr=0.1, weight_decay=0.1).step()
    np.testing.assert_allclose(b.value, [0.95])


def test_sgd_momentum_and_nesterov_two_steps():
    # gradient held at g = 1; momentum 0.9, lr 0.1
    p = _param([0.0], [1.0])
    opt = SGD([p], lr=0.1, momentum=0.9)
    opt.step()  # v = 1, w = -0.1
    opt.step()  # v = 1.9, w = -0.1 - 0.19 = -0.29
    np.testing.assert_allclose(p.value, [-0.29])
    p = _param([0.0], [1.0])
    opt = SGD([p], lr=0.1, momentum=0.9, nesterov=True)
    opt.step()  # v = 1, update g + 0.9 v = 1.9, w = -0.19
    opt.step()  # v = 1.9, update 1 + 1.71 = 2.71, w = -0.19 - 0.271 = -0.461
    np.testing.assert_allclose(p.value, [-0.461])


def test_adam_single_steps_by_hand():
    # first step of Adam moves each weight by lr * sign(g) (bias correction), up to eps
    p = _param([[1.0, 2.0]], [[0.3, -4.0]])
    Adam([p], lr=0.01, eps=1e-12).step()
    np.testing.assert_allclose(p.value, [[0.99, 2.01]], rtol=1e-9)
    # second step with g = 1 then g = 3 (b1 0.9, b2 0.999): worked out from the formulas
    p = _param([0.0], [1.0])
    opt = Adam([p], lr=0.1, eps=0.0)
    opt.step()
    p.grad = np.array([3.0])
    opt.step()
    m = 0.9 * 0.1 * 1 + 0.1 * 3           # 0.39
    v = 0.999 * 0.001 * 1 + 0.001 * 9     # 0.009999
    mhat, vhat = m / (1 - 0.81), v / (1 - 0.999 ** 2)
    np.testing.assert_allclose(p.value, [-0.1 - 0.1 * mhat / math.sqrt(vhat)], rtol=1e-12)
    # decoupled weight decay: w *= 1 - lr * wd before the Adam step
    p = _param([[2.0]], [[0.0]])
    Adam([p], lr=0.1, weight_decay=0.5, eps=1e-8).step()
    np.testing.assert_allclose(p.value, [[2.0 * (1 - 0.05)]])


@pytest.mark.parametrize("make", [
    lambda ps: SGD(ps, lr=0.1),
    lambda ps: SGD(ps, lr=0.05, momentum=0.9),
    lambda ps: SGD(ps, lr=0.05, momentum=0.9, nesterov=True),
    lambda ps: Adam(ps, lr=0.1),
])
def test_optimizers_minimise_a_quadratic(make):
    # f(w) = 0.5 * sum(a * (w - c)^2), minimum at c
    a = np.array([1.0, 3.0, 0.5])
    c = np.array([1.0, -2.0, 0.5])
    p = Param(np.zeros(3), "w")
    opt = make([p])
    for _ in range(300):
        opt.zero_grad()
        p.grad += a * (p.value - c)
        opt.step()
    np.testing.assert_allclose(p.value, c, atol=1e-3)


def test_lr_is_settable_and_float32_stays():
    p = Param(np.ones((2, 2), dtype=np.float32), "w")
    p.grad = np.ones((2, 2), dtype=np.float32)
    for opt in (SGD([p], lr=0.1, momentum=0.9, nesterov=True, weight_decay=1e-4),
                Adam([p], lr=0.1, weight_decay=1e-4)):
        opt.lr = 0.0
        before = p.value.copy()
        opt.step()
        if isinstance(opt, SGD):
            np.testing.assert_array_equal(p.value, before)
        opt.lr = 0.1
        opt.step()
        assert p.value.dtype == np.float32


def test_schedules():
    s = step_schedule(0.1, step_size=3, gamma=0.5)
    assert [s(e) for e in range(7)] == pytest.approx([0.1, 0.1, 0.1, 0.05, 0.05, 0.05, 0.025])
    c = cosine_schedule(1.0, total_epochs=5, min_lr=0.0)
    assert [c(e) for e in range(5)] == pytest.approx([1.0, 0.8535534, 0.5, 0.1464466, 0.0])
    w = cosine_schedule(0.2, total_epochs=6, min_lr=0.02, warmup=2)
    assert w(0) == pytest.approx(0.1) and w(1) == pytest.approx(0.2)
    assert w(5) == pytest.approx(0.02)
    assert w(2) > w(3) > w(4) > w(5)


def test_tiny_training_run_learns():
    """A small CNN fits 64 random images to random labels (memorisation), float32 throughout."""
    rng = np.random.default_rng(0)
    spec = [{"type": "conv2d", "in": 1, "out": 4, "kernel": 3, "padding": 1}, {"type": "relu"},
            {"type": "maxpool", "size": 2}, {"type": "flatten"},
            {"type": "dense", "in": 4 * 7 * 7, "out": 10}]
    model = build_model(spec, rng)
    x = rng.random((64, 1, 14, 14), dtype=np.float32)
    y = rng.integers(0, 10, 64)
    opt = Adam(model.parameters(), lr=0.01)
    first = None
    for _ in range(60):
        loss, d = softmax_cross_entropy(model.forward(x, train=True), y)
        first = loss if first is None else first
        model.backward(d)
        opt.step()
    assert loss < 0.2 * first
    assert all(p.value.dtype == np.float32 for p in model.parameters())
    assert (model.predict_proba(x).argmax(1) == y).mean() > 0.9
