"""Augmentation: shapes, dtypes, ranges, reproducibility, and the identity cases checked against scipy.ndimage."""

import numpy as np
import pytest
from scipy import ndimage

from formread.errors import ParameterError
from formread.nn.augment import AugmentConfig, augment_batch, elastic, random_affine


def _batch(n=16, seed=0):
    rng = np.random.default_rng(seed)
    x = np.zeros((n, 1, 28, 28), np.float32)
    x[:, 0, 8:20, 12:16] = 1.0
    x += 0.1 * rng.random(x.shape, dtype=np.float32)
    return np.clip(x, 0, 1)


def test_shapes_dtype_range_and_seed():
    x = _batch()
    a = augment_batch(x, np.random.default_rng(1), AugmentConfig(prob=1.0))
    b = augment_batch(x, np.random.default_rng(1), AugmentConfig(prob=1.0))
    assert a.shape == x.shape and a.dtype == np.float32
    assert a.min() >= 0 and a.max() <= 1
    np.testing.assert_array_equal(a, b)  # same generator state, same result
    assert not np.allclose(a, x)


def test_zero_ranges_are_the_identity():
    x = _batch()
    cfg = AugmentConfig(rotate_deg=0, scale=0, shear=0, shift_px=0, elastic=False, prob=1.0)
    np.testing.assert_allclose(random_affine(x, np.random.default_rng(0), cfg), x, atol=1e-5)
    np.testing.assert_allclose(elastic(x, np.random.default_rng(0), alpha=0.0), x, atol=1e-5)


def test_pure_rotation_matches_scipy_rotate():
    # reference: scipy.ndimage.rotate (bilinear, same size, about the centre)
    x = np.zeros((1, 1, 28, 28), np.float32)  # ink well inside the frame: no edge effects
    x[0, 0, 6:22, 12:16] = 1.0
    x[0, 0, 6:9, 9:19] = 0.5
    cfg = AugmentConfig(rotate_deg=10, scale=0, shear=0, shift_px=0, elastic=False)

    class Fixed:  # a generator stand-in that always draws the top of the range
        def uniform(self, lo, hi, size=None):
            return np.full(size, hi, dtype=np.float64)

    ours = random_affine(x, Fixed(), cfg)[0, 0]
    ref = ndimage.rotate(x[0, 0], 10, reshape=False, order=1, mode="constant")
    np.testing.assert_allclose(ours, np.clip(ref, 0, 1), atol=1e-4)


def test_affine_keeps_most_ink_and_moves_it_little():
    x = _batch(64)
    a = random_affine(x, np.random.default_rng(2))
    ratio = a.sum(axis=(1, 2, 3)) / x.sum(axis=(1, 2, 3))
    assert np.all((ratio > 0.6) & (ratio < 1.5))


def test_elastic_displacement_is_smooth_and_local():
    x = _batch(32)
    e = elastic(x, np.random.default_rng(3), alpha=34.0, sigma=4.0)
    assert e.shape == x.shape and e.dtype == np.float32
    diff = np.abs(e - x).mean()
    assert 0.005 < diff < 0.2
    # centre of mass of the stroke moves by a few pixels at most
    com = np.array([ndimage.center_of_mass(im[0]) for im in e])
    com0 = np.array(ndimage.center_of_mass(x[0, 0]))
    assert np.abs(com - com0).max() < 4.0


def test_prob_zero_leaves_batch_alone_and_bad_shape_refused():
    x = _batch()
    np.testing.assert_array_equal(augment_batch(x, np.random.default_rng(0), AugmentConfig(prob=0.0)), x)
    with pytest.raises(ParameterError):
        augment_batch(x[:, 0], np.random.default_rng(0), AugmentConfig())
