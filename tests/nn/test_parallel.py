"""The two-process data-parallel gradient equals the single-process gradient of the whole batch."""

import os

import numpy as np
import pytest

from formread.nn.model import build_model
from formread.nn.parallel import DataParallel


def test_parallel_gradient_matches_single_process_and_shuts_down():
    model = build_model("lenet5", np.random.default_rng(0))
    rng = np.random.default_rng(1)
    x = rng.random((37, 1, 28, 28), dtype=np.float32)  # odd size: halves of 18 and 19
    y = rng.integers(0, 10, 37)
    loss, correct = model.grad_step(x, y, smoothing=0.1)
    expect = [p.grad.copy() for p in model.parameters()]
    with DataParallel(model, seed=3) as dp:
        for _ in range(2):  # twice: the worker stays up between steps
            ploss, pcorrect = dp.grad_step(x, y, smoothing=0.1)
            assert ploss == pytest.approx(loss, rel=1e-5)
            assert pcorrect == correct
            for p, g in zip(model.parameters(), expect):
                np.testing.assert_allclose(p.grad, g, rtol=1e-4, atol=1e-6)
        # weights changed by an optimizer reach the worker at the next step
        for p in model.parameters():
            p.value *= np.float32(0.5)
        ploss, _ = dp.grad_step(x, y)
        assert ploss == pytest.approx(model.grad_step(x, y)[0], rel=1e-5)
        proc = dp._proc
        path = dp._path
        assert proc.poll() is None and not os.path.exists(path)  # unlinked once mapped
    assert proc.returncode == 0
    assert dp._proc is None


def test_parallel_bad_labels_raise_and_worker_stays_usable():
    from formread.errors import ParameterError
    model = build_model("lenet5", np.random.default_rng(0))
    x = np.zeros((8, 1, 28, 28), dtype=np.float32)
    with DataParallel(model) as dp:
        with pytest.raises(ParameterError):
            dp.grad_step(x, np.array([0, 1, 2, 3, 4, 5, 6, 11]))  # bad label in the worker's half
        with pytest.raises(ParameterError):
            dp.grad_step(x, np.array([11, 1, 2, 3, 4, 5, 6, 7]))  # bad label in this process's half
        loss, _ = dp.grad_step(x, np.arange(8))
        assert np.isfinite(loss)
        proc = dp._proc
    assert proc.returncode == 0


def test_parallel_predict_proba_matches_single_process():
    model = build_model("lenet5", np.random.default_rng(0))
    x = np.random.default_rng(2).random((45, 1, 28, 28), dtype=np.float32)
    expect = model.predict_proba(x, batch_size=16, temperature=1.5)
    with DataParallel(model) as dp:
        got = dp.predict_proba(x, batch_size=16, temperature=1.5)  # batches of 16, 16 and 13
        assert got.dtype == np.float32 and got.shape == (45, 10)
        np.testing.assert_allclose(got, expect, rtol=1e-5, atol=1e-7)
        assert dp.predict_proba(x[:1]).shape == (1, 10) and dp.predict_proba(x[:0]).shape == (0, 10)
        # gradient steps still work after predictions (same worker)
        loss, _ = dp.grad_step(x[:20], np.arange(20) % 10)
        assert loss == pytest.approx(model.grad_step(x[:20], np.arange(20) % 10)[0], rel=1e-5)
