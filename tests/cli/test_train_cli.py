"""``formread train / evaluate / info``: exit codes, one-line errors, Ctrl-C and resume, the card."""

import json
import shutil

import numpy as np
import pytest
from clikit import one_line_error as _one_line_error
from PIL import Image
from typer.testing import CliRunner

from formread.cli.main import app
from formread.nn.model import Sequential
from formread.nn.modelfile import load_model
from formread.store import store_dir

runner = CliRunner()
FAST = ["--arch", "lenet5", "--epochs", "2", "--batch-size", "32", "--no-affine", "--no-elastic",
        "--val-fraction", "0.2", "--quiet"]


@pytest.fixture(scope="module")
def arrays(tmp_path_factory):
    """120 easy labelled 28x28 images as an npz dataset (class = position of a bar)."""
    rng = np.random.default_rng(0)
    y = np.arange(120) % 10
    x = 0.1 * rng.random((120, 28, 28), dtype=np.float32)
    for i, c in enumerate(y):
        x[i, 2 + 2 * c:4 + 2 * c, 4:24] = 1.0
    p = tmp_path_factory.mktemp("arr") / "bars.npz"
    np.savez(p, x=x, y=y)
    return p


def _samples(root, counts, suffix=".png"):
    for d, n in counts.items():
        (root / str(d)).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            a = np.zeros((20, 16), np.uint8)
            a[3:17, 6 + (i % 3):9 + (i % 3)] = 255
            Image.fromarray(a).save(root / str(d) / f"s{i}{suffix}")
    return root


def test_help_lists_the_commands():
    res = runner.invoke(app, ["--help"])
    assert res.exit_code == 0
    for cmd in ("train", "evaluate", "info"):
        assert cmd in res.output


def test_unknown_dataset(tmp_path):
    _one_line_error(runner.invoke(app, ["train", "--dataset", "nosuch", "--out", str(tmp_path / "m.npz")]),
                    "unknown dataset")


def test_empty_samples_folder(tmp_path):
    (tmp_path / "s").mkdir()
    _one_line_error(runner.invoke(app, ["train", "--dataset", f"samples:{tmp_path / 's'}",
                                        "--out", str(tmp_path / "m.npz")]), "empty")


def test_unbalanced_samples_folder(tmp_path):
    root = _samples(tmp_path / "s", {1: 40, 2: 1})
    _one_line_error(runner.invoke(app, ["train", "--dataset", f"samples:{root}", "--out",
                                        str(tmp_path / "m.npz")]), "unbalanced")


def test_non_image_in_samples_folder(tmp_path):
    root = _samples(tmp_path / "s", {1: 3, 2: 3})
    (root / "2" / "note.png").write_text("not an image")
    _one_line_error(runner.invoke(app, ["train", "--dataset", f"samples:{root}", "--out",
                                        str(tmp_path / "m.npz")]), "note.png", "not a readable image")


def test_wrong_size_array(tmp_path):
    p = tmp_path / "bad.npz"
    np.savez(p, x=np.zeros((5, 32, 32), np.float32), y=np.zeros(5, np.int64))
    _one_line_error(runner.invoke(app, ["train", "--dataset", f"npz:{p}", "--out", str(tmp_path / "m.npz")]),
                    "bad.npz", "shape")
    q = tmp_path / "short.npz"
    np.savez(q, x=np.zeros((5, 28, 28), np.float32), y=np.zeros(4, np.int64))
    _one_line_error(runner.invoke(app, ["evaluate", str(q), "--dataset", f"npz:{q}"]), "short.npz")


@pytest.mark.parametrize("flag,value", [("--optimizer", "nosuch"), ("--schedule", "sometimes"),
                                        ("--arch", "lenet6"), ("--lr", "inf"), ("--lr", "0"), ("--epochs", "0"),
                                        ("--elastic-sigma", "0"), ("--seed", "-1"), ("--weight-decay", "nan")])
def test_a_bad_setting_is_a_usage_error_naming_it(tmp_path, arrays, flag, value):
    # a bad choice or a value out of range is the command line's fault: exit 2, nothing trained or written
    res = runner.invoke(app, ["train", "--dataset", f"npz:{arrays}", "--out", str(tmp_path / "m.npz"), flag, value])
    assert res.exit_code == 2, res.output
    assert flag in res.stderr and not (tmp_path / "m.npz").exists()


def test_help_lists_the_choices():
    res = runner.invoke(app, ["train", "--help"], terminal_width=200)
    assert res.exit_code == 0
    for choice in ("adam", "sgd", "cosine", "lenet5", "wide"):
        assert choice in res.output


def test_train_evaluate_info_and_listing(tmp_path, arrays, monkeypatch):
    out = tmp_path / "models" / "bars.npz"
    res = runner.invoke(app, ["train", "--dataset", f"npz:{arrays}", "--out", str(out), "--seed", "4"] + FAST)
    assert res.exit_code == 0, res.output
    assert out.is_file() and not out.with_name(out.name + ".ckpt").exists()
    model, header = load_model(out)
    assert header["seed"] == 4 and header["training"]["n_validation"] == 20
    assert header["training"]["command"].startswith("formread train")

    res = runner.invoke(app, ["evaluate", str(out), "--dataset", f"npz:{arrays}", "--json"])
    assert res.exit_code == 0, res.output
    rep = json.loads(res.stdout)
    assert rep["n"] == 120 and len(rep["confusion"]) == 10 and 0 <= rep["ece"] <= 1
    assert rep["temperature"] == pytest.approx(header["temperature"])
    res = runner.invoke(app, ["evaluate", str(out), "--dataset", f"npz:{arrays}"])
    assert "precision" in res.output and "confusion" in res.output

    res = runner.invoke(app, ["info", str(out)])
    assert res.exit_code == 0
    for word in ("lenet5", "temperature", "sha256", header["sha256"], "verified", "seed:         4"):
        assert word in res.output

    store = store_dir()
    store.mkdir(parents=True)
    shutil.copy(out, store / "bars.npz")
    (store / "junk.npz").write_bytes(b"nope")
    (store / "in_use.json").write_text(json.dumps({"model": "gone.npz"}))
    res = runner.invoke(app, ["info"])
    assert res.exit_code == 0
    assert "bars.npz" in res.output and "junk.npz" in res.output and "gone.npz) is missing" in res.output
    assert str(store) in res.output and "shipped default.npz" in res.output
    (store / "in_use.json").write_text(json.dumps({"model": "bars.npz"}))
    res = runner.invoke(app, ["info"])
    assert "* bars.npz" in res.output and "missing" not in res.output
    (store / "in_use.json").write_text("garbage")                 # never ignored silently
    _one_line_error(runner.invoke(app, ["info"]), "in_use.json", "not a pointer")


def test_info_on_a_damaged_file(tmp_path):
    p = tmp_path / "m.npz"
    p.write_bytes(b"\0" * 10)
    _one_line_error(runner.invoke(app, ["info", str(p)]), "m.npz")


def test_ctrl_c_saves_best_then_resume_finishes(tmp_path, arrays, monkeypatch):
    out = tmp_path / "m.npz"
    ckpt = out.with_name(out.name + ".ckpt")
    args = ["train", "--dataset", f"npz:{arrays}", "--out", str(out)] + FAST[:3] + ["4"] + FAST[4:]
    real = Sequential.grad_step
    calls = {"n": 0}

    def stop_in_second_epoch(self, *a, **k):
        calls["n"] += 1
        if calls["n"] == 5:  # 96 training images / 32 = 3 batches per epoch
            raise KeyboardInterrupt
        return real(self, *a, **k)

    monkeypatch.setattr(Sequential, "grad_step", stop_in_second_epoch)
    res = runner.invoke(app, args)
    assert res.exit_code == 130, res.output
    assert out.is_file() and ckpt.is_file()
    assert load_model(out)[1]["training"]["interrupted"] is True
    monkeypatch.setattr(Sequential, "grad_step", real)
    res = runner.invoke(app, args + ["--resume"])
    assert res.exit_code == 0, res.output
    header = load_model(out)[1]
    assert header["training"]["epochs_run"] == 4 and header["training"]["interrupted"] is False
    assert not ckpt.exists()


def test_train_without_validation_split(tmp_path, arrays):
    out = tmp_path / "m.npz"
    args = ["train", "--dataset", f"npz:{arrays}", "--out", str(out)] + FAST[:-3] + ["--val-fraction", "0", "-q"]
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    _, header = load_model(out)
    assert header["temperature"] == 1.0 and header["metrics"]["validation"]["accuracy"] is None
    res = runner.invoke(app, ["info", str(out), "--json"])
    assert json.loads(res.stdout)["sha256"] == header["sha256"]


def test_pen_and_scanner_flags_reach_the_recipe_and_its_command(tmp_path, arrays):
    # on by default (the shipped recipe); each can be turned off, and the command spells out both
    out = tmp_path / "pens.npz"
    res = runner.invoke(app, ["train", "--dataset", f"npz:{arrays}", "--out", str(out), "--seed", "2"] + FAST)
    assert res.exit_code == 0, res.output
    _, header = load_model(out)
    cmd = header["training"]["command"].split()
    assert all(f"--{k}" in cmd for k in ("stroke", "degrade", "remnants", "breaks"))
    assert all(header["training"]["config"]["augment"][k] for k in ("stroke", "degrade", "remnants", "breaks"))
    plain = tmp_path / "plain.npz"
    res = runner.invoke(app, ["train", "--dataset", f"npz:{arrays}", "--out", str(plain), "--no-stroke",
                              "--no-degrade", "--no-remnants", "--no-breaks"] + FAST)
    assert res.exit_code == 0, res.output
    plain_header = load_model(plain)[1]
    plain_cmd = plain_header["training"]["command"].split()
    assert all(f"--no-{k}" in plain_cmd and f"--{k}" not in plain_cmd
               for k in ("stroke", "degrade", "remnants", "breaks"))
    assert not any(plain_header["training"]["config"]["augment"][k] for k in ("stroke", "degrade", "remnants",
                                                                                "breaks"))
