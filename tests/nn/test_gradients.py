"""Gradient checks by central differences in float64, for every layer and for the loss.

Finite-difference gradient checking is common practice (as in scikit-learn's MLP tests).
"""

import numpy as np
import pytest

from formread.nn import layers as L
from formread.nn.losses import softmax_cross_entropy
from formread.nn.model import Sequential, build_model

EPS = 1e-6


def numeric_grad(f, a):
    """Central-difference gradient of scalar f() with respect to array a (changed in place)."""
    g = np.zeros_like(a)
    it = np.nditer(a, flags=["multi_index"])
    for _ in it:
        i = it.multi_index
        old = a[i]
        a[i] = old + EPS
        fp = f()
        a[i] = old - EPS
        fm = f()
        a[i] = old
        g[i] = (fp - fm) / (2 * EPS)
    return g


def check_layer(layer, x, train=False, reseed=None, rtol=1e-6, atol=1e-8):
    """Check dx and every parameter gradient of ``layer`` on input x for loss sum(y * r)."""
    rng = np.random.default_rng(7)
    y = layer.forward(x, train=train)
    r = rng.standard_normal(y.shape)

    def f():
        if reseed:
            reseed()
        return float((layer.forward(x, train=train) * r).sum())

    if reseed:
        reseed()
    layer.forward(x, train=train)
    dx = layer.backward(r)
    assert dx.shape == x.shape and dx.dtype == np.float64
    grads = [p.grad.copy() for p in layer.params()]
    np.testing.assert_allclose(dx, numeric_grad(f, x), rtol=rtol, atol=atol)
    for p, g in zip(layer.params(), grads):
        assert g.dtype == np.float64
        np.testing.assert_allclose(g, numeric_grad(f, p.value), rtol=rtol, atol=atol)


@pytest.mark.parametrize("stride,padding,kernel", [(1, 0, 3), (2, 1, 3), (1, 2, 5), (2, 0, 2), (3, 1, 4)])
def test_conv2d_gradients(stride, padding, kernel):
    rng = np.random.default_rng(0)
    layer = L.Conv2D(3, 4, kernel, stride, padding, rng=rng, dtype=np.float64)
    layer.bias.value[:] = rng.standard_normal(4)
    x = rng.standard_normal((2, 3, 7, 8))
    check_layer(layer, x)


@pytest.mark.parametrize("cls", [L.MaxPool2D, L.AvgPool2D])
@pytest.mark.parametrize("size,stride", [(2, None), (3, 2), (2, 1), (3, None)])
def test_pool_gradients(cls, size, stride):
    rng = np.random.default_rng(1)
    # distinct values so max pooling has no ties (the kink would break finite differences)
    x = rng.permutation(2 * 3 * 7 * 6).reshape(2, 3, 7, 6).astype(np.float64) / 100
    check_layer(cls(size, stride), x, atol=1e-7)


def test_dense_gradients():
    rng = np.random.default_rng(2)
    layer = L.Dense(5, 3, rng=rng, dtype=np.float64)
    layer.bias.value[:] = rng.standard_normal(3)
    check_layer(layer, rng.standard_normal((4, 5)))


@pytest.mark.parametrize("cls", [L.ReLU, L.Tanh, L.Sigmoid, L.Flatten])
def test_elementwise_and_flatten_gradients(cls):
    rng = np.random.default_rng(3)
    x = rng.standard_normal((3, 2, 4, 5))
    x[np.abs(x) < 1e-3] = 0.5  # keep away from ReLU's kink
    check_layer(cls(), x)


def test_dropout_gradient_with_fixed_mask():
    layer = L.Dropout(0.4, rng=np.random.default_rng(0))

    def reseed():  # the same mask on every forward pass
        layer.rng = np.random.default_rng(11)

    x = np.random.default_rng(4).standard_normal((5, 7))
    check_layer(layer, x, train=True, reseed=reseed)
    reseed()
    y = layer.forward(x, train=True)
    zeroed = y == 0
    assert 0 < zeroed.mean() < 1
    np.testing.assert_allclose(y[~zeroed], x[~zeroed] / 0.6)


@pytest.mark.parametrize("smoothing", [0.0, 0.1])
def test_loss_gradient(smoothing):
    rng = np.random.default_rng(5)
    z = rng.standard_normal((6, 4)) * 3
    y = rng.integers(0, 4, 6)
    _, d = softmax_cross_entropy(z, y, smoothing)
    num = numeric_grad(lambda: softmax_cross_entropy(z, y, smoothing)[0], z)
    np.testing.assert_allclose(d, num, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("width,size", [(3, 6), (9, 7)])
def test_whole_model_gradient(width, size):
    """conv -> relu -> maxpool runs fused (per pooling tile for 3 channels, as a plain convolution
    then pooling for 9); size 7 leaves a conv row and column that the pooling drops."""
    rng = np.random.default_rng(6)
    spec = [
        {"type": "conv2d", "in": 2, "out": width, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "conv2d", "in": width, "out": 4, "kernel": 2, "stride": 2},
        {"type": "tanh"},
        {"type": "flatten"},
        {"type": "dense", "in": 4, "out": 3},
    ]
    model = build_model(spec, rng, dtype=np.float64)
    assert isinstance(model, Sequential)
    assert model._blocks[0].tiled == (width == 3)
    for p in model.parameters():
        p.value += 0.1 * rng.standard_normal(p.value.shape)  # non-zero biases too
    x = rng.standard_normal((3, 2, size, size))
    y = np.array([0, 2, 1])

    def f():
        return softmax_cross_entropy(model.forward(x), y)[0]

    _, d = softmax_cross_entropy(model.forward(x), y)
    dx = model.backward(d)
    np.testing.assert_allclose(dx, numeric_grad(f, x), rtol=1e-5, atol=1e-8)
    for p in model.parameters():
        g = p.grad.copy()
        np.testing.assert_allclose(g, numeric_grad(f, p.value), rtol=1e-5, atol=1e-8)
