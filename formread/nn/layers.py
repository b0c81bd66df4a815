"""Network layers with forward and backward written side by side.

Every layer takes and returns arrays in the public (N, C, H, W) or (N, F) layout and keeps the dtype
it is given: float32 in normal use, float64 for gradient checks. ``forward`` caches what ``backward``
needs; ``backward(dy)`` (using the most recent forward pass) fills the ``.grad`` of the layer's
parameters (overwriting, not adding) and returns the gradient with respect to the input.
"""

from __future__ import annotations

import numpy as np

from formread.errors import check_param
from formread.nn import _conv

__all__ = [
    "Param", "Layer", "Conv2D", "MaxPool2D", "AvgPool2D", "Dense", "ReLU", "Tanh", "Sigmoid",
    "Dropout", "Flatten",
]


class Param:
    """A trainable array and its gradient (same shape and dtype)."""

    def __init__(self, value: np.ndarray, name: str = ""):
        self.value = value
        self.grad = np.zeros_like(value)
        self.name = name

    def __repr__(self) -> str:
        return f"Param({self.name!r}, shape={self.value.shape}, dtype={self.value.dtype})"


def to_internal(x: np.ndarray) -> np.ndarray:
    """Public layout (N, ...) -> internal batch-innermost layout (..., N) (a view)."""
    return np.moveaxis(x, 0, -1)


def to_public(x: np.ndarray) -> np.ndarray:
    """Internal layout (..., N) -> public layout (N, ...), as a new C-contiguous array (always a
    copy: internal arrays may be work arrays that the next pass overwrites)."""
    return np.moveaxis(x, -1, 0).copy(order="C")


class Layer:
    """Base layer. Subclasses implement ``_fwd``/``_bwd`` on the internal batch-innermost layout
    ((C, H, W, N) for images, (F, N) for features); the public ``forward``/``backward`` take and
    return the usual (N, C, H, W) / (N, F) arrays."""

    kind = "layer"

    def forward(self, x: np.ndarray, train: bool = False) -> np.ndarray:
        """x (N, ...) -> y (N, ...), same dtype. ``train`` enables dropout."""
        return to_public(self._fwd(to_internal(np.asarray(x)), train))

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """dy (N, ...) like the last output -> dx (N, ...) like the last input; fills ``.grad``."""
        dx = self._bwd(to_internal(np.asarray(dy)), True)
        assert dx is not None  # need_dx=True: every layer returns dx
        return to_public(dx)

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        raise NotImplementedError

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        raise NotImplementedError

    def params(self) -> list[Param]:
        """The layer's own parameters, in a fixed order."""
        return []

    def spec(self) -> dict:
        """JSON-serialisable description that ``build_model`` turns back into this layer."""
        return {"type": self.kind}

    def astype(self, dtype) -> Layer:
        """Convert parameters to ``dtype`` in place (e.g. float64 for gradient checks)."""
        for p in self.params():
            p.value = p.value.astype(dtype)
            p.grad = np.zeros_like(p.value)
        return self


def _check_positive_int(name: str, value) -> int:
    check_param(bool(isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value > 0),
                name, "a positive integer", value)
    return int(value)


class Conv2D(Layer):
    """2-D cross-correlation (what deep-learning libraries call convolution) with zero padding.

    weight : (out, in, k, k); bias : (out,). Input (N, in, H, W) -> output (N, out, Ho, Wo) with
    Ho = (H + 2 * padding - k) // stride + 1. Weights uniform in +-gain * sqrt(3 / fan_in): gain
    sqrt(2) before a ReLU (He et al. 2015), 1 otherwise (LeCun's fan-in rule).
    """

    kind = "conv2d"

    def __init__(self, in_ch: int, out_ch: int, kernel: int, stride: int = 1, padding: int = 0,
                 *, rng: np.random.Generator, dtype=np.float32, gain: float = np.sqrt(2.0)):
        self.in_ch = _check_positive_int("in", in_ch)
        self.out_ch = _check_positive_int("out", out_ch)
        self.kernel = _check_positive_int("kernel", kernel)
        self.stride = _check_positive_int("stride", stride)
        check_param(isinstance(padding, (int, np.integer)) and padding >= 0, "padding",
                    "a non-negative integer", padding)
        self.padding = int(padding)
        fan_in = in_ch * kernel * kernel
        bound = gain * np.sqrt(3.0 / fan_in)
        w = rng.uniform(-bound, bound, size=(out_ch, in_ch, kernel, kernel)).astype(dtype)
        self.weight = Param(w, "weight")
        self.bias = Param(np.zeros(out_ch, dtype=dtype), "bias")
        self._scratch = _conv.Scratch()
        self._cache: tuple[np.ndarray, tuple[int, ...]] | None = None  # (cols, x.shape) of the last forward

    def params(self) -> list[Param]:
        return [self.weight, self.bias]

    def spec(self) -> dict:
        return {"type": self.kind, "in": self.in_ch, "out": self.out_ch, "kernel": self.kernel,
                "stride": self.stride, "padding": self.padding}

    def check_input(self, x: np.ndarray) -> None:
        """Raise ParameterError unless x (internal layout (C, H, W, N)) fits this layer."""
        k, p = self.kernel, self.padding
        check_param(x.ndim == 4 and x.shape[0] == self.in_ch and min(x.shape[1:3]) + 2 * p >= k,
                    "x", f"of shape (N, {self.in_ch}, H, W) with H, W >= {max(k - 2 * p, 1)}",
                    (x.shape[-1],) + x.shape[:-1])

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        self.check_input(x)
        p = self.padding
        y, cols = _conv.conv_forward(x, self.weight.value, self.bias.value, self.stride, p,
                                     self._scratch)
        self._cache = (cols, x.shape)
        return y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        assert self._cache is not None, "backward before forward"
        cols, xshape = self._cache
        dx, dw, db = _conv.conv_backward(dy, self.weight.value, cols, xshape, self.stride,
                                         self.padding, self._scratch, need_dx)
        self.weight.grad = dw
        self.bias.grad = db
        return dx


class _Pool(Layer):
    def __init__(self, size: int = 2, stride: int | None = None):
        self.size = _check_positive_int("size", size)
        self.stride = self.size if stride is None else _check_positive_int("stride", stride)
        self._cache: tuple | None = None  # what the subclass's backward needs from the last forward

    def spec(self) -> dict:
        return {"type": self.kind, "size": self.size, "stride": self.stride}


class MaxPool2D(_Pool):
    """Max pooling over size x size windows (no padding, trailing rows/cols that do not fill a
    window are dropped). (N, C, H, W) -> (N, C, Ho, Wo). Ties send the gradient to the first max."""

    kind = "maxpool"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        if self.size == self.stride:
            y, arg = _conv.maxpool_tiled_forward(x, self.size)
        else:
            y, arg = _conv.maxpool_forward(x, self.size, self.stride)
        self._cache = (arg, x.shape)
        return y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        assert self._cache is not None, "backward before forward"
        arg, xshape = self._cache
        if self.size == self.stride:
            return _conv.maxpool_tiled_backward(dy, arg, xshape, self.size)
        return _conv.maxpool_backward(dy, arg, xshape, self.size, self.stride)


class AvgPool2D(_Pool):
    """Average pooling over size x size windows (no padding). (N, C, H, W) -> (N, C, Ho, Wo)."""

    kind = "avgpool"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        self._cache = x.shape
        return _conv.avgpool_forward(x, self.size, self.stride)

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        assert self._cache is not None, "backward before forward"
        return _conv.avgpool_backward(dy, self._cache, self.size, self.stride)


class Dense(Layer):
    """Fully connected layer: (N, in) -> (N, out), y = x @ weight + bias.

    weight : (in, out); bias : (out,). Initialised like Conv2D (uniform, +-gain * sqrt(3 / fan_in)).
    """

    kind = "dense"

    def __init__(self, in_features: int, out_features: int, *, rng: np.random.Generator,
                 dtype=np.float32, gain: float = np.sqrt(2.0)):
        self.in_features = _check_positive_int("in", in_features)
        self.out_features = _check_positive_int("out", out_features)
        bound = gain * np.sqrt(3.0 / in_features)
        w = rng.uniform(-bound, bound, size=(in_features, out_features)).astype(dtype)
        self.weight = Param(w, "weight")
        self.bias = Param(np.zeros(out_features, dtype=dtype), "bias")
        self._x: np.ndarray | None = None  # the last forward's input (in, N)

    def params(self) -> list[Param]:
        return [self.weight, self.bias]

    def spec(self) -> dict:
        return {"type": self.kind, "in": self.in_features, "out": self.out_features}

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        check_param(x.ndim == 2 and x.shape[0] == self.in_features, "x",
                    f"of shape (N, {self.in_features})", x.shape[::-1])
        self._x = x
        y = np.matmul(self.weight.value.T, x)  # (out, N)
        y += self.bias.value[:, None]
        return y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        assert self._x is not None, "backward before forward"
        self.weight.grad = np.matmul(self._x, dy.T)
        self.bias.grad = dy.sum(axis=1)
        return np.matmul(self.weight.value, dy) if need_dx else None


class ReLU(Layer):
    """max(x, 0), elementwise, any shape."""

    kind = "relu"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        self._y = np.maximum(x, x.dtype.type(0))
        return self._y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        return np.where(self._y > 0, dy, dy.dtype.type(0))


class Tanh(Layer):
    """tanh(x), elementwise, any shape."""

    kind = "tanh"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        self._y = np.tanh(x)
        return self._y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        return dy * (1 - self._y * self._y)


class Sigmoid(Layer):
    """1 / (1 + exp(-x)), elementwise, any shape; computed without overflow."""

    kind = "sigmoid"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        # 0.5 * (1 + tanh(x / 2)) equals the logistic function and never overflows.
        half = x.dtype.type(0.5)
        self._y = half * (1 + np.tanh(half * x))
        return self._y

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        return dy * self._y * (1 - self._y)


class Dropout(Layer):
    """Inverted dropout: when training, zero each value with probability p and scale the rest by
    1 / (1 - p); identity when not training. Draws from its own seeded ``rng``."""

    kind = "dropout"

    def __init__(self, p: float = 0.5, *, rng: np.random.Generator):
        check_param(isinstance(p, (int, float)) and 0.0 <= p < 1.0, "p", "a number in [0, 1)", p)
        self.p = float(p)
        self.rng = rng
        self._mask = None

    def spec(self) -> dict:
        return {"type": self.kind, "p": self.p}

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        if not train or self.p == 0.0:
            self._mask = None
            return x
        # the mask is drawn in the internal (F, N) layout; the same seed gives the same masks
        keep = self.rng.random(x.shape, dtype=np.float32) >= self.p
        self._mask = keep.astype(x.dtype) * x.dtype.type(1.0 / (1.0 - self.p))
        return x * self._mask

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        return dy if self._mask is None else dy * self._mask


class Flatten(Layer):
    """(N, C, H, W) -> (N, C * H * W) in C order (internally (C, H, W, N) -> (C*H*W, N))."""

    kind = "flatten"

    def _fwd(self, x: np.ndarray, train: bool) -> np.ndarray:
        self._shape = x.shape
        return x.reshape(int(np.prod(x.shape[:-1])), x.shape[-1])

    def _bwd(self, dy: np.ndarray, need_dx: bool) -> np.ndarray | None:
        return dy.reshape(self._shape)
