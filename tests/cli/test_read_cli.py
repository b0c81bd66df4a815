"""``formread read / score / tune``: exit codes, one-line errors, and nothing already saved ever lost."""

import json
import sqlite3
import sys
from pathlib import Path

import pytest
from clikit import one_line_error as _one_line_error
from typer.testing import CliRunner

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "read"))   # the reading tests' helpers
from readkit import demo_layout, readings, tiny_model, write_copies  # noqa: E402

from formread.cli.main import app  # noqa: E402
from formread.form.layout import load_layout  # noqa: E402
from formread.store import demo_forms as demo_dir  # noqa: E402

runner = CliRunner()


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """Three good pages plus a note in one folder, read once into ``out`` (kept for the tests below)."""
    base = tmp_path_factory.mktemp("read_cli")
    model = tiny_model(base / "tiny.npz")
    scans = base / "scans"
    write_copies(scans, 3)
    (scans / "notes.txt").write_text("not a page")
    out = base / "out"
    res = runner.invoke(app, ["read", str(scans), "--layout", str(demo_layout()), "--model", str(model),
                              "--out", str(out), "--workers", "1", "--quiet"])
    return {"base": base, "model": model, "scans": scans, "out": out, "first": res}


def _pages(out):
    conn = sqlite3.connect(out / "ledger.sqlite")
    try:
        return conn.execute("SELECT count(*) FROM pages").fetchone()[0]
    finally:
        conn.close()


def test_folder_with_a_non_scan_exits_3_and_reads_the_rest(setup):
    res = setup["first"]
    assert res.exit_code == 3, res.output
    assert "3 read" in res.stdout and "1 failed" in res.stdout
    assert "notes.txt" in res.stdout and "not a scan" in res.stdout
    assert _pages(setup["out"]) == 4
    # only scans: exit 0, and a rerun of it skips every page
    pngs = sorted(str(p) for p in setup["scans"].glob("*.png"))
    args = ["read", *pngs, "--layout", str(demo_layout()), "--model", str(setup["model"]),
            "--out", str(setup["base"] / "clean"), "--workers", "1", "--quiet"]
    assert runner.invoke(app, args).exit_code == 0
    again = runner.invoke(app, args)
    assert again.exit_code == 0 and "3 already in the ledger" in again.stdout


def _bad_layout(tmp_path, extra: str) -> Path:
    p = tmp_path / "bad.toml"
    p.write_text(demo_layout().read_text() + "\n" + extra + "\n")
    return p


@pytest.mark.parametrize("extra, words", [
    ('[[relations]]\nrule = "litres_used = current_reading - meter_number"', ["bad.toml", "meter_number"]),
    ('[[relations]]\nrule = "litres_used = = current_reading -"', ["bad.toml", "relation"]),
])
def test_bad_rules_stop_before_anything_is_read(setup, tmp_path, extra, words):
    before = readings(setup["out"])
    for out in (tmp_path / "new_out", setup["out"]):
        res = runner.invoke(app, ["read", str(setup["scans"]), "--layout", str(_bad_layout(tmp_path, extra)),
                                  "--model", str(setup["model"]), "--out", str(out), "--workers", "1", "-q"])
        _one_line_error(res, *words)
    assert not (tmp_path / "new_out").exists()                      # nothing read, nothing made
    assert readings(setup["out"]) == before                         # nothing lost


def test_unusable_output_folder_is_a_one_line_error(setup, tmp_path):
    f = tmp_path / "a_file"
    f.write_text("x")
    for out in (f, f / "below"):
        res = runner.invoke(app, ["read", str(setup["scans"]), "--layout", str(demo_layout()),
                                  "--model", str(setup["model"]), "--out", str(out), "--workers", "1", "-q"])
        _one_line_error(res, "a_file")
    # a file posing as the ledger is refused and left as it was
    d = tmp_path / "d"
    d.mkdir()
    (d / "ledger.sqlite").write_bytes(b"precious, not a database" * 64)
    res = runner.invoke(app, ["read", str(setup["scans"]), "--layout", str(demo_layout()),
                              "--model", str(setup["model"]), "--out", str(d), "--workers", "1", "-q"])
    _one_line_error(res, "ledger.sqlite")
    assert (d / "ledger.sqlite").read_bytes().startswith(b"precious")


def test_missing_model_is_a_one_line_error(setup, tmp_path):
    res = runner.invoke(app, ["read", str(setup["scans"]), "--layout", str(demo_layout()),
                              "--model", str(tmp_path / "none.npz"), "--out", str(tmp_path / "o"), "-q"])
    _one_line_error(res, "none.npz")


def _truth(tmp_path, *, extra_page=False, names=("page_000.png", "page_001.png", "page_002.png")) -> Path:
    """Truth for the copies: the shipped demo truth of their original pages (copies are in page order)."""
    recs = [json.loads(line) for line in (demo_dir() / "truth.jsonl").read_text().splitlines() if line]
    from readkit import _base_pages

    base = _base_pages(3)
    by_page = {(r["source"], r["page_number"]): r["fields"] for r in recs}
    out = []
    for i, name in enumerate(names):
        p = base[i % 3]
        out.append({"source": name, "page_number": 1, "fields": by_page[(Path(p.source).name, p.page_number)]})
    if extra_page:
        out.append({"source": "page_999.png", "page_number": 1, "fields": out[0]["fields"]})
    path = tmp_path / "truth.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in out))
    return path


SUMMARY_KEYS = {"pages", "fields", "accepted", "review", "wrong_accepted", "error_among_accepted", "review_rate",
                "field_accuracy_before_review"}


def test_score_json_text_curve_and_missing_truth_pages(setup, tmp_path):
    truth = _truth(tmp_path, extra_page=True)
    res = runner.invoke(app, ["score", str(setup["out"]), "--truth", str(truth), "--json"])
    assert res.exit_code == 0, res.output
    s = json.loads(res.stdout)
    assert SUMMARY_KEYS <= set(s)
    assert (s["pages"], s["fields"], s["accepted"] + s["review"]) == (3, 18, 18)
    assert s["truth_pages_not_read"] == 1                          # recorded difference, not a lost result
    curve = tmp_path / "curve.png"
    res = runner.invoke(app, ["score", str(setup["out"]), "--truth", str(truth), "--curve", str(curve)])
    assert res.exit_code == 0, res.output
    assert "review rate" in res.stdout and "1 truth pages not in the ledger" in res.stdout
    assert curve.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # a truth sharing no page with the ledger: one-line error, ledger untouched
    before = readings(setup["out"])
    none = _truth(tmp_path, names=("other_1.png",))
    _one_line_error(runner.invoke(app, ["score", str(setup["out"]), "--truth", str(none)]), "no page")
    _one_line_error(runner.invoke(app, ["score", str(tmp_path / "nowhere"), "--truth", str(truth)]), "no ledger")
    assert readings(setup["out"]) == before


def _truth_from_ledger(out, path: Path, *, wrong: bool) -> Path:
    """Truth equal to the ledger's readings (every field right), or every digit shifted (every field wrong)."""
    recs: dict = {}
    for (name, _page), fields in readings(out).items():
        if name.endswith(".png"):
            recs[name] = {k: ("".join(str((int(c) + wrong) % 10) for c in v[0]) if v[0] else "1" * wrong)
                          for k, v in fields.items()}
    path.write_text("".join(json.dumps({"source": n, "page_number": 1, "fields": f}) + "\n"
                            for n, f in recs.items()))
    return path


def test_tune_prints_figures_and_stores_the_threshold_keeping_comments(setup, tmp_path):
    truth = _truth_from_ledger(setup["out"], tmp_path / "right.jsonl", wrong=False)
    layout = tmp_path / "layout.toml"
    layout.write_text(demo_layout().read_text())
    res = runner.invoke(app, ["tune", str(setup["out"]), "--truth", str(truth), "--write-layout", str(layout)])
    assert res.exit_code == 0, res.output
    for word in ("threshold", "review rate", "error among accepted", "upper bound"):
        assert word in res.stdout
    res = runner.invoke(app, ["tune", str(setup["out"]), "--truth", str(truth), "--json"])
    t = json.loads(res.stdout)
    assert t["target_met"] and t["wrong_accepted"] == 0
    assert load_layout(layout).threshold == pytest.approx(min(1.0, t["threshold"]), abs=1e-6)
    kept = [line for line in demo_layout().read_text().splitlines() if line.startswith("#")]
    assert kept and all(line in layout.read_text() for line in kept)
    # a target no threshold meets (every field wrong) leaves the layout alone
    before = layout.read_text()
    wrong = _truth_from_ledger(setup["out"], tmp_path / "wrong.jsonl", wrong=True)
    res = runner.invoke(app, ["tune", str(setup["out"]), "--truth", str(wrong), "--write-layout", str(layout)])
    _one_line_error(res, "left unchanged")
    assert layout.read_text() == before


def test_tune_from_the_clerks_reviewed_fields(setup, tmp_path):
    out = tmp_path / "out"
    import shutil

    shutil.copytree(setup["out"], out)
    _one_line_error(runner.invoke(app, ["tune", str(out)]), "no reviewed field")
    conn = sqlite3.connect(out / "ledger.sqlite")
    conn.execute("UPDATE fields SET final_value = coalesce(reading, ''), final_status = 'confirmed'")
    conn.commit()
    conn.close()
    res = runner.invoke(app, ["tune", str(out), "--json"])
    assert res.exit_code == 0, res.output
    t = json.loads(res.stdout)
    assert t["fields"] == 18 and t["wrong_accepted"] == 0 and "reviewed" in t["truth_source"]
