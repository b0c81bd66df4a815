"""The training loop: learning, early stopping, Ctrl-C, checkpoint/resume, and the digits benchmark."""

import json
import time

import numpy as np
import pytest

from formread.digits import upscale_small
from formread.errors import DataError
from formread.learn.datasets import digits_raw, digits_split_indices, load_array_file
from formread.nn.augment import AugmentConfig
from formread.nn.model import build_model
from formread.nn.train import TrainConfig, stratified_split, train

TINY = [
    {"type": "conv2d", "in": 1, "out": 4, "kernel": 3, "padding": 1}, {"type": "relu"},
    {"type": "maxpool", "size": 2}, {"type": "flatten"},
    {"type": "dense", "in": 256, "out": 16}, {"type": "relu"}, {"type": "dropout", "p": 0.2},
    {"type": "dense", "in": 16, "out": 10},
]
NO_AUG = AugmentConfig(affine=False, elastic=False, stroke=False, degrade=False, remnants=False, breaks=False)


def _toy(n=300, seed=0):
    """Ten easy classes: a bright bar at a class-dependent row, plus noise. (N, 1, 16, 16)."""
    rng = np.random.default_rng(seed)
    y = np.arange(n) % 10
    x = 0.2 * rng.random((n, 1, 16, 16), dtype=np.float32)
    for i, c in enumerate(y):
        x[i, 0, c + 3, 2:14] = 1.0
    return x, y.astype(np.int64)


def _cfg(**kw):
    base = dict(epochs=8, batch_size=16, lr=5e-3, val_fraction=0.2, patience=0, augment=NO_AUG, seed=3,
                label_smoothing=0.0)
    base.update(kw)
    return TrainConfig(**base)


def test_stratified_split_is_disjoint_and_balanced():
    y = np.repeat(np.arange(10), 50)
    tr, val = stratified_split(y, 0.1, np.random.default_rng(0))
    assert len(np.intersect1d(tr, val)) == 0 and len(tr) + len(val) == 500
    np.testing.assert_array_equal(np.bincount(y[val]), np.full(10, 5))


def test_learns_a_toy_problem_and_reports_progress():
    x, y = _toy()
    calls = []
    res = train(build_model(TINY, np.random.default_rng(0)), x, y, _cfg(),
                progress=lambda d, t, **f: calls.append((d, t, f)))
    assert res.val_accuracy > 0.9
    assert len(res.history) == 8 and not res.interrupted
    ends = [f for d, t, f in calls if d == t]
    assert [f["epoch"] for f in ends] == list(range(1, 9))
    assert {"loss", "acc", "val_loss", "val_acc"} <= set(ends[-1])
    assert 0.05 <= res.temperature <= 20


def test_same_seed_same_result():
    x, y = _toy()
    cfg = _cfg(epochs=2, augment=AugmentConfig(elastic=False))
    a = train(build_model(TINY, np.random.default_rng(0)), x, y, cfg)
    b = train(build_model(TINY, np.random.default_rng(0)), x, y, cfg)
    for k, v in a.model.state_dict().items():
        np.testing.assert_array_equal(v, b.model.state_dict()[k])


def test_early_stopping_keeps_the_best_weights():
    x, y = _toy()
    # a huge constant learning rate makes validation loss worse after the first epochs
    res = train(build_model(TINY, np.random.default_rng(0)), x, y,
                _cfg(epochs=12, lr=0.5, optimizer="sgd", schedule="constant", patience=2))
    losses = [h["val_loss_t"] for h in res.history]  # the selection criterion
    assert res.stopped_early and len(losses) < 12
    assert res.best_epoch == int(np.argmin(losses)) + 1
    # the kept weights are those of the best epoch: their raw loss is that epoch's raw loss
    assert res.best_val_loss == pytest.approx(res.history[res.best_epoch - 1]["val_loss"], rel=1e-4)
    assert all(h["val_loss_t"] <= h["val_loss"] + 1e-9 for h in res.history)


def test_ctrl_c_keeps_best_weights_and_resume_finishes(tmp_path):
    x, y = _toy()
    ckpt = tmp_path / "run.ckpt"
    cfg = _cfg(epochs=4)
    full = train(build_model(TINY, np.random.default_rng(0)), x, y, cfg)

    def interrupt_in_epoch_3(done, total, **f):
        if f["epoch"] == 3 and done == 2:
            raise KeyboardInterrupt

    part = train(build_model(TINY, np.random.default_rng(0)), x, y, cfg, progress=interrupt_in_epoch_3,
                 checkpoint=ckpt)
    assert part.interrupted and part.epochs_run == 2 and len(part.history) == 2
    assert ckpt.is_file()
    with np.load(ckpt, allow_pickle=False) as npz:  # arrays and JSON only, no pickle
        meta = json.loads(npz["meta.json"].tobytes())
    assert meta["epoch"] == 2
    resumed = train(build_model(TINY, np.random.default_rng(9)), x, y, cfg, checkpoint=ckpt, resume=True)
    assert resumed.epochs_run == 4 and len(resumed.history) == 4
    # the resumed run continues exactly where the interrupted one stopped: same weights as an
    # uninterrupted run (same generator states, optimizer moments, schedule)
    for k, v in full.model.state_dict().items():
        np.testing.assert_allclose(resumed.model.state_dict()[k], v, rtol=1e-5, atol=1e-6)


def test_resume_refuses_other_data_or_settings(tmp_path):
    x, y = _toy()
    ckpt = tmp_path / "run.ckpt"
    train(build_model(TINY, np.random.default_rng(0)), x, y, _cfg(epochs=1), checkpoint=ckpt)
    with pytest.raises(DataError, match="other training data"):
        train(build_model(TINY, np.random.default_rng(0)), x[:-10], y[:-10], _cfg(epochs=2),
              checkpoint=ckpt, resume=True)
    with pytest.raises(DataError, match="other settings"):
        train(build_model(TINY, np.random.default_rng(0)), x, y, _cfg(epochs=2, lr=1e-3),
              checkpoint=ckpt, resume=True)
    with pytest.raises(DataError, match="no checkpoint"):
        train(build_model(TINY, np.random.default_rng(0)), x, y, _cfg(), checkpoint=tmp_path / "none",
              resume=True)


def test_bad_training_data_is_refused(tmp_path):
    x, y = _toy(20)
    with pytest.raises(DataError):
        train(build_model(TINY, np.random.default_rng(0)), x, y[:-1], _cfg())
    with pytest.raises(DataError):
        train(build_model(TINY, np.random.default_rng(0)), x, y + 5, _cfg())
    p = tmp_path / "a.npz"
    np.savez(p, x=np.zeros((3, 20, 20), np.float32), y=np.zeros(3, np.int64))
    with pytest.raises(DataError, match="shape"):
        load_array_file(p)


# --- scikit-learn's digits: the benchmark of its own example ---------------------------------

# A wider CNN on 16x16 inputs (the 8x8 images upscaled bicubically, x2) with affine and mild
# elastic augmentation (sigma 2.5 px, alpha 6: scaled down for 16x16 digits).
DIGITS16 = [
    {"type": "conv2d", "in": 1, "out": 32, "kernel": 3, "padding": 1}, {"type": "relu"},
    {"type": "maxpool", "size": 2},
    {"type": "conv2d", "in": 32, "out": 64, "kernel": 3, "padding": 1}, {"type": "relu"},
    {"type": "maxpool", "size": 2},
    {"type": "flatten"}, {"type": "dense", "in": 1024, "out": 128}, {"type": "relu"},
    {"type": "dropout", "p": 0.3}, {"type": "dense", "in": 128, "out": 10},
]


@pytest.mark.slow
def test_cnn_beats_the_svc_of_scikit_learns_digits_example():
    """Same split as scikit-learn's "Recognizing hand-written digits" example (first half train,
    second half test, no shuffle); its SVC(gamma=0.001) on the raw 8x8 features is the baseline
    (documented there as about 0.97; computed here with scikit-learn as the reference).
    Measured on the development machine: CNN 0.9855 with seed 0 (0.986-0.989 with seeds 1 and 2),
    about 10 s of CPU time."""
    from sklearn.svm import SVC

    images, labels = digits_raw()
    split = digits_split_indices(len(labels))
    tr, te = split["train"], split["test"]
    flat = images.reshape(len(images), -1)
    svc = SVC(gamma=0.001).fit(flat[tr], labels[tr])
    svc_acc = float(np.mean(svc.predict(flat[te]) == labels[te]))
    assert svc_acc == pytest.approx(0.969, abs=0.001)  # the example prints 0.97 (two decimals)

    x = np.clip(upscale_small(images, 2) / 16.0, 0.0, 1.0)[:, None].astype(np.float32)
    cfg = TrainConfig(epochs=50, batch_size=32, lr=2e-3, val_fraction=0.0, patience=0, seed=0, label_smoothing=0.0,
                      augment=AugmentConfig(rotate_deg=10, scale=0.1, shear=0.15, shift_px=1.0,
                                            elastic=True, elastic_alpha=6.0, elastic_sigma=2.5, prob=0.9,
                                            stroke=False, degrade=False, remnants=False, breaks=False))
    t0 = time.monotonic()
    model = build_model(DIGITS16, np.random.default_rng(0))
    train(model, x[tr], labels[tr], cfg)
    cnn_acc = float(np.mean(model.predict_proba(x[te]).argmax(1) == labels[te]))
    print(f"digits: SVC {svc_acc:.4f}, CNN {cnn_acc:.4f} in {time.monotonic() - t0:.0f} s")
    assert cnn_acc > svc_acc
    assert cnn_acc >= 0.980  # measured 0.9855 with this seed; slack for other BLAS builds


def test_two_worker_processes_learn_too():
    # formread.nn.parallel splits each batch over this process and one worker process
    x, y = _toy()
    res = train(build_model(TINY, np.random.default_rng(0)), x, y, _cfg(workers=2))
    assert res.val_accuracy >= 0.85 and len(res.history) == 8


def test_touching_pairs_train_as_no_digit_and_accuracy_counts_digits_only():
    # half of every batch replaced by pairs (label -1, uniform target): training still learns the
    # digits, and its running accuracy is over the digits (it would stay near 0.5 over every image)
    rng = np.random.default_rng(0)
    y = np.arange(300) % 10
    x = 0.1 * rng.random((300, 1, 28, 28), dtype=np.float32)
    for i, c in enumerate(y):
        x[i, 0, 4:24, 2 * c + 4:2 * c + 7] = 1.0          # a bar at a class-dependent column
    arch = [dict(TINY[0]), *TINY[1:4], {**TINY[4], "in": 4 * 14 * 14}, *TINY[5:]]
    cfg = _cfg(epochs=10, augment=AugmentConfig(affine=False, elastic=False, stroke=False, degrade=False,
                                                 remnants=False, breaks=False, pairs=True, pairs_share=0.5))
    res = train(build_model(arch, np.random.default_rng(0)), x, y.astype(np.int64), cfg)
    assert res.val_accuracy > 0.9 and res.history[-1]["acc"] > 0.8
    with pytest.raises(DataError, match="28x28"):
        train(build_model(TINY, np.random.default_rng(0)), *_toy(), cfg)
