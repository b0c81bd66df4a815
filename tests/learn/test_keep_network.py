"""`formread learn` keeps the network in use, with its decisions refitted, when fine-tuning does not pay
but the decisions in use (fitted on other forms) let too much through on this office's pages.

The fields are hand-made (reading, confidence, truth) on the demo layout; the decision rule of
:func:`formread.learn.loop._keep_network` is what is tested, not the reading.
"""

from types import SimpleNamespace

from formread.form.layout import load_layout
from formread.learn import loop
from formread.read.bundle import load_bundle
from formread.store import demo_forms, in_use_path, shipped_model

FORM = "Larkspur Lane water meter card"


def _pairs(n, wrong_conf, page0, seed_names=("member_number", "previous_reading")):
    """``n`` fields: right at confidence 0.999, and wrong ones at ``wrong_conf`` (each value one field)."""
    out = []
    for i in range(n):
        name = seed_names[i % len(seed_names)]
        f = SimpleNamespace(form=FORM, name=name, truth="123456", page=("p", page0 + i // 6))
        out.append((f, SimpleNamespace(reason=None, confidence=0.999, reading="123456")))
    for j, c in enumerate(wrong_conf):
        f = SimpleNamespace(form=FORM, name=seed_names[j % 2], truth="123456", page=("p", page0 + n + j))
        out.append((f, SimpleNamespace(reason=None, confidence=c, reading="123455")))
    return out


def _report():
    return loop.LearnReport(bundle_before=str(shipped_model()), reason="review rate did not fall")


def test_decisions_in_use_that_let_errors_through_are_refitted_and_the_network_kept(monkeypatch):
    bundle = load_bundle(shipped_model())
    layouts = {FORM: load_layout(demo_forms() / "layout.toml")}
    # the shipped decisions accept at 0.946 on this form; here every error sits at 0.95-0.99
    wrong = [0.95, 0.96, 0.97, 0.98, 0.99]
    fit_pairs, held_pairs = _pairs(400, wrong * 2, 0), _pairs(200, wrong, 1000)
    monkeypatch.setattr(loop, "_read_again", lambda fields, layouts, b, d: fit_pairs)
    rep = _report()
    loop._keep_network(bundle, [], held_pairs, layouts, {FORM: 0.005}, rep, ["run"])
    iu, rf = rep.kept_network["in_use"], rep.kept_network["refitted"]
    assert iu["wrong_accepted"] == 5 and iu["error_among_accepted"] > 0.005
    assert rf["wrong_accepted"] < iu["wrong_accepted"]
    assert rep.promoted and in_use_path() == loop.Path(rep.bundle_after)
    kept = load_bundle(rep.bundle_after)
    assert kept.weights_sha256 == bundle.weights_sha256          # the same network
    assert kept.decisions.status == "fitted" and "network in use kept" in kept.decisions.fitted_on
    assert "decisions refitted" in rep.reason


def test_decisions_in_use_that_do_well_are_kept_as_they_are(monkeypatch):
    bundle = load_bundle(shipped_model())
    layouts = {FORM: load_layout(demo_forms() / "layout.toml")}
    # errors only far below the threshold in use: nothing to gain
    fit_pairs, held_pairs = _pairs(400, [0.3, 0.4], 0), _pairs(200, [0.35], 1000)
    monkeypatch.setattr(loop, "_read_again", lambda fields, layouts, b, d: fit_pairs)
    rep = _report()
    loop._keep_network(bundle, [], held_pairs, layouts, {FORM: 0.005}, rep, ["run"])
    assert rep.kept_network["in_use"]["wrong_accepted"] == 0
    assert not rep.promoted and in_use_path() == shipped_model()
