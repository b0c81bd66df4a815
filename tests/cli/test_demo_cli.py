"""``formread demo`` (no arguments needed) and ``formread demo make``."""

import json
import shutil
import sys
from pathlib import Path

from typer.testing import CliRunner

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "read"))   # the reading tests' helpers
from readkit import _base_pages, demo_layout, tiny_model, write_copies  # noqa: E402

import formread.store  # noqa: E402
from formread.cli.main import app  # noqa: E402

runner = CliRunner()
SUMMARY_KEYS = {"pages", "fields", "accepted", "review", "wrong_accepted", "error_among_accepted", "review_rate",
                "field_accuracy_before_review"}


def _small_demo(tmp_path: Path) -> Path:
    """A 3-page demo folder (copies of the shipped pages, with their truth) standing in for demo_forms/."""
    folder = tmp_path / "demo_forms"
    base = _base_pages(3)
    write_copies(folder, 3, prefix="card")
    shutil.copy(demo_layout(), folder / "layout.toml")
    shipped = {(r["source"], r["page_number"]): r["fields"] for r in
               map(json.loads, (formread.store.demo_forms() / "truth.jsonl").read_text().splitlines())}
    (folder / "truth.jsonl").write_text("".join(
        json.dumps({"source": f"card_{i:03d}.png", "page_number": 1,
                    "fields": shipped[(Path(p.source).name, p.page_number)]}) + "\n" for i, p in enumerate(base)))
    (folder / "README.md").write_text("notes about the demo\n")
    return folder


def test_demo_reads_scores_and_tells_where_outputs_are(tmp_path, monkeypatch):
    folder = _small_demo(tmp_path)
    models = tmp_path / "models"
    models.mkdir()
    tiny_model(models / "default.npz")
    monkeypatch.setattr(formread.store, "demo_forms", lambda: folder)
    monkeypatch.setenv("FORMREAD_MODELS", str(models))
    monkeypatch.chdir(tmp_path)
    res = runner.invoke(app, ["demo", "--workers", "1", "-q"])
    assert res.exit_code == 0, res.output
    for words in ("pages scored", "accepted", "sent to review", "wrong among accepted", "error among accepted",
                  "review rate", "field accuracy before review", "formread-demo-out"):
        assert words in res.stdout
    assert (tmp_path / "formread-demo-out" / "ledger.sqlite").is_file()
    res = runner.invoke(app, ["demo", "--json", "--out", str(tmp_path / "o2"), "--workers", "1", "-q"])
    assert res.exit_code == 0, res.output
    s = json.loads(res.stdout)
    assert SUMMARY_KEYS <= set(s) and s["pages"] == 3 and s["fields"] == 18
    # the same keys as `formread score --json`
    score = runner.invoke(app, ["score", str(tmp_path / "o2"), "--truth", str(folder / "truth.jsonl"), "--json"])
    assert set(json.loads(score.stdout)) == set(s)


def test_demo_without_its_forms_is_a_one_line_error(tmp_path, monkeypatch):
    monkeypatch.setattr(formread.store, "demo_forms", lambda: tmp_path / "nothing")
    (tmp_path / "nothing").mkdir()
    res = runner.invoke(app, ["demo", "--out", str(tmp_path / "o")])
    assert res.exit_code == 1 and "demo forms are missing" in res.stderr


def test_demo_make_writes_a_fresh_set(tmp_path):
    out = tmp_path / "fresh"
    res = runner.invoke(app, ["demo", "make", "--count", "1", "--seed", "11", str(out), "-q"])
    assert res.exit_code == 0, res.output
    truth = (out / "truth.jsonl").read_text().splitlines()
    assert len(truth) == 1 and (out / "layout.toml").is_file()
    for rec in map(json.loads, truth):
        assert (out / rec["source"]).is_file()
    # a folder holding something else is refused with one line
    other = tmp_path / "other"
    other.mkdir()
    (other / "mine.txt").write_text("keep me")
    res = runner.invoke(app, ["demo", "make", "--count", "1", str(other), "-q"])
    assert res.exit_code == 1 and (other / "mine.txt").read_text() == "keep me"


def test_the_shipped_demo_runs_with_no_arguments(tmp_path, monkeypatch):
    """The real thing: shipped demo forms, shipped model, default options (output in the current folder)."""
    monkeypatch.chdir(tmp_path)
    truth = (formread.store.demo_forms() / "truth.jsonl").read_text().splitlines()
    res = runner.invoke(app, ["demo", "--json", "-q"])
    assert res.exit_code == 0, res.output                      # every shipped page registered and read
    s = json.loads(res.stdout)
    assert s["pages"] == len(truth) and s["fields"] == 6 * len(truth)
    assert s["truth_pages_not_read"] == 0 and s["accepted"] + s["review"] == s["fields"]
    assert 0.0 <= s["error_among_accepted"] <= 1.0 and s["digit_accuracy"] > 0.5
    assert (tmp_path / "formread-demo-out" / "readings.csv").is_file()
