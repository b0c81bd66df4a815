"""`formread learn` and the spot checks, on real read runs of the shipped demo forms.

The demo's handwriting is the MNIST sample's held-out test part; a network learnt here has seen some
of it, so no figure of it is published (the shipped model never trains on it).
"""

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from formread.cli.main import app
from formread.errors import DataError
from formread.learn.loop import LearnConfig, _digits_for, _Field, learn
from formread.ledger.fieldfile import FieldFile
from formread.ledger.store import open_ledger
from formread.read.batch import read_batch
from formread.read.bundle import load_bundle
from formread.read.evaluate import score_ledger
from formread.read.report import run_report
from formread.read.tune import clopper_pearson_upper
from formread.review.bulk import apply_decisions
from formread.store import demo_forms, in_use_path, shipped_model, store_dir

DEMO = demo_forms()
SCANS = sorted(p for p in DEMO.iterdir() if p.name.startswith("scan_"))[:22]
TRUTH = {(t["source"], t["page_number"]): t["fields"]
         for t in map(json.loads, (DEMO / "truth.jsonl").read_text().splitlines())}


@pytest.fixture(scope="module")
def bundle():
    return load_bundle(shipped_model())


def _clerk(outdir, only=None):
    """Decide every field waiting for review from the truth, as a clerk with the paper would."""
    with open_ledger(outdir, create=False) as led:
        rows = led.conn.execute("SELECT p.source, p.page_number, f.name FROM fields f JOIN pages p ON p.id = f.page_id"
                                " WHERE f.decision = 'review' AND f.final_status IS NULL").fetchall()
        recs = [(i, {"source": Path(s).name, "page_number": n, "field": f,
                     "value": TRUTH[(Path(s).name, n)][f]}) for i, (s, n, f) in enumerate(rows, 1)
                if only is None or f in only]
        return apply_decisions(led, recs, reviewer="clerk")


@pytest.fixture(scope="module")
def spot_runs(tmp_path_factory, bundle):
    """Five reads of the same 24 demo pages at a low threshold (so accepted fields hold errors), each with
    another spot-check seed, every field sent to review decided from the truth."""
    runs = []
    for seed in range(5):
        out = tmp_path_factory.mktemp("spot") / "out"
        read_batch(SCANS, DEMO / "layout.toml", out, bundle=bundle, threshold=0.5, audit=0.3, audit_seed=seed,
                   workers=1)
        _clerk(out)
        runs.append(out)
    return runs


def test_spot_checks_estimate_the_error_among_accepted_honestly(spot_runs):
    held = 0
    for out in spot_runs:
        s = run_report([out]).summary()
        with open_ledger(out, create=False) as led:
            rows = led.field_rows()
        # the truth of every field that would have been accepted (accepted, or spot-checked)
        would = [r for r in rows if r["decision"] == "accepted" or r["audit"]]
        wrong = sum(r["reading"] != TRUTH[(Path(r["source"]).name, r["page_number"])][r["name"]] for r in would)
        true_rate = wrong / len(would)
        assert s["audited"] == s["audited_decided"] > 10
        assert s["error_upper_95"] == clopper_pearson_upper(s["audited_wrong"], s["audited_decided"])
        held += true_rate <= s["error_upper_95"]
    print(f"spot-check bound held in {held} of {len(spot_runs)} runs with known truth (stated: 95%)")
    assert held >= 4      # with 95% per run, 3 or fewer of 5 happens less than 3% of the time


def test_spot_checks_appear_in_score_and_report(spot_runs):
    s = score_ledger(spot_runs[0], DEMO / "truth.jsonl")
    assert s["audited"] > 0 and s["review"] >= s["audited"]
    assert s["writer_mistakes_accepted"] == 0
    res = CliRunner().invoke(app, ["report", str(spot_runs[0])])
    assert res.exit_code == 0 and "spot checks" in res.output and "upper bound" in res.output


def test_refit_only_fits_the_digit_map_and_decisions_and_keeps_the_network(spot_runs, tmp_path, bundle):
    # --refit-only is how a newly trained network gets its decisions (DEVELOPERS.md); the network
    # itself must not change, the decoder's digit map and the decisions must be fitted for it
    out = tmp_path / "refit.npz"
    rep = learn([spot_runs[1]], bundle=bundle, out=out, config=LearnConfig(refit_only=True))
    new = load_bundle(out)
    assert new.weights_sha256 == bundle.weights_sha256
    assert new.decoder_status == "fitted" and new.decisions.status == "fitted"
    assert new.decoder.digit_calibration != bundle.decoder.digit_calibration
    assert "digit map:" in new.decoder_fitted_on and f"{rep.pages_held_out} pages" in new.decoder_fitted_on
    assert not rep.promoted and "outside the model store" in rep.reason


def test_refit_only_fits_the_decisions_of_a_bundle_of_several_networks(spot_runs, tmp_path, bundle):
    # an ensemble (the shipped network twice, once with its weights scaled: another network) gets its
    # decisions fitted for the pair, both networks kept; learning proper still fine-tunes one only
    from formread.nn.model import build_model
    from formread.read.bundle import save_bundle

    other = build_model(bundle.networks[0].spec, np.random.default_rng(0))
    other.load_state_dict({k: v * np.float32(0.9) for k, v in bundle.networks[0].state_dict().items()})
    header = {k: v for k, v in bundle.header.items() if k not in ("decoder", "decisions")}
    pair = save_bundle(tmp_path / "pair.npz", [bundle.networks[0], other], header, decoder=bundle.decoder,
                       decoder_fitted_for=bundle.decoder_fitted_for)
    assert pair.decoder_status != "fitted"
    learn([spot_runs[1]], bundle=pair, out=tmp_path / "pair-refit.npz", config=LearnConfig(refit_only=True))
    new = load_bundle(tmp_path / "pair-refit.npz")
    assert len(new.networks) == 2 and new.weights_sha256 == pair.weights_sha256
    assert new.decoder_status == "fitted" and new.decisions.status == "fitted"
    with pytest.raises(DataError, match="holds 2 networks; learning fine-tunes one"):
        learn([spot_runs[1]], bundle=pair, out=tmp_path / "pair-tuned.npz")


def test_learn_refits_decisions_and_the_next_read_uses_them(spot_runs, tmp_path):
    res = CliRunner().invoke(app, ["learn", str(spot_runs[0]), "--epochs", "2", "--target", "0.02", "--json",
                                   "--quiet"])
    assert res.exit_code == 0, res.output
    rep = json.loads(res.stdout)
    assert rep["pages_held_out"] >= 3 and rep["samples"] > 50 and sum(rep["samples_per_digit"]) == rep["samples"]
    shipped = load_bundle(shipped_model())
    kept = rep["kept_network"].get("fine_tuned_bundle")          # the network in use kept (learn step 7)
    tuned = load_bundle(kept or rep["bundle_after"])
    assert tuned.decoder_status == "fitted" and tuned.decisions.status == "fitted"  # refitted for this network
    assert tuned.decoder.digit_calibration != shipped.decoder.digit_calibration
    assert tuned.weights_sha256 != shipped.weights_sha256
    new = load_bundle(rep["bundle_after"])
    assert set(new.decisions.forms) == {"Larkspur Lane water meter card"}
    assert Path(rep["bundle_after"]).parent == store_dir()                        # a new version in the store
    if kept:
        assert rep["promoted"] and new.weights_sha256 == shipped.weights_sha256
        assert new.decisions.status == "fitted" and "network in use kept" in new.decisions.fitted_on
    if rep["promoted"]:
        assert in_use_path() == Path(rep["bundle_after"])
        assert kept or rep["after"]["review_rate"] < rep["before"]["review_rate"]
        out = tmp_path / "next"
        read_batch(SCANS[:3], DEMO / "layout.toml", out, workers=1)
        with open_ledger(out, create=False) as led:
            run = json.loads(led.last_run()["bundle"])
        assert run["sha256"] == new.sha256 and run["decisions"] == "fitted"
    else:
        assert in_use_path() == shipped_model() and ("did not fall" in rep["reason"] or "margin" in rep["reason"])


def test_learn_refuses_too_few_decided_fields(tmp_path, bundle):
    out = tmp_path / "out"
    read_batch(SCANS[:2], DEMO / "layout.toml", out, bundle=bundle, workers=1)
    _clerk(out)
    with pytest.raises(DataError, match="fields decided by a clerk; learning needs at least"):
        learn([out], bundle=bundle)
    res = CliRunner().invoke(app, ["learn", str(out)])
    assert res.exit_code == 1 and len(res.stderr.strip().splitlines()) == 1
    assert in_use_path() == shipped_model() and not list(in_use_path().parent.glob("*-r*.npz"))


def test_learn_refuses_a_single_digit_class(spot_runs, tmp_path, monkeypatch):
    out = tmp_path / "ones"
    shutil.copytree(spot_runs[1], out)
    with open_ledger(out, create=False) as led, led.transaction() as c:   # a clerk who typed only 1s
        c.execute("UPDATE fields SET final_value = substr('1111111111', 1, length(coalesce(reading, '1'))) "
                  "WHERE final_status IN ('confirmed', 'corrected')")
    with pytest.raises(DataError, match="hold only digits 1; learning needs at least"):
        learn([out], config=LearnConfig(epochs=1))
    assert in_use_path() == shipped_model()


def test_a_field_is_cut_again_to_its_decided_length():
    # the reading split the field in 2 digits; the clerk wrote 3: the stored 3-digit candidate is taken
    two, three = np.full((2, 28, 28), 60, np.uint8), np.full((3, 28, 28), 200, np.uint8)
    ff = FieldFile(digits=two[:, None] / np.float32(255), positions=np.arange(2), chosen=0,
                   cand_digits=np.concatenate([two, three]), cand_spans=np.array([[0, 2], [2, 5]]),
                   cand_costs=np.array([0.5, 1.2]), blank=np.zeros(0, bool))

    class Spec:
        kind = "open"

    f = _Field(1, Path("."), (".", "h"), "card", "count", "131", True, "91", ff)
    d, why, cut = _digits_for(f, Spec())
    assert cut and why == "" and d.shape == (3, 1, 28, 28) and np.allclose(d, 200 / 255)
    f.truth = "1312"
    d, why, cut = _digits_for(f, Spec())
    assert d is None and "no split of the field into 4 digits" in why
