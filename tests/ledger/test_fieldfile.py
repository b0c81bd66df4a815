"""A field's digit file: what is written is what is read back."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from formread.ledger.fieldfile import FieldFile, _within_two, load_field_file


@pytest.mark.parametrize("shape,share", [((1, 1), 0.5), ((3, 2), 0.3), ((170, 620), 0.01), ((40, 60), 0.4)])
def test_the_ink_neighbourhood_equals_scipy_dilation(shape, share):
    # reference: scipy.ndimage.binary_dilation with its default cross, twice (border outside = no ink)
    rng = np.random.default_rng(shape[0] + shape[1])
    ink = rng.random(shape) < share
    assert np.array_equal(_within_two(ink), ndimage.binary_dilation(ink, iterations=2))


def test_a_whole_field_file_reads_back_as_written(tmp_path):
    rng = np.random.default_rng(5)
    cand = rng.integers(0, 256, (5, 28, 28)).astype(np.uint8)
    gray = rng.integers(0, 256, (60, 200)).astype(np.uint8)
    ink = gray < 60
    ff = FieldFile(digits=cand[2:5].astype(np.float32)[:, None] / 255.0, positions=np.arange(3), chosen=1,
                   cand_digits=cand, cand_spans=np.array([[0, 2], [2, 5]]), cand_costs=np.array([1.5, 0.25]),
                   blank=np.zeros(3, bool), doubtful=True, reason="touching",
                   crop_gray=gray, crop_ink=ink, crop_rect=np.array([30.0, 30.0, 170.0, 40.0]),
                   crop_geometry=np.array([1.0, 2.0, 10.0]), crop_matrix=np.eye(2, 3))
    path = tmp_path / "f.npz"
    path.write_bytes(ff.to_bytes())
    back = load_field_file(path)
    assert np.array_equal(back.cand_digits, cand) and back.chosen == 1
    assert np.array_equal(back.cand_spans, [[0, 2], [2, 5]]) and np.allclose(back.cand_costs, [1.5, 0.25])
    assert back.doubtful and back.reason == "touching"
    assert np.array_equal(back.digits, cand[2:5].astype(np.float32)[:, None] / np.float32(255.0))
    assert np.array_equal(back.crop_ink, ink)
    # the crop keeps its grey only near ink (two pixels), paper elsewhere
    near = ndimage.binary_dilation(ink, iterations=2)
    assert np.array_equal(back.crop_gray[near], gray[near]) and (back.crop_gray[~near] == 255).all()
