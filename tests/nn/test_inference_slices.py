"""Speed paths that must not change results: inference in slices of images, the stride-1
convolution input gradient built from shifted copies, and work arrays that are reused."""

import numpy as np

from formread.nn import _conv
from formread.nn import layers as L
from formread.nn.model import INFER_CHUNK, build_model


def test_sliced_inference_equals_one_pass():
    rng = np.random.default_rng(3)
    model = build_model("lenet5", rng)
    n = 2 * INFER_CHUNK + 5  # two full slices and a short one
    x = rng.random((n, 1, 28, 28), dtype=np.float32)
    whole = model.forward(x)
    np.testing.assert_allclose(model._logits(x), whole, rtol=1e-5, atol=1e-5)
    out = np.full((n, 10), np.nan, dtype=np.float32)
    assert model._logits(x, out=out) is out
    np.testing.assert_allclose(out, whole, rtol=1e-5, atol=1e-5)
    assert model.predict_proba(x, batch_size=n).shape == (n, 10)


def _dx_reference(dy, w, xshape, p):
    """Input gradient of a stride-1 convolution written as its definition: every output position
    sends w * dy back to the input window it read (plain loops over the kernel)."""
    c, h, wd, n = xshape
    o, _, k, _ = w.shape
    _, ho, wo, _ = dy.shape
    dxp = np.zeros((c, h + 2 * p, wd + 2 * p, n))
    for i in range(k):
        for j in range(k):
            dxp[:, i:i + ho, j:j + wo, :] += np.einsum("oc,oyxn->cyxn", w[:, :, i, j], dy)
    return dxp[:, p:p + h, p:p + wd, :]


def test_stride1_input_gradient_matches_definition():
    rng = np.random.default_rng(4)
    for c, o, k, p, h, wd in [(6, 16, 5, 0, 14, 14), (2, 3, 3, 1, 7, 9), (1, 4, 5, 2, 6, 5)]:
        xshape = (c, h, wd, 3)
        w = rng.standard_normal((o, c, k, k))
        dy = rng.standard_normal((o, h + 2 * p - k + 1, wd + 2 * p - k + 1, 3))
        got = _conv._conv_dx_stride1(dy, w, xshape, p, _conv.Scratch())
        np.testing.assert_allclose(got, _dx_reference(dy, w, xshape, p), rtol=1e-12, atol=1e-12)


def test_backward_results_survive_the_next_pass():
    # the input gradient lives in a reused work array internally; what backward returns must not
    rng = np.random.default_rng(5)
    layer = L.Conv2D(2, 3, 3, 1, 0, rng=rng)
    x = rng.random((1, 2, 6, 6), dtype=np.float32)
    layer.forward(x)
    dy1 = rng.random((1, 3, 4, 4), dtype=np.float32)
    dx1 = layer.backward(dy1)
    kept = dx1.copy()
    layer.forward(x)
    layer.backward(rng.random((1, 3, 4, 4), dtype=np.float32))
    np.testing.assert_array_equal(dx1, kept)
