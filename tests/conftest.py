"""Fixtures shared across test folders, and the folders of shared test helpers on the import path."""

import shutil
import sqlite3
import sys
from pathlib import Path

import pytest

_HERE = Path(__file__).resolve().parent
for _sub in ("review", "read", "imaging", "cli"):      # review_fixture, fakes, readkit, synth, clikit, ...
    if str(_HERE / _sub) not in sys.path:
        sys.path.insert(0, str(_HERE / _sub))

from review_fixture import make_ledger  # noqa: E402


@pytest.fixture(autouse=True)
def _own_model_store(tmp_path_factory, monkeypatch):
    """Every test gets an empty model store of its own: nothing is ever written to the user's."""
    monkeypatch.setenv("FORMREAD_HOME", str(tmp_path_factory.mktemp("home")))


@pytest.fixture(scope="session")
def _ledger_template(tmp_path_factory):
    base = tmp_path_factory.mktemp("review_template")
    info = make_ledger(base / "out")
    return base, info


@pytest.fixture
def ledger(_ledger_template, tmp_path):
    """(outdir, info): a fresh copy of the review fixture ledger for each test."""
    base, info = _ledger_template
    out = tmp_path / "out"
    shutil.copytree(base / "out", out)
    layout = tmp_path / "out_layout.toml"
    shutil.copy(info["layout"], layout)
    # the run names the layout by absolute path: point it at this copy
    conn = sqlite3.connect(out / "ledger.sqlite", isolation_level=None)
    conn.execute("UPDATE runs SET layout_path = ?", (str(layout),))
    conn.close()
    return out, dict(info, layout=layout)
