"""Hostile cases of ``formread demo`` (read and score the shipped forms) and ``formread demo make``,
and of ``formread info``'s listing of a damaged model store."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from hostilekit import Case, execute, model_with_header, params, sqlite_file, write


def make(*extra, out=None):
    return lambda w: ["demo", "make", str(out(w) if out else w.path("demo")), "--count", "1", "--quiet",
                      *[str(e(w)) if callable(e) else e for e in extra]]


def nothing_made(w, res):
    assert not w.path("demo").exists() or not any(w.path("demo").iterdir())


def _store_with(w, name, data):
    (w.home / "models").mkdir(parents=True, exist_ok=True)
    return write(w.home / "models" / name, data)


def _listed(*words):
    def after(w, res):
        for word in words:
            assert word in res.out, res.out
    return after


def _non_empty(w):
    write(w.path("demo") / "mine.txt", "my notes")
    return w.path("demo")


def _garbage_store_model(w):
    _store_with(w, "broken.npz", os.urandom(300))
    return ["info"]


def _tampered_store_model(w):
    p = model_with_header(w, "warm.npz", lambda h: h.update(temperature=3.0), reseal=False)
    _store_with(w, "warm.npz", p.read_bytes())
    return ["info"]


def _in_use_missing(w):
    _store_with(w, "in_use.json", json.dumps({"model": "gone.npz"}))
    return ["info"]


def _mkdir(p):
    p.mkdir()
    return p


def _home_is_a_file(w):
    w.home = write(w.path("home-file"), "not a folder")
    return ["info"]


CASES = [
    Case("demo-make-into-a-file", make(out=lambda w: write(w.path("f"), "x")), 1, ("f", "not a folder")),
    Case("demo-make-non-empty-folder", make(out=_non_empty), 1, ("demo", "not empty")),
    Case("demo-make-count-zero", lambda w: make()(w)[:3] + ["--count", "0", "--quiet"], 1, ("count",),
         after=nothing_made),
    Case("demo-make-count-negative", lambda w: make()(w)[:3] + ["--count", "-4", "--quiet"], 1, ("count",),
         after=nothing_made),
    Case("demo-make-count-a-billion", lambda w: make()(w)[:3] + ["--count", str(10 ** 9), "--quiet"], 1,
         ("count",), after=nothing_made),
    Case("demo-make-count-letters", lambda w: make()(w)[:3] + ["--count", "ten", "--quiet"], 2, ("--count",)),
    Case("demo-make-seed-negative", make("--seed", "-1"), 1, ("seed",), after=nothing_made),
    Case("demo-make-style-bogus", make("--style", "crayon"), 2, ("--style", "crayon"), after=nothing_made),
    Case("demo-make-form-bogus", make("--form", "invoice"), 2, ("--form", "invoice"), after=nothing_made),
    Case("demo-make-half-c", make("--half", "c"), 2, ("--half",), after=nothing_made),
    Case("demo-make-truth-of-another-kind", make(out=lambda w: write(w.path("demo") / "truth.jsonl", "{oops\n")
                                                 .parent), 1, ("truth.jsonl",)),
    Case("demo-out-is-a-file", lambda w: ["demo", "--out", str(write(w.path("f"), "x")), "--workers", "1", "--quiet"],
         1, ("f",)),
    Case("demo-out-foreign-ledger", lambda w: ["demo", "--out", str(sqlite_file(
        w.path("d") / "ledger.sqlite", "CREATE TABLE t (a)").parent), "--workers", "1", "--quiet"], 1,
         ("ledger.sqlite",)),
    Case("demo-out-newer-ledger", lambda w: ["demo", "--out", str(sqlite_file(
        w.reviewed / "ledger.sqlite", "PRAGMA user_version = 12").parent), "--workers", "1", "--quiet"], 1,
         ("ledger.sqlite", "12"), ledger="same", where="reviewed"),
    Case("demo-make-under-a-file", make(out=lambda w: w.layout / "demo"), 1, ("layout.toml", "is a file")),
    Case("demo-make-read-only-folder", make(out=lambda w: w.freeze(_mkdir(w.path("demo")))), 1, ("demo",)),
    Case("demo-make-deep-truth", make(out=lambda w: write(w.path("demo") / "truth.jsonl", "[" * 5000 + "]" * 5000
                                                          + "\n").parent), 1, ("truth.jsonl",)),
    Case("demo-workers-zero", lambda w: ["demo", "--out", str(w.path("d")), "--workers", "0", "--quiet"], (1, 2),
         ("workers",)),
    Case("info-store-model-garbage", _garbage_store_model, 0, after=_listed("broken.npz", "unreadable")),
    Case("info-store-model-tampered", _tampered_store_model, 0, after=_listed("warm.npz", "checksum")),
    Case("info-in-use-missing", _in_use_missing, (0, 1), ("gone.npz",)),
    Case("info-home-is-a-file", _home_is_a_file, (0, 1), proc=True),
    Case("info-json-of-damaged", lambda w: ["info", str(write(w.path("x.npz"), np.zeros(3).tobytes())), "--json"],
         1, ("x.npz",)),
]


@pytest.mark.parametrize("case", params(CASES))
def test_case(case, world):
    execute(case, world)
