"""Layer forward values against reference implementations; dtypes; model building and reproducibility."""

import json

import numpy as np
import pytest
from scipy import signal

from formread.errors import ParameterError
from formread.nn import layers as L
from formread.nn.model import ARCHITECTURES, Sequential, build_model


def conv_reference(x, w, b, stride, padding):
    """Convolution layer output computed with scipy.signal.correlate (reference library)."""
    xp = np.pad(x, ((0, 0), (0, 0), (padding, padding), (padding, padding)))
    n, o = x.shape[0], w.shape[0]
    outs = []
    for i in range(n):
        maps = []
        for j in range(o):
            # 3-D 'valid' correlation over (channel, row, col) sums over the input channels.
            full = signal.correlate(xp[i], w[j], mode="valid")[0]
            maps.append(full[::stride, ::stride] + b[j])
        outs.append(maps)
    return np.array(outs)


@pytest.mark.parametrize("cin,cout,k,stride,padding,h,w", [
    (1, 6, 5, 1, 2, 28, 28), (6, 16, 5, 1, 0, 14, 14), (3, 5, 3, 2, 1, 9, 8), (4, 2, 4, 3, 2, 11, 10),
    (2, 3, 1, 1, 0, 5, 5),
])
def test_conv_forward_matches_scipy(cin, cout, k, stride, padding, h, w):
    rng = np.random.default_rng(0)
    layer = L.Conv2D(cin, cout, k, stride, padding, rng=rng, dtype=np.float64)
    layer.bias.value[:] = rng.standard_normal(cout)
    x = rng.standard_normal((3, cin, h, w))
    y = layer.forward(x)
    ref = conv_reference(x, layer.weight.value, layer.bias.value, stride, padding)
    assert y.shape == ref.shape == (3, cout, (h + 2 * padding - k) // stride + 1,
                                    (w + 2 * padding - k) // stride + 1)
    np.testing.assert_allclose(y, ref, rtol=1e-10, atol=1e-10)


def pool_loop(x, size, stride, op):
    """Slow, obviously correct pooling: one window at a time."""
    n, c, h, w = x.shape
    ho, wo = (h - size) // stride + 1, (w - size) // stride + 1
    out = np.zeros((n, c, ho, wo), dtype=x.dtype)
    for a in range(n):
        for b in range(c):
            for i in range(ho):
                for j in range(wo):
                    win = x[a, b, i * stride:i * stride + size, j * stride:j * stride + size]
                    out[a, b, i, j] = op(win)
    return out


@pytest.mark.parametrize("size,stride", [(2, None), (3, 2), (2, 1), (3, 3), (4, None)])
@pytest.mark.parametrize("cls,op", [(L.MaxPool2D, np.max), (L.AvgPool2D, np.mean)])
def test_pooling_matches_loop(cls, op, size, stride):
    x = np.random.default_rng(1).standard_normal((2, 3, 9, 10))
    y = cls(size, stride).forward(x)
    np.testing.assert_allclose(y, pool_loop(x, size, stride or size, op), rtol=1e-12)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_every_layer_keeps_dtype(dtype):
    rng = np.random.default_rng(2)
    x4 = rng.standard_normal((2, 3, 8, 8)).astype(dtype)
    x2 = rng.standard_normal((2, 6)).astype(dtype)
    cases = [
        (L.Conv2D(3, 4, 3, 1, 1, rng=rng, dtype=dtype), x4),
        (L.MaxPool2D(2), x4), (L.AvgPool2D(2), x4),
        (L.Dense(6, 3, rng=rng, dtype=dtype), x2),
        (L.ReLU(), x4), (L.Tanh(), x4), (L.Sigmoid(), x4), (L.Flatten(), x4),
        (L.Dropout(0.5, rng=rng), x4),
    ]
    for layer, x in cases:
        y = layer.forward(x, train=True)
        assert y.dtype == dtype, layer.kind
        dx = layer.backward(np.ones_like(y))
        assert dx.dtype == dtype and dx.shape == x.shape, layer.kind
        for p in layer.params():
            assert p.value.dtype == dtype and p.grad.dtype == dtype and p.grad.shape == p.value.shape


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_model_dtype(dtype):
    model = build_model("lenet5", np.random.default_rng(0), dtype=dtype)
    x = np.random.default_rng(1).random((4, 1, 28, 28)).astype(dtype)
    z = model.forward(x, train=True)
    assert z.shape == (4, 10) and z.dtype == dtype
    assert model.backward(np.ones_like(z)).dtype == dtype
    p = model.predict_proba(x)
    assert p.dtype == np.float32 and p.shape == (4, 10)


def test_sigmoid_is_stable_for_large_inputs():
    y = L.Sigmoid().forward(np.array([-1000.0, 0.0, 1000.0], dtype=np.float32))
    np.testing.assert_allclose(y, [0.0, 0.5, 1.0])


def test_dropout_only_when_training_and_reproducible():
    x = np.ones((50, 40), dtype=np.float32)
    a = L.Dropout(0.5, rng=np.random.default_rng(3))
    b = L.Dropout(0.5, rng=np.random.default_rng(3))
    np.testing.assert_array_equal(a.forward(x), x)
    ya, yb = a.forward(x, train=True), b.forward(x, train=True)
    np.testing.assert_array_equal(ya, yb)
    assert 0.4 < (ya == 0).mean() < 0.6
    assert set(np.unique(ya)) == {0.0, 2.0}


@pytest.mark.parametrize("name", sorted(ARCHITECTURES))
def test_architectures_build_and_run(name):
    model = build_model(name, np.random.default_rng(0))
    x = np.random.default_rng(1).random((3, 1, 28, 28), dtype=np.float32)
    assert model.forward(x).shape == (3, 10)
    json.dumps(model.spec)
    # the spec rebuilds the same layer structure
    assert build_model(model.spec, np.random.default_rng(0)).spec == model.spec


def test_same_seed_same_weights_and_outputs():
    x = np.random.default_rng(1).random((8, 1, 28, 28), dtype=np.float32)
    outs = []
    for _ in range(2):
        model = build_model("wide", np.random.default_rng(42))
        outs.append((model.state_dict(), model.forward(x, train=True), model.forward(x)))
    (s1, t1, e1), (s2, t2, e2) = outs
    assert s1.keys() == s2.keys()
    for k in s1:
        np.testing.assert_array_equal(s1[k], s2[k])
    np.testing.assert_array_equal(t1, t2)  # dropout masks drawn from the seeded layer rng
    np.testing.assert_array_equal(e1, e2)
    other = build_model("wide", np.random.default_rng(43)).state_dict()
    assert not np.array_equal(other["0.conv2d.weight"], s1["0.conv2d.weight"])


def test_parameters_state_dict_roundtrip():
    rng = np.random.default_rng(0)
    a, b = build_model("lenet5", rng), build_model("lenet5", rng)
    names = [p.name for p in a.parameters()]
    assert names[:2] == ["0.conv2d.weight", "0.conv2d.bias"] and len(names) == 10
    assert len(set(names)) == len(names)
    x = np.random.default_rng(1).random((2, 1, 28, 28), dtype=np.float32)
    assert not np.array_equal(a.forward(x), b.forward(x))
    b.load_state_dict(a.state_dict())
    np.testing.assert_array_equal(a.forward(x), b.forward(x))
    with pytest.raises(ParameterError):
        b.load_state_dict({k: v for k, v in a.state_dict().items() if k != "0.conv2d.bias"})
    bad = a.state_dict()
    bad["0.conv2d.bias"] = np.zeros(7, dtype=np.float32)
    with pytest.raises(ParameterError):
        b.load_state_dict(bad)


def test_predict_proba_batches_and_temperature():
    model = build_model("lenet5", np.random.default_rng(0))
    x = np.random.default_rng(1).random((10, 1, 28, 28), dtype=np.float32)
    p = model.predict_proba(x, batch_size=3)
    np.testing.assert_allclose(p, model.predict_proba(x, batch_size=256), rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=1e-5)
    z = model.forward(x).astype(np.float64)
    e = np.exp((z - z.max(axis=1, keepdims=True)) / 2.0)
    np.testing.assert_allclose(model.predict_proba(x, temperature=2.0), e / e.sum(1, keepdims=True),
                               rtol=1e-5, atol=1e-7)
    # higher temperature -> flatter
    assert model.predict_proba(x, temperature=3.0).max() < p.max()
    assert model.predict_proba(x[:0]).shape == (0, 10)


@pytest.mark.parametrize("spec", [
    [{"type": "conv3d"}],
    [{"type": "dense", "in": 3}],
    [{"type": "dense", "in": 3, "out": 0}],
    [{"type": "relu", "extra": 1}],
    [{"type": "dropout", "p": 1.5}],
    [],
    "no-such-architecture",
])
def test_bad_specs_raise_parameter_error(spec):
    with pytest.raises(ParameterError):
        build_model(spec, np.random.default_rng(0))


def test_sequential_of_given_layers():
    rng = np.random.default_rng(0)
    model = Sequential([L.Flatten(), L.Dense(4, 2, rng=rng)])
    assert model.forward(np.ones((3, 1, 2, 2), dtype=np.float32)).shape == (3, 2)
    assert [p.name for p in model.parameters()] == ["1.dense.weight", "1.dense.bias"]


def test_model_matches_layer_by_layer_and_grad_step():
    """Sequential's single-conversion path equals chaining the public layer calls."""
    model = build_model("lenet5", np.random.default_rng(0), dtype=np.float64)
    x = np.random.default_rng(1).random((6, 1, 28, 28))
    y = np.array([0, 1, 2, 3, 4, 5])
    h = x
    for layer in model.layers:
        h = layer.forward(h)
    np.testing.assert_allclose(model.forward(x), h, rtol=1e-12)
    from formread.nn.losses import softmax_cross_entropy
    loss, d = softmax_cross_entropy(model.forward(x, train=True), y)
    dx = model.backward(d)
    assert dx.shape == x.shape
    grads = [p.grad.copy() for p in model.parameters()]
    loss2, correct = model.grad_step(x, y)
    assert loss2 == pytest.approx(loss) and 0 <= correct <= 6
    for p, g in zip(model.parameters(), grads):
        np.testing.assert_allclose(p.grad, g, rtol=1e-12)
    assert model.backward(d, input_grad=False) is None


@pytest.mark.parametrize("size,stride", [(2, None), (3, 1), (3, None)])
def test_maxpool_ties_go_to_first_maximum(size, stride):
    """Windows of equal values (blank paper) send the whole gradient to their first position."""
    x = np.zeros((1, 1, 6, 7))
    x[0, 0, 3:, 4:] = np.random.default_rng(0).random((3, 3))
    layer = L.MaxPool2D(size, stride)
    y = layer.forward(x)
    dx = layer.backward(np.ones_like(y))
    s = stride or size
    expect = np.zeros_like(x)
    for i in range(y.shape[2]):
        for j in range(y.shape[3]):
            win = x[0, 0, i * s:i * s + size, j * s:j * s + size]
            a, b = np.unravel_index(np.argmax(win), win.shape)  # numpy's argmax: first maximum
            expect[0, 0, i * s + a, j * s + b] += 1
    np.testing.assert_array_equal(dx, expect)


@pytest.mark.parametrize("size", [28, 27])
def test_fused_conv_relu_pool_equals_separate_layers(size):
    """The model fuses conv -> relu -> maxpool (the first one per pooling tile, the second as a
    plain convolution then pooling); the separate layers give the same values and gradients."""
    flat = {28: 16 * 6 * 6, 27: 16 * 5 * 5}[size]
    spec = [{"type": "conv2d", "in": 1, "out": 6, "kernel": 5, "padding": 2}, {"type": "relu"},
            {"type": "maxpool", "size": 2},
            {"type": "conv2d", "in": 6, "out": 16, "kernel": 3}, {"type": "relu"},
            {"type": "maxpool", "size": 2}, {"type": "flatten"},
            {"type": "dense", "in": flat, "out": 10}]
    model = build_model(spec, np.random.default_rng(0), dtype=np.float64)
    assert [getattr(b, "tiled", None) for b in model._blocks[:2]] == [True, False]
    for p in model.parameters():
        if p.name.endswith("bias"):
            p.value[:] = np.random.default_rng(2).standard_normal(p.value.shape)
    x = np.zeros((4, 1, size, size))  # blank borders: many exact ties
    x[:, :, 8:20, 6:22] = np.random.default_rng(1).random((4, 1, 12, 16))
    d = np.random.default_rng(3).standard_normal((4, 10))
    z = model.forward(x)
    dx = model.backward(d)
    fused = [p.grad.copy() for p in model.parameters()]
    h = x
    for layer in model.layers:
        h = layer.forward(h)
    np.testing.assert_allclose(h, z, rtol=1e-12)
    g = d
    for layer in reversed(model.layers):
        g = layer.backward(g)
    np.testing.assert_allclose(g, dx, rtol=1e-10, atol=1e-14)
    for p, f in zip(model.parameters(), fused):
        np.testing.assert_allclose(p.grad, f, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("shape", [(2, 3, 28, 28), (2, 1, 8, 8), (2, 28, 28), (2, 1, 20, 20)])
def test_wrong_input_shapes_raise_parameter_error(shape):
    model = build_model("lenet5", np.random.default_rng(0))
    with pytest.raises(ParameterError):
        model.forward(np.zeros(shape, dtype=np.float32))


def test_empty_batch_and_threads_share_a_model():
    from concurrent.futures import ThreadPoolExecutor
    model = build_model("lenet5", np.random.default_rng(0))
    assert model.forward(np.zeros((0, 1, 28, 28), dtype=np.float32)).shape == (0, 10)
    xs = [np.random.default_rng(i).random((40 + i, 1, 28, 28), dtype=np.float32) for i in range(6)]
    from threadpoolctl import threadpool_info

    def blas_threads():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
    before = blas_threads()
    serial = [model.predict_proba(x) for x in xs]
    with ThreadPoolExecutor(3) as pool:
        threaded = list(pool.map(model.predict_proba, xs))
    for a, b in zip(serial, threaded):
        # not bit-equal: OpenBLAS may ignore a thread limit set from another thread, and its
        # multi-threaded products round differently
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-7)
    assert blas_threads() == before  # the one-thread limit of the passes is undone afterwards


@pytest.mark.parametrize("entry", [
    {"type": "conv2d", "in": 2, "out": 3, "kernel": 3, "stride": 2, "padding": 1},
    {"type": "maxpool", "size": 3, "stride": 2}, {"type": "avgpool", "size": 2, "stride": 2},
    {"type": "dense", "in": 4, "out": 2}, {"type": "dropout", "p": 0.25},
    {"type": "relu"}, {"type": "tanh"}, {"type": "sigmoid"}, {"type": "flatten"},
])
def test_every_layer_spec_round_trips(entry):
    """Contract over every layer kind: build_model(spec) gives back the same spec, and it is JSON."""
    model = build_model([entry], np.random.default_rng(0))
    assert model.spec == [entry]
    assert json.loads(json.dumps(model.spec)) == [entry]
