"""The sequential model, building it from a JSON-able spec, and the named architectures."""

from __future__ import annotations

import copy

import numpy as np

from formread.errors import check_param
from formread.nn import _conv
from formread.nn import layers as L
from formread.nn.losses import softmax, softmax_cross_entropy

__all__ = ["Sequential", "build_model", "ARCHITECTURES"]


ARCHITECTURES: dict[str, list[dict]] = {
    # LeNet-5 shape (LeCun et al. 1998) with ReLU and max pooling: 28x28 -> 6@28x28 -> 6@14x14
    # -> 16@10x10 -> 16@5x5 -> 120 -> 84 -> 10.
    "lenet5": [
        {"type": "conv2d", "in": 1, "out": 6, "kernel": 5, "padding": 2},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "conv2d", "in": 6, "out": 16, "kernel": 5},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "flatten"},
        {"type": "dense", "in": 400, "out": 120},
        {"type": "relu"},
        {"type": "dense", "in": 120, "out": 84},
        {"type": "relu"},
        {"type": "dense", "in": 84, "out": 10},
    ],
    # The 1998 style: tanh and average pooling (subsampling), same sizes.
    "lenet5-classic": [
        {"type": "conv2d", "in": 1, "out": 6, "kernel": 5, "padding": 2},
        {"type": "tanh"},
        {"type": "avgpool", "size": 2},
        {"type": "conv2d", "in": 6, "out": 16, "kernel": 5},
        {"type": "tanh"},
        {"type": "avgpool", "size": 2},
        {"type": "flatten"},
        {"type": "dense", "in": 400, "out": 120},
        {"type": "tanh"},
        {"type": "dense", "in": 120, "out": 84},
        {"type": "tanh"},
        {"type": "dense", "in": 84, "out": 10},
    ],
    # A wider ReLU CNN: 28x28 -> 32@28x28 -> 32@14x14 -> 64@14x14 -> 64@7x7 -> 128 -> 10.
    "wide": [
        {"type": "conv2d", "in": 1, "out": 32, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "conv2d", "in": 32, "out": 64, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "flatten"},
        {"type": "dense", "in": 3136, "out": 128},
        {"type": "relu"},
        {"type": "dropout", "p": 0.5},
        {"type": "dense", "in": 128, "out": 10},
    ],
    # Two 3x3 convolutions per stage (about 4.5 times the work of "wide"): 28x28 -> 32@28x28
    # -> 32@28x28 -> 32@14x14 -> 64@14x14 -> 64@14x14 -> 64@7x7 -> 256 -> 10.
    "wide-deep": [
        {"type": "conv2d", "in": 1, "out": 32, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "conv2d", "in": 32, "out": 32, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "conv2d", "in": 32, "out": 64, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "conv2d", "in": 64, "out": 64, "kernel": 3, "padding": 1},
        {"type": "relu"},
        {"type": "maxpool", "size": 2},
        {"type": "flatten"},
        {"type": "dense", "in": 3136, "out": 256},
        {"type": "relu"},
        {"type": "dropout", "p": 0.5},
        {"type": "dense", "in": 256, "out": 10},
    ],
}


# Images per inference pass in ``Sequential._logits``: small enough that LeNet-5's work arrays stay
# in a core's L2 cache, large enough that the matrix products stay efficient (measured best at 64).
INFER_CHUNK = 64


class _ConvReluPool:
    """Conv2D -> ReLU -> non-overlapping MaxPool2D computed as pool, then bias, then ReLU.

    Adding the bias and taking max(., 0) are non-decreasing maps, so they commute with the window
    maximum: pooling first gives the same output and the same gradients while the bias and the ReLU
    touch a k*k times smaller array. Uses the parameters of the three given layers.
    """

    def __init__(self, conv: L.Conv2D, relu: L.ReLU, pool: L.MaxPool2D):
        self.conv, self.relu, self.pool = conv, relu, pool
        # Few output channels make a thin matmul: then compute whole pooling tiles per product
        # (measured faster for LeNet-5's first layer, slower for wider layers).
        self.tiled = conv.stride == 1 and conv.out_ch * pool.size ** 2 <= 32
        self._cache: tuple | None = None  # what backward needs from the last forward

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        conv, k = self.conv, self.pool.size
        conv.check_input(x)
        if self.tiled:
            a, cols, args = _conv.conv_maxpool_forward(x, conv.weight.value, conv.padding, k,
                                                       conv._scratch, need_arg=train)
            a += conv.bias.value[:, None, None, None]
            np.maximum(a, a.dtype.type(0), out=a)
            self._cache = (x, cols, None, args, a)
            return a
        z, cols = _conv.conv_forward(x, conv.weight.value, None, conv.stride, conv.padding,
                                     conv._scratch)
        # without training the window argmax is left for a backward pass that may never come
        a, args = _conv.maxpool_tiled_forward(z, k, need_arg=train)
        a += conv.bias.value[:, None, None, None]
        np.maximum(a, a.dtype.type(0), out=a)
        self._cache = (x.shape, cols, z if args is None else z.shape, args, a)
        return a

    def _bwd(self, da: np.ndarray, need_dx: bool) -> np.ndarray | None:
        conv = self.conv
        assert self._cache is not None, "backward before forward"
        if self.tiled:
            x, cols, _, args, a = self._cache
            if args is None:  # forward ran with train=False
                _, cols, args = _conv.conv_maxpool_forward(x, conv.weight.value, conv.padding,
                                                           self.pool.size, conv._scratch)
            dp = np.multiply(da, a > 0)
            conv.bias.grad = dp.reshape(dp.shape[0], -1).sum(axis=1)
            dx, conv.weight.grad = _conv.conv_maxpool_backward(
                dp, args, conv.weight.value, cols, x.shape, conv.padding, self.pool.size,
                conv._scratch, need_dx)
            return dx
        xshape, cols, z, args, a = self._cache
        if args is None:  # forward ran with train=False
            args = _conv.maxpool_tiled_forward(z, self.pool.size)[1]
        zshape = z.shape if isinstance(z, np.ndarray) else z
        dp = np.multiply(da, a > 0)
        conv.bias.grad = dp.reshape(dp.shape[0], -1).sum(axis=1)
        dz = _conv.maxpool_tiled_backward(dp, args, zshape, self.pool.size)
        dx, conv.weight.grad, _ = _conv.conv_backward(
            dz, conv.weight.value, cols, xshape, conv.stride, conv.padding, conv._scratch,
            need_dx, need_db=False)
        return dx


def _blocks(layers: list[L.Layer]) -> list:
    """The layers grouped for execution: Conv2D, ReLU, MaxPool2D(size == stride) run fused."""
    out: list[_ConvReluPool | L.Layer] = []
    i = 0
    while i < len(layers):
        a, b, c = (layers[i:i + 3] + [None, None])[:3]
        if (isinstance(a, L.Conv2D) and isinstance(b, L.ReLU) and isinstance(c, L.MaxPool2D)
                and c.size == c.stride):
            out.append(_ConvReluPool(a, b, c))
            i += 3
        else:
            out.append(layers[i])
            i += 1
    return out


class Sequential:
    """Layers applied in order. Input (N, C, H, W) float32 (or float64) -> logits (N, classes).

    Passes run with one BLAS thread (see ``_conv.one_blas_thread``); for two cores in training
    use ``formread.nn.parallel.DataParallel``.
    ``spec`` is the JSON-serialisable list of layer dicts the model was built from. ``backward``
    uses what the most recent ``forward`` cached. Several threads may call ``forward`` /
    ``predict_proba`` at once (work arrays are per thread); training is single-threaded.
    """

    def __init__(self, layers: list[L.Layer]):
        self.layers = list(layers)
        self._blocks = _blocks(self.layers)
        for i, layer in enumerate(self.layers):
            for p in layer.params():
                p.name = f"{i}.{layer.kind}.{p.name.rsplit('.', 1)[-1]}"

    @property
    def spec(self) -> list[dict]:
        """The layer dicts that ``build_model`` turns back into this model's structure."""
        return [layer.spec() for layer in self.layers]

    @property
    def dtype(self) -> np.dtype:
        """dtype of the parameters (float32, or float64 for gradient checks)."""
        ps = self.parameters()
        return ps[0].value.dtype if ps else np.dtype(np.float32)

    def forward(self, x: np.ndarray, train: bool = False) -> np.ndarray:
        """x (N, C, H, W) -> logits (N, classes), in the model's dtype. ``train`` enables dropout.

        Runs in the internal batch-innermost layout; converts once on the way in and out.
        """
        x = np.asarray(x)
        if x.dtype != self.dtype:
            x = x.astype(self.dtype)
        h = L.to_internal(x)
        with _conv.one_blas_thread():
            for block in self._blocks:
                h = block._fwd(h, train)
        return L.to_public(h)

    def _logits(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """x (N, C, H, W) -> logits (N, classes) of ``forward(x, train=False)``, computed in
        slices of at most ``INFER_CHUNK`` images (written into ``out`` when given).

        Inference has no cross-image work, so slicing changes no result (up to float32 rounding
        inside the matrix products) but keeps every work array in the core's own cache: measured
        on LeNet-5, 64 images per pass give 30-40% more images per second than 256. Unlike
        ``forward``, leaves nothing usable by ``backward``.
        """
        x = np.asarray(x)
        n = len(x)
        if n <= INFER_CHUNK:
            z = self.forward(x, train=False)
            if out is None:
                return z
            out[...] = z
            return out
        for start in range(0, n, INFER_CHUNK):
            z = self.forward(x[start:start + INFER_CHUNK], train=False)
            if out is None:
                out = np.empty((n,) + z.shape[1:], dtype=z.dtype)
            out[start:start + len(z)] = z
        assert out is not None  # n > INFER_CHUNK: the loop ran
        return out

    def backward(self, dlogits: np.ndarray, input_grad: bool = True) -> np.ndarray | None:
        """dlogits (N, classes) -> dx (N, C, H, W); fills every parameter's ``.grad``.

        With ``input_grad=False`` the gradient for the input is not computed (saves the first
        layer's backward-to-input work during training) and None is returned.
        """
        d = L.to_internal(np.asarray(dlogits, dtype=self.dtype))
        last = len(self._blocks) - 1
        with _conv.one_blas_thread():
            for i, block in enumerate(reversed(self._blocks)):
                d = block._bwd(d, input_grad or i < last)
        return None if d is None else L.to_public(d)

    def grad_step(self, x: np.ndarray, y: np.ndarray, smoothing: float = 0.0) -> tuple[float, int]:
        """One training pass: forward (train=True), mean softmax cross-entropy, backward.

        x : (N, C, H, W) float; y : (N,) int labels. Fills every ``.grad`` (gradient of the mean
        loss over the batch) and returns (loss, number of correct argmax predictions).
        """
        logits = self.forward(x, train=True)
        loss, d = softmax_cross_entropy(logits, y, smoothing)
        self.backward(d, input_grad=False)
        return loss, int((logits.argmax(axis=1) == y).sum())

    def predict_proba(self, x: np.ndarray, batch_size: int = 256, temperature: float = 1.0
                      ) -> np.ndarray:
        """x (N, C, H, W) -> (N, classes) float32 softmax(logits / temperature), in batches."""
        check_param(batch_size >= 1, "batch_size", "a positive integer", batch_size)
        check_param(temperature > 0, "temperature", "a positive number", temperature)
        x = np.asarray(x)
        outs = []
        for start in range(0, len(x), batch_size):
            z = self._logits(x[start:start + batch_size])
            outs.append(softmax(z / z.dtype.type(temperature), axis=1).astype(np.float32))
        if not outs:
            n_out = self.spec_classes()
            return np.zeros((0, n_out), dtype=np.float32)
        return np.concatenate(outs, axis=0)

    def spec_classes(self) -> int:
        """Number of output classes (the last dense layer's width)."""
        for layer in reversed(self.layers):
            if isinstance(layer, L.Dense):
                return layer.out_features
        raise ValueError("model has no dense layer")

    def parameters(self) -> list[L.Param]:
        """Every trainable parameter, in layer order (weight before bias)."""
        return [p for layer in self.layers for p in layer.params()]

    def state_dict(self) -> dict[str, np.ndarray]:
        """Parameter name -> a copy of its value."""
        return {p.name: p.value.copy() for p in self.parameters()}

    def load_state_dict(self, d: dict[str, np.ndarray]) -> None:
        """Set every parameter from ``d`` (same names and shapes; cast to the model's dtype)."""
        params = self.parameters()
        names = {p.name for p in params}
        check_param(set(d) == names, "state_dict", f"the arrays {sorted(names)}", sorted(d))
        for p in params:
            v = np.asarray(d[p.name])
            check_param(v.shape == p.value.shape, f"state_dict[{p.name!r}]",
                        f"of shape {p.value.shape}", v.shape)
            p.value = v.astype(p.value.dtype, copy=True)
            p.grad = np.zeros_like(p.value)

    def astype(self, dtype) -> Sequential:
        """Convert every parameter to ``dtype`` in place; returns self."""
        for layer in self.layers:
            layer.astype(dtype)
        return self


def _gain(spec: list[dict], i: int) -> float:
    """Initialisation gain for the weighted layer at i: sqrt(2) when a ReLU follows it (possibly
    after pooling or dropout), else 1."""
    for entry in spec[i + 1:]:
        kind = entry.get("type") if isinstance(entry, dict) else None
        if kind in ("maxpool", "avgpool", "dropout", "flatten"):
            continue
        return float(np.sqrt(2.0)) if kind == "relu" else 1.0
    return 1.0


def _layer_from(entry: dict, rng: np.random.Generator, dtype, gain: float = 1.0) -> L.Layer:
    check_param(isinstance(entry, dict) and "type" in entry, "spec entry",
                "a dict with a 'type' key", entry)
    kind = entry["type"]
    known = {
        "conv2d": {"in", "out", "kernel", "stride", "padding"},
        "maxpool": {"size", "stride"}, "avgpool": {"size", "stride"},
        "dense": {"in", "out"}, "dropout": {"p"},
        "relu": set(), "tanh": set(), "sigmoid": set(), "flatten": set(),
    }
    check_param(kind in known, "spec type", f"one of {sorted(known)}", kind)
    extra = set(entry) - known[kind] - {"type"}
    check_param(not extra, f"spec {kind}", f"keys among {sorted(known[kind])}", sorted(extra))
    try:
        if kind == "conv2d":
            return L.Conv2D(entry["in"], entry["out"], entry["kernel"], entry.get("stride", 1),
                            entry.get("padding", 0), rng=rng, dtype=dtype, gain=gain)
        if kind == "dense":
            return L.Dense(entry["in"], entry["out"], rng=rng, dtype=dtype, gain=gain)
    except KeyError as e:
        check_param(False, f"spec {kind}", f"a dict with key {e.args[0]!r}", entry)
    if kind == "maxpool":
        return L.MaxPool2D(entry.get("size", 2), entry.get("stride"))
    if kind == "avgpool":
        return L.AvgPool2D(entry.get("size", 2), entry.get("stride"))
    if kind == "dropout":
        # Each dropout layer owns a generator seeded from the model's rng: reproducible.
        return L.Dropout(entry.get("p", 0.5), rng=np.random.default_rng(rng.integers(2**63)))
    return {"relu": L.ReLU, "tanh": L.Tanh, "sigmoid": L.Sigmoid, "flatten": L.Flatten}[kind]()


def build_model(spec: list[dict] | str, rng: np.random.Generator, dtype=np.float32) -> Sequential:
    """Build a model from a spec (list of layer dicts, or a name in ARCHITECTURES).

    Weights are drawn from ``rng`` in layer order, so the same seed gives identical weights.
    dtype : float32 (default) or float64 (for gradient checks).
    """
    if isinstance(spec, str):
        check_param(spec in ARCHITECTURES, "spec", f"one of {sorted(ARCHITECTURES)}", spec)
        spec = ARCHITECTURES[spec]
    check_param(isinstance(spec, (list, tuple)) and len(spec) > 0, "spec",
                "a non-empty list of layer dicts", spec)
    check_param(isinstance(rng, np.random.Generator), "rng", "a numpy.random.Generator", type(rng))
    spec = copy.deepcopy(list(spec))
    return Sequential([_layer_from(entry, rng, dtype, _gain(spec, i)) for i, entry in enumerate(spec)])
