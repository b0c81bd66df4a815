"""Model files: round trip, header contents, and every way a file can be bad."""

import io
import json
import zipfile

import numpy as np
import pytest

from formread.digits import NORMALISATION
from formread.errors import ModelFileError
from formread.nn.model import build_model
from formread.nn.modelfile import (
    HEADER_KEY,
    header_sha256,
    load_model,
    load_networks,
    read_header,
    save_model,
    save_networks,
    weights_sha256,
)

X = np.random.default_rng(1).random((5, 1, 28, 28), dtype=np.float32)


@pytest.fixture
def saved(tmp_path):
    model = build_model("lenet5", np.random.default_rng(0))
    path = tmp_path / "m.npz"
    header = save_model(path, model, {"seed": 0, "metrics": {"acc": 0.5}, "temperature": 1.3,
                                      "training": {"epochs": 1}})
    return path, model, header


def test_roundtrip_and_header(saved):
    path, model, header = saved
    loaded, h = load_model(path)
    np.testing.assert_array_equal(loaded.forward(X), model.forward(X))
    assert h == header == read_header(path)
    assert h["format"] == "formread-model" and h["format_version"] == 2
    assert h["networks"] == [model.spec]
    assert h["input"] == {"size": 28, "channels": 1, "normalisation": NORMALISATION}
    assert h["temperature"] == 1.3 and h["seed"] == 0 and h["metrics"] == {"acc": 0.5}
    assert h["created"].endswith("+00:00") and len(h["sha256"]) == 64 and len(h["weights_sha256"]) == 64
    assert h["weights_sha256"] == weights_sha256({f"n0/{k}": v for k, v in model.state_dict().items()})
    assert h["sha256"] == header_sha256(h) != h["weights_sha256"]
    assert set(h) >= {"format", "format_version", "networks", "input", "labels", "training",
                      "seed", "metrics", "temperature", "created", "weights_sha256", "sha256"}
    assert all(p.value.dtype == np.float32 for p in loaded.parameters())
    # no pickled objects inside: every member loads with allow_pickle=False
    with np.load(path, allow_pickle=False) as npz:
        assert HEADER_KEY in npz.files and npz[HEADER_KEY].dtype == np.uint8
    # no temporary file left behind
    assert [p.name for p in path.parent.iterdir()] == ["m.npz"]


def test_wide_model_with_dropout_roundtrip(tmp_path):
    model = build_model("wide", np.random.default_rng(3))
    save_model(tmp_path / "w.npz", model, {})
    loaded, h = load_model(tmp_path / "w.npz")
    assert h["temperature"] == 1.0
    np.testing.assert_array_equal(loaded.forward(X), model.forward(X))


def test_sha_depends_on_names_dtype_shape_and_bytes():
    a = {"x": np.zeros(4, dtype=np.float32)}
    base = weights_sha256(a)
    assert weights_sha256({"y": a["x"]}) != base
    assert weights_sha256({"x": np.zeros(4, dtype=np.float64)}) != base
    assert weights_sha256({"x": np.zeros((2, 2), dtype=np.float32)}) != base
    assert weights_sha256({"x": np.array([0, 0, 0, 1], dtype=np.float32)}) != base


def _rewrite(path, change, resign=False):
    """Rewrite the npz at path with change(arrays: dict, header: dict) applied; ``resign`` recomputes
    both checksums afterwards (a forger who knows the format), to reach the checks behind them."""
    with np.load(path, allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    header = json.loads(arrays.pop(HEADER_KEY).tobytes())
    change(arrays, header)
    if resign:
        header["weights_sha256"] = weights_sha256(arrays)
        header["sha256"] = header_sha256(header)
    arrays[HEADER_KEY] = np.frombuffer(json.dumps(header).encode(), dtype=np.uint8)
    with open(path, "wb") as f:
        np.savez(f, **arrays)


def _expect(path, words, header_too=True):
    for fn in (load_model, read_header) if header_too else (load_model,):
        with pytest.raises(ModelFileError) as e:
            fn(path)
        msg = str(e.value)
        assert msg.startswith(f"{path}: ") and "\n" not in msg
        assert words in msg, msg


def test_missing_file(tmp_path):
    _expect(tmp_path / "nope.npz", "no such")


def test_zero_byte_file(tmp_path):
    (tmp_path / "z.npz").write_bytes(b"")
    _expect(tmp_path / "z.npz", "empty")


def test_truncated_file(saved):
    path = saved[0]
    data = path.read_bytes()
    for cut in (len(data) // 2, len(data) - 30, 100):
        path.write_bytes(data[:cut])
        with pytest.raises(ModelFileError) as e:
            load_model(path)
        assert str(e.value).startswith(f"{path}: ")


def test_text_file_and_plain_npz(tmp_path):
    (tmp_path / "t.npz").write_text("hello, not a model\n")
    _expect(tmp_path / "t.npz", "not a formread model")
    np.savez(tmp_path / "plain.npz", a=np.zeros(3))
    _expect(tmp_path / "plain.npz", "not a formread model")


def test_pickled_member_refused(tmp_path):
    np.savez(tmp_path / "p.npz", obj=np.array([{"a": 1}], dtype=object))
    _expect(tmp_path / "p.npz", "not a formread model")


def test_tampered_weights(saved):
    path = saved[0]

    def change(arrays, header):
        arrays["n0/0.conv2d.weight"] = arrays["n0/0.conv2d.weight"] + np.float32(0.001)
    _rewrite(path, change)
    _expect(path, "checksum", header_too=False)


def test_an_edited_header_value_is_caught(saved):
    # an edited temperature (or any decoder constant) would change every decision: the checksum covers it
    path = saved[0]
    _rewrite(path, lambda a, h: h.update(temperature=0.5))
    _expect(path, "checksum mismatch (header changed")
    _rewrite(path, lambda a, h: h["metrics"].update(acc=0.99))
    _expect(path, "checksum mismatch (header changed")


def test_header_values_of_the_wrong_type(saved):
    path = saved[0]
    _rewrite(path, lambda a, h: h.update(temperature="1.3"), resign=True)
    _expect(path, "temperature must be a number")
    _rewrite(path, lambda a, h: h.update(temperature=1.3, input={"size": 10 ** 400, "channels": 1}), resign=True)
    _expect(path, "input size")


def test_wrong_version_and_format(saved):
    path = saved[0]
    _rewrite(path, lambda a, h: h.update(format_version=3))
    _expect(path, "version 3")
    _rewrite(path, lambda a, h: h.update(format_version=2, format="something-else"))
    _expect(path, "not a formread model")


def test_arrays_do_not_fit_architecture(saved):
    path = saved[0]

    def change(arrays, header):
        arrays["n0/0.conv2d.bias"] = np.zeros(7, dtype=np.float32)
    _rewrite(path, change, resign=True)
    _expect(path, "do not fit", header_too=False)

    def drop(arrays, header):
        del arrays["n0/0.conv2d.bias"]
    _rewrite(path, drop, resign=True)
    _expect(path, "do not fit", header_too=False)


def test_bad_architecture_in_header(saved):
    path = saved[0]
    _rewrite(path, lambda a, h: h.update(networks=[[{"type": "warp-drive"}]]), resign=True)
    _expect(path, "architecture", header_too=False)


def test_a_file_of_the_first_format_still_loads(tmp_path):
    # format version 1 (the first release): arrays named by parameter, the checksum over the weights only
    model = build_model("lenet5", np.random.default_rng(0))
    arrays = model.state_dict()
    header = {"format": "formread-model", "format_version": 1, "architecture": model.spec, "temperature": 1.2,
              "input": {"size": 28, "channels": 1, "normalisation": NORMALISATION},
              "labels": [str(d) for d in range(10)], "sha256": weights_sha256(arrays)}
    path = tmp_path / "old.npz"
    np.savez(path, **arrays, **{HEADER_KEY: np.frombuffer(json.dumps(header).encode(), dtype=np.uint8)})
    loaded, h = load_model(path)
    np.testing.assert_array_equal(loaded.forward(X), model.forward(X))
    assert h["format_version"] == 1 and h["temperature"] == 1.2
    _rewrite(path, lambda a, hh: a.update({"0.conv2d.bias": a["0.conv2d.bias"] + np.float32(1)}))
    _expect(path, "checksum", header_too=False)


def test_several_networks_in_one_file(tmp_path):
    nets = [build_model("lenet5", np.random.default_rng(s)) for s in (0, 1)]
    h = save_networks(tmp_path / "e.npz", nets, {})
    loaded, h2 = load_networks(tmp_path / "e.npz")
    assert h == h2 and len(loaded) == 2 and h["networks"] == [n.spec for n in nets]
    for a, b in zip(loaded, nets):
        np.testing.assert_array_equal(a.forward(X), b.forward(X))
    _expect(tmp_path / "e.npz", "holds 2 networks", header_too=False)


def test_damaged_header(saved):
    path = saved[0]
    with np.load(path, allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    arrays[HEADER_KEY] = np.frombuffer(b"{not json", dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    path.write_bytes(buf.getvalue())
    _expect(path, "header")


def test_corrupted_member_bytes(saved):
    """Flip bytes inside a stored array: caught by the zip CRC or by the checksum."""
    path = saved[0]
    data = bytearray(path.read_bytes())
    with zipfile.ZipFile(path) as z:
        info = z.getinfo("n0/0.conv2d.weight.npy")
    start = info.header_offset + 30 + len(info.filename) + len(info.extra) + 200
    data[start:start + 8] = b"\x00\x01\x02\x03\x04\x05\x06\x07"
    path.write_bytes(bytes(data))
    with pytest.raises(ModelFileError) as e:
        load_model(path)
    assert str(e.value).startswith(f"{path}: ")


def test_save_is_atomic_on_failure(saved, monkeypatch):
    """A failing write leaves the previous file intact and no temporary file."""
    path, model, header = saved
    before = path.read_bytes()

    def boom(*a, **k):
        raise OSError("disk full")
    monkeypatch.setattr(np, "savez", boom)
    with pytest.raises(OSError):
        save_model(path, model, {})
    assert path.read_bytes() == before
    assert [p.name for p in path.parent.iterdir()] == ["m.npz"]


def test_numpy_values_in_header_become_plain_json(tmp_path):
    model = build_model("lenet5", np.random.default_rng(0))
    h = save_model(tmp_path / "m.npz", model, {"metrics": {"acc": np.float32(0.5), "n": np.int64(3),
                                                           "curve": np.array([1, 2])}})
    assert h["metrics"] == {"acc": 0.5, "n": 3, "curve": [1, 2]} == read_header(tmp_path / "m.npz")["metrics"]


def test_unserialisable_header(tmp_path):
    model = build_model("lenet5", np.random.default_rng(0))
    with pytest.raises(ModelFileError):
        save_model(tmp_path / "m.npz", model, {"metrics": {"x": object()}})
    assert not (tmp_path / "m.npz").exists()
