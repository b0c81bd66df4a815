"""The shipped model (models/default.npz): checksum, and its card's accuracy on both held-out parts.

Inference only.  The held-out parts (the MNIST sample's test part and the second half of
scikit-learn's digits, formread/datasets.py) were never trained on.
"""

from pathlib import Path

import numpy as np
import pytest

from formread.learn.datasets import load_dataset
from formread.nn.modelfile import header_sha256, load_model, networks_sha256, read_header

ROOT = Path(__file__).resolve().parents[2]
MODEL = ROOT / "models" / "default.npz"
CARD = ROOT / "models" / "MODEL_CARD.md"

# Measured when the model was trained (models/MODEL_CARD.md); floors allow 0.002 below.
MEASURED = {"mnist:test": 0.9870, "digits:test": 0.9889}


@pytest.fixture(scope="module")
def shipped():
    return load_model(MODEL)  # raises ModelFileError on a checksum mismatch


def test_header_checksum_verifies(shipped):
    model, header = shipped
    assert networks_sha256(model) == header["weights_sha256"]
    assert header_sha256(header) == header["sha256"] == read_header(MODEL)["sha256"]
    assert header["input"]["size"] == 28 and header["labels"] == [str(d) for d in range(10)]
    assert MODEL.stat().st_size < 3_000_000


def test_held_out_parts_were_not_trained_on(shipped):
    _, header = shipped
    assert header["training"]["dataset"] == "default:train"
    assert set(header["training"]["held_out"]) == {"mnist:test", "digits:test"}


@pytest.mark.parametrize("part", ["mnist:test", "digits:test"])
def test_card_accuracy_on_held_out_part(shipped, part):
    model, header = shipped
    data = load_dataset(*part.split(":"))
    acc = float(np.mean(model.predict_proba(data.x).argmax(1) == data.y))
    assert acc >= MEASURED[part] - 0.002
    assert header["metrics"][part]["accuracy"] == pytest.approx(acc, abs=1e-9)
    assert f"{acc:.4f}" in CARD.read_text()  # the card states the figure the file gives
