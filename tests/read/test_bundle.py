"""The model bundle: one file carries the network and every decision fitted for it."""

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from formread.errors import ModelFileError
from formread.nn.model import build_model
from formread.nn.modelfile import load_networks, save_model
from formread.read.bundle import (
    FITTED,
    INHERITED,
    SHIPPED_CONSTANTS,
    Decisions,
    load_bundle,
    save_bundle,
    shipped_decoder,
)
from formread.read.decode import PLAIN, ConfidenceModel

SHIPPED = Path(__file__).resolve().parents[2] / "models" / "default.npz"
X = np.random.default_rng(2).random((6, 1, 28, 28), dtype=np.float32)


def test_the_shipped_bundle_carries_its_fitted_decoder():
    b = load_bundle(SHIPPED)
    decoder, _ = shipped_decoder()
    # fitted for its own weights: the digit reliability map refitted for them (`learn --refit-only`,
    # DEVELOPERS.md), the other constants those a newly trained network starts with
    assert b.decoder_status == FITTED and b.header["decoder"]["fitted_for"] == b.weights_sha256
    assert b.decoder.digit_calibration != decoder.digit_calibration
    assert dataclasses.replace(b.decoder, digit_calibration=decoder.digit_calibration) == decoder
    assert b.refitted and b.header["format_version"] == 2
    # the bundle applies its own temperature
    np.testing.assert_allclose(b.predict_proba(X), b.networks[0].predict_proba(X, temperature=b.temperature))


def test_a_new_network_with_the_shipped_constants_is_marked_inherited(tmp_path):
    net = build_model("lenet5", np.random.default_rng(0))
    decoder, fitted_for = shipped_decoder()
    b = save_bundle(tmp_path / "m.npz", net, {"temperature": 1.4}, decoder=decoder, decoder_fitted_for=fitted_for)
    assert b.decoder_status == INHERITED and not b.refitted
    assert any("inherited" in line for line in b.describe())
    # refitted for itself (decoder_fitted_for=None): fitted
    c = save_bundle(tmp_path / "n.npz", net, {"temperature": 1.4}, decoder=PLAIN)
    assert c.decoder_status == FITTED and c.decoder == PLAIN


def test_a_successor_inherits_and_says_so(tmp_path):
    parent = load_bundle(SHIPPED)
    child_net = build_model(parent.networks[0].spec, np.random.default_rng(5))
    child = parent.save_successor(tmp_path / "r1.npz", child_net, {"temperature": 0.5})
    assert child.decoder == parent.decoder and child.decoder_status == INHERITED
    assert child.decoder_fitted_for == parent.weights_sha256


def test_a_file_without_decoder_constants_uses_the_shipped_ones(tmp_path):
    net = build_model("lenet5", np.random.default_rng(0))
    save_model(tmp_path / "plain.npz", net, {"temperature": 2.0})
    b = load_bundle(tmp_path / "plain.npz")
    assert b.decoder == shipped_decoder()[0] and b.decoder_status == SHIPPED_CONSTANTS


def test_decisions_give_thresholds_for_a_target(tmp_path):
    rng = np.random.default_rng(0)
    conf = rng.uniform(0.3, 1.0, 2000)
    correct = rng.uniform(size=2000) < conf ** 8          # sure readings are right more often
    rows = np.column_stack([conf, correct, np.ones(2000)])
    d = Decisions({"card": {"a": rows[:1000], "b": rows[1000:]}}, status=FITTED, fitted_on="test")
    t = d.threshold_for("card", None, 0.02)
    acc = conf >= t
    assert t is not None and (~correct[acc]).mean() <= 0.02
    assert d.threshold_for("card", None, 0.0001) is None or d.threshold_for("card", None, 0.0001) >= t
    assert d.threshold_for("another form", "a", 0.02) == t      # an unknown form pools every form
    net = build_model("lenet5", np.random.default_rng(0))
    b = save_bundle(tmp_path / "d.npz", net, {}, decoder=PLAIN, decisions=d)
    assert b.decisions.status == FITTED and b.fitted_threshold("card")(0.02, None) == pytest.approx(t, abs=1e-6)


def test_damaged_bundle_parts_are_one_line_errors(tmp_path):
    net = build_model("lenet5", np.random.default_rng(0))
    b = save_bundle(tmp_path / "m.npz", net, {}, decoder=ConfidenceModel(prior_scale=0.5))
    header = dict(b.header)
    for bad in ({"constants": {"prior_scale": -1}}, "no table", {"constants": "x"}):
        header["decoder"] = bad
        nets, _ = load_networks(tmp_path / "m.npz")
        from formread.nn.modelfile import save_networks
        save_networks(tmp_path / "bad.npz", nets, header)
        with pytest.raises(ModelFileError) as e:
            load_bundle(tmp_path / "bad.npz")
        assert str(e.value).startswith(f"{tmp_path / 'bad.npz'}: damaged model file") and "\n" not in str(e.value)
