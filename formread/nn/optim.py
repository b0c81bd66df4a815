"""Optimizers (SGD with momentum/Nesterov, Adam) and learning-rate schedules.

Weight decay is applied only to parameters with two or more dimensions (weights), never to biases
(common practice). SGD adds it to the gradient (L2 penalty, coupled); Adam applies it decoupled
from the adaptive step, as AdamW does (Loshchilov and Hutter 2019).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from formread.errors import check_param
from formread.nn.layers import Param

__all__ = ["SGD", "Adam", "step_schedule", "cosine_schedule"]


class _Optimizer:
    def __init__(self, params: list[Param], lr: float, weight_decay: float):
        self.params = list(params)
        check_param(lr >= 0, "lr", "a non-negative number", lr)
        check_param(weight_decay >= 0, "weight_decay", "a non-negative number", weight_decay)
        self.lr = float(lr)
        self.weight_decay = float(weight_decay)

    def zero_grad(self) -> None:
        """Set every gradient to zero (layers overwrite gradients anyway; this is for accumulation)."""
        for p in self.params:
            p.grad[...] = 0

    def _decays(self, p: Param) -> bool:
        return self.weight_decay > 0 and p.value.ndim >= 2


class SGD(_Optimizer):
    """Stochastic gradient descent with optional (Nesterov) momentum.

    g = grad (+ weight_decay * w for weights); v = momentum * v + g;
    w -= lr * (g + momentum * v) with Nesterov, else w -= lr * v (the formulation PyTorch uses).
    """

    def __init__(self, params: list[Param], lr: float, momentum: float = 0.0, nesterov: bool = False,
                 weight_decay: float = 0.0):
        super().__init__(params, lr, weight_decay)
        check_param(0 <= momentum < 1, "momentum", "a number in [0, 1)", momentum)
        check_param(not nesterov or momentum > 0, "nesterov", "False when momentum is 0", nesterov)
        self.momentum = float(momentum)
        self.nesterov = bool(nesterov)
        self._v = [np.zeros_like(p.value) for p in self.params]

    def step(self) -> None:
        """Update every parameter in place from its ``.grad``."""
        lr = self.lr
        for p, v in zip(self.params, self._v):
            g = p.grad
            if self._decays(p):
                g = g + p.value.dtype.type(self.weight_decay) * p.value
            if self.momentum:
                v *= self.momentum
                v += g
                upd = g + p.value.dtype.type(self.momentum) * v if self.nesterov else v
            else:
                upd = g
            p.value -= p.value.dtype.type(lr) * upd


class Adam(_Optimizer):
    """Adam (Kingma and Ba 2015) with bias correction and decoupled weight decay (AdamW style):

    w -= lr * weight_decay * w (weights only); m = b1 m + (1 - b1) g; v = b2 v + (1 - b2) g^2;
    w -= lr * (m / (1 - b1^t)) / (sqrt(v / (1 - b2^t)) + eps).
    """

    def __init__(self, params: list[Param], lr: float = 1e-3, betas: tuple[float, float] = (0.9, 0.999),
                 eps: float = 1e-8, weight_decay: float = 0.0):
        super().__init__(params, lr, weight_decay)
        check_param(len(betas) == 2 and all(0 <= b < 1 for b in betas), "betas",
                    "two numbers in [0, 1)", betas)
        check_param(eps >= 0, "eps", "a non-negative number", eps)
        self.betas = (float(betas[0]), float(betas[1]))
        self.eps = float(eps)
        self.t = 0
        self._m = [np.zeros_like(p.value) for p in self.params]
        self._v = [np.zeros_like(p.value) for p in self.params]

    def step(self) -> None:
        """Update every parameter in place from its ``.grad``."""
        self.t += 1
        b1, b2 = self.betas
        c1 = 1 - b1 ** self.t
        c2 = 1 - b2 ** self.t
        for p, m, v in zip(self.params, self._m, self._v):
            dt = p.value.dtype.type
            g = p.grad
            if self._decays(p):
                p.value *= dt(1 - self.lr * self.weight_decay)
            m *= dt(b1)
            m += dt(1 - b1) * g
            v *= dt(b2)
            v += dt(1 - b2) * (g * g)
            denom = np.sqrt(v / dt(c2))
            denom += dt(self.eps)
            p.value -= dt(self.lr / c1) * m / denom


def step_schedule(base_lr: float, step_size: int, gamma: float) -> Callable[[int], float]:
    """Epoch (0-based) -> base_lr * gamma ** (epoch // step_size)."""
    check_param(step_size >= 1, "step_size", "a positive integer", step_size)

    def lr(epoch: int) -> float:
        return float(base_lr * gamma ** (epoch // step_size))
    return lr


def cosine_schedule(base_lr: float, total_epochs: int, min_lr: float = 0.0, warmup: int = 0
                    ) -> Callable[[int], float]:
    """Epoch (0-based) -> learning rate: linear warm-up over ``warmup`` epochs up to base_lr
    (epoch e gives base_lr * (e + 1) / warmup), then half a cosine from base_lr down to min_lr
    reached at epoch total_epochs - 1 (Loshchilov and Hutter 2017, without restarts)."""
    check_param(total_epochs >= 1, "total_epochs", "a positive integer", total_epochs)
    check_param(0 <= warmup < total_epochs, "warmup", f"an integer in [0, {total_epochs})", warmup)

    def lr(epoch: int) -> float:
        if epoch < warmup:
            return float(base_lr * (epoch + 1) / warmup)
        span = max(total_epochs - 1 - warmup, 1)
        t = min(max((epoch - warmup) / span, 0.0), 1.0)
        return float(min_lr + 0.5 * (base_lr - min_lr) * (1 + math.cos(math.pi * t)))
    return lr
