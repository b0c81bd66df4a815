"""Hostile cases of the model side: ``train``, ``evaluate``, ``info``, ``retrain``, ``samples`` and ``learn``.

Every training case is refused before a batch is trained (bad settings, data, files), so each one
costs about as much as loading the data it names; none may leave a model file or change the store.
"""

from __future__ import annotations

import json
import os
import shutil

import numpy as np
import pytest
from hostilekit import (
    Case,
    execute,
    model_with_header,
    npz_with,
    params,
    png_bomb,
    samples_folder,
    steps,
    truncated,
    write,
)

FAST = ["--epochs", "1", "--batch-size", "16", "--no-affine", "--no-elastic", "--arch", "lenet5", "--quiet"]


def bars(w, name="bars.npz", n=40, **override):
    """A small good array dataset (class = the row of a bar), with arrays replaced by ``override``."""
    y = np.arange(n) % 10
    x = np.zeros((n, 28, 28), np.float32)
    for i, c in enumerate(y):
        x[i, 2 + 2 * c:4 + 2 * c, 4:24] = 1.0
    arrays = {"x": x, "y": y}
    arrays.update(override)
    return npz_with(w.path(name), **arrays)


def train(*extra, data=None):
    """``formread train`` writing m.npz; ``data(w)`` names the dataset (default: a good npz file)."""
    def build(w):
        ds = data(w) if data is not None else f"npz:{bars(w)}"
        return ["train", "--out", str(w.path("m.npz")), "--dataset", str(ds), *FAST,
                *[str(e(w)) if callable(e) else e for e in extra]]
    return build


def no_model_written(w, res):
    assert not w.path("m.npz").exists()


def _samples(counts, **kw):
    return lambda w: f"samples:{samples_folder(w.path('s'), counts, **kw)}"


def _empty_samples(w):
    w.path("s").mkdir()
    return f"samples:{w.path('s')}"


def _samples_with(make):
    def data(w):
        root = samples_folder(w.path("s"), {0: 5, 1: 5})
        make(root)
        return f"samples:{root}"
    return data


def _checkpoint(content):
    def build(w):
        ckpt = w.path("m.npz.ckpt")
        content(w, ckpt)
        return train("--resume")(w)
    return build


def _in_store(w, name="mine.npz", in_use=True):
    store = w.home / "models"
    store.mkdir(parents=True, exist_ok=True)
    shutil.copy(w.model, store / name)
    if in_use:
        write(store / "in_use.json", json.dumps({"model": name}))
    return store / name


def retrain(*extra, samples=None, model=None):
    def build(w):
        return ["retrain", "--samples", str(samples(w) if samples else w.samples), "--model",
                str(model(w) if model else w.model), "--epochs", "1", "--quiet",
                *[str(e(w)) if callable(e) else e for e in extra]]
    return build


def _manifest(text):
    def make(w):
        write(w.samples / "manifest.jsonl", text)
        return w.samples
    return make


def _samples_cmd(to):
    return lambda w: ["samples", str(w.reviewed), "--to", str(to(w))]


def victim_kept(w, res):
    assert (w.outside / "victim.txt").read_text() == "keep me\n"


def _header(edit, reseal=True, name="h.npz"):
    return lambda w: model_with_header(w, name, edit, reseal=reseal)


def _deep_header(w):
    """A header whose JSON nests 5000 arrays (written as text: json.dumps would refuse it)."""
    with np.load(w.model, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    text = arrays["header.json"].tobytes().decode("utf-8")
    text = text[:-1] + ', "deep": ' + "[" * 5000 + "]" * 5000 + "}"
    arrays["header.json"] = np.frombuffer(text.encode("utf-8"), np.uint8)
    return npz_with(w.path("deep.npz"), **arrays)


def info(model):
    return lambda w: ["info", str(model(w))]


def learn(*extra, runs=None):
    return lambda w: ["learn", *(str(r) for r in (runs(w) if runs else [w.reviewed])), "--model", str(w.model),
                      "--epochs", "1", "--quiet", *[str(e(w)) if callable(e) else e for e in extra]]


def _pointer(text):
    return lambda w: write(w.home / "models" / "in_use.json", text)


CASES = [
    # ------------------------------------------------------------------ train: settings
    *[Case(f"train-{flag.strip('-')}-{value}", train(flag, value), 2, (flag,), after=no_model_written)
      for flag, value in [("--lr", "inf"), ("--lr", "1e30"), ("--lr", "0"), ("--lr", "-0.1"), ("--lr", "nan"),
                          ("--elastic-alpha", "nan"), ("--elastic-sigma", "0"), ("--elastic-sigma", "inf"),
                          ("--weight-decay", "inf"), ("--seed", "-1"), ("--epochs", "0"), ("--epochs", "-3"),
                          ("--batch-size", "0"), ("--val-fraction", "nan"), ("--label-smoothing", "2")]],
    # ------------------------------------------------------------------ train: data
    Case("train-dataset-unknown", train(data=lambda w: "bogus"), 1, ("bogus",), after=no_model_written),
    Case("train-npz-truncated", train(data=lambda w: "npz:" + str(truncated(bars(w), w.path("cut.npz"), 0.5))), 1,
         ("cut.npz",), after=no_model_written),
    Case("train-npz-missing", train(data=lambda w: "npz:" + str(w.path("none.npz"))), 1, ("none.npz", "not found"),
         after=no_model_written),
    Case("train-npz-pickled", train(data=lambda w: "npz:" + str(bars(w, "obj.npz", x=np.array([{}], object)))), 1,
         ("obj.npz",), after=no_model_written),
    Case("train-npz-wrong-shape", train(data=lambda w: "npz:" + str(bars(w, "small.npz", x=np.zeros((40, 8, 8))))),
         1, ("small.npz", "shape"), after=no_model_written),
    Case("train-npz-nan-pixels", train(data=lambda w: "npz:" + str(bars(w, "nan.npz", x=np.full((40, 28, 28),
                                                                                              np.nan)))),
         1, ("nan.npz", "finite"), after=no_model_written),
    Case("train-npz-bad-labels", train(data=lambda w: "npz:" + str(bars(w, "lab.npz", y=np.full(40, 42)))), 1,
         ("lab.npz", "labels"), after=no_model_written),
    Case("train-npz-no-images", train(data=lambda w: "npz:" + str(bars(w, "none.npz", x=np.zeros((0, 28, 28)),
                                                                       y=np.zeros(0, np.int64))))
         , 1, ("none.npz",), after=no_model_written),
    Case("train-samples-empty", train(data=_empty_samples),
         1, ("empty",), after=no_model_written),
    Case("train-samples-single-class", train(data=_samples({3: 8})), 1, ("unbalanced", "only digit 3"),
         after=no_model_written),
    Case("train-samples-non-image", train(data=_samples_with(lambda r: write(r / "0" / "x.png", "not a png"))), 1,
         ("x.png", "not a readable image"), after=no_model_written),
    Case("train-samples-bomb", train(data=_samples_with(lambda r: png_bomb(r / "1" / "bomb.png"))), 1,
         ("bomb.png",), after=no_model_written),
    Case("train-samples-text-file", train(data=_samples_with(lambda r: write(r / "1" / "notes.txt", "x"))), 1,
         ("notes.txt",), after=no_model_written),
    # ------------------------------------------------------------------ train: files
    Case("train-out-is-a-folder", lambda w: train()(w)[:1] + ["--out", str(w.samples)] + train()(w)[3:], 1,
         ("samples",)),
    Case("train-out-under-a-file", lambda w: train()(w)[:1] + ["--out", str(w.layout / "m.npz")] + train()(w)[3:],
         1, ("layout.toml",)),
    Case("train-resume-truncated-checkpoint", _checkpoint(lambda w, p: truncated(bars(w), p, 0.5)), 1,
         ("m.npz.ckpt",), after=no_model_written),
    Case("train-resume-garbage-checkpoint", _checkpoint(lambda w, p: write(p, os.urandom(300))), 1,
         ("m.npz.ckpt",), after=no_model_written),
    Case("train-resume-foreign-checkpoint", _checkpoint(lambda w, p: shutil.copy(w.model, p)), 1, ("m.npz.ckpt",),
         after=no_model_written),
    Case("train-resume-without-checkpoint", _checkpoint(lambda w, p: None), 1, ("m.npz.ckpt",),
         after=no_model_written),
    # ------------------------------------------------------------------ evaluate and info
    Case("evaluate-model-garbage", lambda w: ["evaluate", str(write(w.path("g.npz"), os.urandom(64)))], 1,
         ("g.npz",)),
    Case("evaluate-part-bogus", lambda w: ["evaluate", str(w.model), "--dataset", f"npz:{bars(w)}", "--part", "x"],
         2, ("--part", "'x'")),
    Case("evaluate-npy-named-npz", lambda w: ["evaluate", str(w.model), "--dataset", "npz:" + str(_npy(w))], 1,
         ("plain.npz",)),
    Case("train-resume-npy-checkpoint", _checkpoint(lambda w, p: _npy(w, p)), 1, ("m.npz.ckpt",),
         after=no_model_written),
    Case("evaluate-npz-truncated", lambda w: ["evaluate", str(w.model), "--dataset",
                                              "npz:" + str(truncated(bars(w), w.path("cut.npz"), 0.4))], 1,
         ("cut.npz",)),
    Case("info-missing", info(lambda w: w.path("gone.npz")), 1, ("gone.npz", "no such")),
    Case("info-zero-byte", info(lambda w: write(w.path("z.npz"), b"")), 1, ("z.npz", "empty")),
    Case("info-pickled", info(lambda w: npz_with(w.path("p.npz"), **{"header.json": np.array([{}], object)})), 1,
         ("p.npz",)),
    Case("info-temperature-edited", info(_header(lambda h: h.update(temperature=0.5), reseal=False)), 1,
         ("h.npz", "checksum")),
    Case("info-string-temperature", info(_header(lambda h: h.update(temperature="warm"))), 1,
         ("h.npz", "temperature")),
    Case("info-nan-temperature", info(_header(lambda h: h.update(temperature=None))), 1, ("h.npz", "temperature")),
    Case("info-version-1e30", info(_header(lambda h: h.update(format_version=10 ** 30))), 1,
         ("h.npz", "version")),
    Case("info-400-digit-input-size", info(_header(lambda h: h["input"].update(size=int("9" * 400)))), 1,
         ("h.npz", "input size")),
    Case("info-5000-nested-header", info(_deep_header), 1, ("deep.npz",)),
    Case("info-labels-not-a-list", info(_header(lambda h: h.update(labels="0123456789"))), 1, ("h.npz", "labels")),
    Case("info-in-use-garbage", steps(_pointer("]]"), lambda w: ["info"]), 1, ("in_use.json", "not a pointer")),
    Case("info-in-use-outside-store", steps(_pointer(json.dumps({"model": "../../outside/victim.txt"})),
                                            lambda w: ["info"]), 1, ("in_use.json", "not a model file of the store"),
         after=victim_kept),
    # ------------------------------------------------------------------ retrain
    Case("retrain-margin-nan", retrain("--margin", "nan"), 2, ("--margin",)),
    Case("retrain-min-gain-nan", retrain("--min-gain", "nan"), 2, ("--min-gain",)),
    Case("retrain-epochs-zero", retrain("--epochs", "0"), 2, ("--epochs",)),
    Case("retrain-out-is-the-model-in-use", lambda w: retrain("--out", _in_store(w), model=lambda w: w.model)(w), 1,
         ("mine.npz", "model in use")),
    Case("retrain-out-is-the-shipped-model", lambda w: retrain("--out", _shipped)(w), 1, ("model in use",)),
    Case("retrain-out-is-its-parent", lambda w: retrain("--out", w.model)(w), 1, ("tiny.npz", "model in use")),
    Case("retrain-too-few-samples", retrain(), 1, ("samples", "only 12 local samples")),
    Case("retrain-samples-missing", retrain(samples=lambda w: w.path("nothing")), 1, ("nothing", "not found")),
    Case("retrain-samples-bomb", retrain(samples=lambda w: png_bomb(w.samples / "1" / "bomb.png").parent.parent), 1,
         ("bomb.png",)),
    Case("retrain-model-corrupt", retrain(model=lambda w: truncated(w.model, w.path("cut.npz"))), 1, ("cut.npz",)),
    Case("retrain-model-ensemble-of-none", retrain(model=lambda w: npz_with(w.path("e.npz"), x=np.ones(2))), 1,
         ("e.npz",)),
    Case("retrain-in-use-garbage", steps(_pointer("{"), lambda w: ["retrain", "--samples", str(w.samples), "--epochs",
                                                                    "1", "--quiet"]), 1, ("in_use.json",)),
    # ------------------------------------------------------------------ samples
    Case("samples-no-ledger", lambda w: ["samples", str(w.samples), "--to", str(w.path("s"))], 1, ("ledger",)),
    Case("samples-to-is-a-file", _samples_cmd(lambda w: w.layout), 1, ("layout.toml", "a file is in its place"),
         ledger="same",
         where="reviewed"),
    Case("samples-manifest-traversal", _samples_cmd(_manifest(json.dumps({"file": "../victim.txt", "digit": 1})
                                                              + "\n")), 1, ("manifest.jsonl", "victim.txt"),
         after=victim_kept, ledger="same", where="reviewed"),
    Case("samples-manifest-non-utf8", _samples_cmd(_manifest(b'{"file": "1/caf\xe9.png", "digit": 1}\n')), 1,
         ("manifest.jsonl", "UTF-8"), ledger="same", where="reviewed"),
    Case("samples-manifest-garbage", _samples_cmd(_manifest("{{{\n")), 1, ("manifest.jsonl", "line 1"),
         ledger="same", where="reviewed"),
    Case("samples-manifest-deep-json", _samples_cmd(_manifest("[" * 8000 + "]" * 8000 + "\n")), 1,
         ("manifest.jsonl", "line 1"), ledger="same", where="reviewed"),
    Case("samples-to-read-only", _samples_cmd(lambda w: w.freeze(w.samples)), 1, ("samples",), ledger="same",
         where="reviewed"),
    # ------------------------------------------------------------------ learn
    Case("learn-no-ledger", learn(runs=lambda w: [w.samples]), 1, ("samples", "ledger")),
    Case("learn-ledger-garbage", learn(runs=lambda w: [write(w.out / "ledger.sqlite", os.urandom(2048)).parent]), 1,
         ("ledger.sqlite",), ledger="same"),
    Case("learn-nothing-reviewed", learn(runs=lambda w: [w.out]), 1, ("out",), ledger="same"),
    Case("learn-target-nan", learn("--target", "nan"), 2, ("--target",), ledger="same", where="reviewed"),
    Case("learn-truth-count-mismatch", learn("--truth", lambda w: write(w.path("t.jsonl"), ""), "--truth",
                                             lambda w: w.path("t.jsonl")), 1, ("truth",), ledger="same",
         where="reviewed"),
]


def _npy(w, path=None):
    """A plain .npy array saved under an .npz name (np.load gives an array, not an archive)."""
    path = path or w.path("plain.npz")
    with open(path, "wb") as f:
        np.save(f, np.zeros((3, 28, 28), np.float32))
    return path


def _shipped(w):
    from formread.store import shipped_model

    return shipped_model()


@pytest.mark.parametrize("case", params(CASES))
def test_case(case, world):
    execute(case, world)
