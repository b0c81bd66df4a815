"""Fixtures of the hostile-case suite (each case's World) and its session-end summary by command."""

from __future__ import annotations

import os
import re
import shutil
import sys
from collections import Counter
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from hostilekit import World, copy_out, demo_layout, samples_folder, tiny_model, write_copies  # noqa: E402


@pytest.fixture(scope="session")
def _hostile_template(tmp_path_factory):
    """A tiny model, one good page, and an output folder of two pages read with them (made once)."""
    from formread.read.batch import read_batch

    base = tmp_path_factory.mktemp("hostile_template")
    model = tiny_model(base / "tiny.npz")
    pages = write_copies(base / "scans", 2)
    old = os.environ.get("FORMREAD_HOME")
    os.environ["FORMREAD_HOME"] = str(base / "home")
    try:
        read_batch(pages, demo_layout(), base / "out", bundle=model, workers=1)
    finally:
        if old is None:
            os.environ.pop("FORMREAD_HOME", None)
        else:
            os.environ["FORMREAD_HOME"] = old
    samples_folder(base / "samples", {0: 6, 1: 6})
    return {"model": model, "page": pages[0], "out": base / "out", "samples": base / "samples"}


@pytest.fixture
def world(_hostile_template, ledger, tmp_path):
    """The case's World: its own copies of the good things, an empty model store, a guarded folder beside it."""
    t = _hostile_template
    root = tmp_path / "case"
    root.mkdir()
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "victim.txt").write_text("keep me\n")
    shutil.copy(t["model"], root / "tiny.npz")
    shutil.copy(demo_layout(), root / "layout.toml")
    shutil.copy(t["page"], root / "page.png")
    reviewed, info = ledger
    w = World(root=root, model=root / "tiny.npz", layout=root / "layout.toml", page=root / "page.png",
              out=copy_out(t["out"], root / "out"), reviewed=reviewed, reviewed_layout=info["layout"],
              samples=copy_out(t["samples"], root / "samples"), home=Path(os.environ["FORMREAD_HOME"]),
              outside=outside)
    yield w
    w.thaw()


# ------------------------------------------------------------------------------------------ summary

_ID = re.compile(r"\[([^\]]+)\]$")
_results: dict[str, Counter] = {}


def _command(nodeid: str) -> str:
    """The case's command (its id's prefix), else the module's subject (test_hostile_<subject>.py)."""
    m = _ID.search(nodeid)
    if m and "::test_case[" in nodeid:
        return m.group(1).split("-", 1)[0]
    module = nodeid.split("::", 1)[0].rsplit("/", 1)[-1]
    return module.removeprefix("test_hostile_").removesuffix(".py")


def pytest_runtest_logreport(report):
    if "tests/hostile/" not in report.nodeid.replace(os.sep, "/") and not report.nodeid.startswith("test_"):
        return
    if report.when == "call" or (report.when == "setup" and report.outcome != "passed"):
        c = _results.setdefault(_command(report.nodeid), Counter())
        c["run"] += 1
        c[report.outcome] += 1


def pytest_terminal_summary(terminalreporter):
    if not _results:
        return
    total = sum((c for c in _results.values()), Counter())
    terminalreporter.write_sep("-", f"hostile cases: {total['run']} run, {total['passed']} passed, "
                                    f"{total['failed']} failed, {total['skipped']} skipped")
    for cmd in sorted(_results):
        c = _results[cmd]
        terminalreporter.write_line(f"  {cmd:<10} {c['run']:>4} run {c['passed']:>4} passed"
                                    + (f" {c['failed']:>3} failed" if c["failed"] else ""))
