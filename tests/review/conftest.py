"""Shared fixtures of the review tests: a small ledger made by review_fixture."""

import shutil

import pytest

from review_fixture import make_ledger


@pytest.fixture(scope="session")
def _ledger_template(tmp_path_factory):
    base = tmp_path_factory.mktemp("review_template")
    info = make_ledger(base / "out")
    return base, info


@pytest.fixture
def ledger(_ledger_template, tmp_path):
    """(outdir, info): a fresh copy of the fixture ledger for each test."""
    base, info = _ledger_template
    out = tmp_path / "out"
    shutil.copytree(base / "out", out)
    layout = tmp_path / "out_layout.toml"
    shutil.copy(info["layout"], layout)
    # the run names the layout by absolute path: point it at this copy
    import sqlite3
    conn = sqlite3.connect(out / "ledger.sqlite", isolation_level=None)
    conn.execute("UPDATE runs SET layout_path = ?", (str(layout),))
    conn.close()
    return out, dict(info, layout=layout)
