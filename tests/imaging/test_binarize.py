"""Binarization checked against scikit-image (reference implementation of Otsu and Sauvola)."""

from __future__ import annotations

import numpy as np
import pytest
from skimage import filters as skf
from synth import Transform, example_layout, render_page

from formread.errors import ParameterError
from formread.imaging.binarize import binarize, is_uneven, threshold_otsu, threshold_sauvola


def test_otsu_on_scikit_images_worked_example():
    # scikit-image's own test image for threshold_otsu (skimage/filters/tests/test_thresholding.py): threshold 2.
    image = np.array([[0, 0, 1, 3, 5], [0, 1, 4, 3, 4], [1, 2, 5, 4, 1], [2, 4, 5, 2, 1], [4, 5, 1, 0, 0]],
                     dtype=np.uint8)
    assert threshold_otsu(image) == 2
    assert threshold_otsu(image) == skf.threshold_otsu(image)


@pytest.mark.parametrize("seed", range(6))
def test_otsu_equals_scikit_image_on_random_pages(seed):
    # Reference: skimage.filters.threshold_otsu on the same uint8 images.
    rng = np.random.default_rng(seed)
    g = np.clip(rng.normal(200, 25, (120, 90)), 0, 255).astype(np.uint8)
    g[rng.integers(0, 120, 40), :] = rng.integers(0, 120, (40, 90)).astype(np.uint8)
    if seed % 2:
        g = (g // 3 + 40).astype(np.uint8)  # narrow range, gaps in the histogram
    assert threshold_otsu(g) == skf.threshold_otsu(g)


def test_otsu_float_images_and_constant_image():
    rng = np.random.default_rng(7)
    f = np.concatenate([rng.normal(0.2, 0.05, 500), rng.normal(0.8, 0.05, 700)]).reshape(30, 40)
    # Reference: scikit-image's 256-bin histogram for float images.
    assert threshold_otsu(f) == pytest.approx(skf.threshold_otsu(f), rel=1e-12)
    assert threshold_otsu(np.full((4, 4), 9, np.uint8)) == 9


@pytest.mark.parametrize("window,k,r", [(15, 0.2, 128.0), (25, 0.5, 127.5), (41, 0.34, 100.0)])
def test_sauvola_matches_scikit_image_in_the_interior(window, k, r):
    # Reference: skimage.filters.threshold_sauvola with k and R set explicitly (defaults differ between
    # implementations). Borders differ by design (we clip the window; scikit-image reflects the image).
    gray, _ = render_page(example_layout(), 75, {"member": "12345678"}, np.random.default_rng(1),
                          Transform(rotation_deg=2, noise=6, shadow=0.5))
    ours = threshold_sauvola(gray, window=window, k=k, r=r)
    ref = skf.threshold_sauvola(gray, window_size=window, k=k, r=r)
    h = window // 2
    assert np.abs(ours - ref)[h:-h, h:-h].max() <= 1.0


def test_sauvola_parameters_are_checked():
    with pytest.raises(ParameterError, match="parameter 'window' must be an odd whole number >= 3; got 4"):
        threshold_sauvola(np.zeros((9, 9), np.uint8), window=4)


def test_auto_picks_sauvola_under_a_shadow_and_finds_the_ink():
    lay = example_layout()
    even, _ = render_page(lay, 100, {"member": "12345678"}, np.random.default_rng(2), Transform(noise=4))
    dark, _ = render_page(lay, 100, {"member": "12345678"}, np.random.default_rng(2), Transform(noise=4, shadow=0.7))
    assert not is_uneven(even, 100) and is_uneven(dark, 100)
    truth = even < 128
    # Global Otsu loses the page under the shadow; auto (Sauvola there) keeps ink and paper apart.
    otsu = binarize(dark, "otsu", dpi=100)
    auto = binarize(dark, "auto", dpi=100)
    err_otsu = np.mean(otsu != truth)
    err_auto = np.mean(auto != truth)
    assert err_auto < 0.02 and err_auto < err_otsu / 3
    # On an evenly lit page auto is Otsu.
    np.testing.assert_array_equal(binarize(even, "auto", dpi=100), binarize(even, "otsu", dpi=100))


def test_binarize_blank_page_has_no_ink_and_mask_dtype():
    rng = np.random.default_rng(3)
    blank = np.clip(rng.normal(235, 4, (200, 150)), 0, 255).astype(np.uint8)
    m = binarize(blank, "otsu")
    assert m.dtype == bool and m.shape == blank.shape and not m.any()
    with pytest.raises(ParameterError, match="parameter 'method'"):
        binarize(blank, "magic")
