"""The batch job on real pages: failures recorded, the rest read, reruns skip, outputs agree with the ledger."""

import csv
import dataclasses
import io
import json
import os
import shutil
import sqlite3

import numpy as np
import pytest
from PIL import Image
from readkit import demo_layout, readings, tiny_model, write_copies

import formread.read.pagework as pagework
from formread.ledger.fieldfile import load_digits, load_field_file
from formread.read.batch import list_scans, read_batch


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    return tiny_model(tmp_path_factory.mktemp("model") / "tiny.npz")


def _rows(out, sql):
    conn = sqlite3.connect(out / "ledger.sqlite")
    try:
        return conn.execute(sql).fetchall()
    finally:
        conn.close()


def test_mixed_folder_failures_recorded_rest_read_then_rerun_skips(tmp_path, model):
    scans = tmp_path / "scans"
    write_copies(scans, 3)
    (scans / "notes.txt").write_text("not a page")
    (scans / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"garbage" * 20)
    Image.fromarray(np.full((600, 420), 255, np.uint8)).save(scans / "white.png", dpi=(50, 50))
    out = tmp_path / "out"
    rep = read_batch([scans], demo_layout(), out, bundle=model, workers=1)
    assert (rep.pages, rep.read, rep.failed, rep.unregistered) == (6, 3, 2, 1)
    assert not rep.all_read
    status = dict(_rows(out, "SELECT source, status FROM pages"))
    assert status[str(scans / "notes.txt")] == "failed"
    assert status[str(scans / "broken.png")] == "failed"
    assert status[str(scans / "white.png")] == "unregistered"
    errors = dict(_rows(out, "SELECT source, error FROM pages WHERE status != 'read'"))
    assert "not a scan" in errors[str(scans / "notes.txt")]
    assert errors[str(scans / "broken.png")].startswith(str(scans / "broken.png"))
    # an unregistered page: every field to review, no reading
    unreg = _rows(out, "SELECT f.reading, f.decision, f.reason FROM fields f JOIN pages p ON p.id = f.page_id "
                       "WHERE p.status = 'unregistered'")
    assert len(unreg) == 6 and set(unreg) == {(None, "review", "page_not_registered")}
    # every read page has all its fields, its page image and its crops
    n_fields = _rows(out, "SELECT p.id, count(f.id) FROM pages p LEFT JOIN fields f ON f.page_id = p.id "
                          "WHERE p.status = 'read' GROUP BY p.id")
    assert [n for _, n in n_fields] == [6, 6, 6]
    for (img,) in _rows(out, "SELECT image_path FROM pages WHERE status = 'read'"):
        assert (out / img).is_file()
    csv_rows = list(csv.DictReader((out / "readings.csv").read_text().splitlines()))
    assert len(csv_rows) == 6
    assert len((out / "fields.jsonl").read_text().splitlines()) == 4 * 6

    before = readings(out)
    rep2 = read_batch([scans], demo_layout(), out, bundle=model, workers=1)
    assert (rep2.read, rep2.skipped, rep2.failed, rep2.unregistered) == (0, 4, 2, 0)
    assert len(rep2.problems) == 3                      # still tells about the unregistered page
    assert _rows(out, "SELECT count(*) FROM pages") == [(6,)]
    assert readings(out) == before
    assert _rows(out, "SELECT count(*) FROM runs WHERE finished IS NOT NULL") == [(2,)]


def test_same_pixels_in_two_files_are_read_once(tmp_path, model):
    scans = tmp_path / "scans"
    a = write_copies(scans, 1)[0]
    shutil.copy(a, scans / "zz_copy.png")
    rep = read_batch([scans], demo_layout(), tmp_path / "out", bundle=model, workers=1)
    assert (rep.read, rep.skipped) == (1, 1)


def test_threshold_from_option_else_layout_else_default(tmp_path, model):
    scans = write_copies(tmp_path / "scans", 1)
    read_batch(scans, demo_layout(), tmp_path / "a", bundle=model, threshold=0.42, workers=1)
    text = demo_layout().read_text()
    no_thr = tmp_path / "plain.toml"
    no_thr.write_text("\n".join(line for line in text.splitlines() if not line.startswith("threshold")) + "\n")
    read_batch(scans, no_thr, tmp_path / "b", bundle=model, workers=1)
    with_thr = tmp_path / "with_threshold.toml"    # the demo layout names a target; this one a threshold
    with_thr.write_text(text.replace("[form]\n", "[form]\nthreshold = 0.77\n", 1))
    read_batch(scans, with_thr, tmp_path / "c", bundle=model, workers=1)
    assert _rows(tmp_path / "a", "SELECT threshold, model_path FROM runs") == [(0.42, str(model))]
    assert _rows(tmp_path / "b", "SELECT threshold FROM runs") == [(0.9,)]
    assert _rows(tmp_path / "c", "SELECT threshold FROM runs") == [(0.77,)]


def test_digit_images_follow_the_reading(tmp_path, model):
    scans = write_copies(tmp_path / "scans", 1)
    out = tmp_path / "out"
    read_batch(scans, demo_layout(), out, bundle=model, workers=1)
    rows = _rows(out, "SELECT reading, digits_path, image_path, box_px, kind FROM fields")
    assert rows
    for reading, digits_path, image_path, box, kind in rows:
        assert (out / image_path).is_file() and box is not None
        if reading:
            d = load_digits(out / digits_path)
            assert d.shape == (len(reading), 1, 28, 28) and d.dtype == np.float32
            ff = load_field_file(out / digits_path)     # every candidate split is kept, for learning
            assert ff.cand_digits is not None and len(ff.cand_spans) == len(ff.cand_costs) >= 1
            assert (ff.crop_gray is not None) == (kind == "open")


def test_page_views_are_jpeg_and_field_crops_lossless_png(tmp_path, model):
    # the page view is context (JPEG: a noisy scan took 20 ms and 360 kB as PNG); the crops a clerk
    # reads stay PNG; the page view's box of each field lies on the stored image
    scans = write_copies(tmp_path / "scans", 1)
    out = tmp_path / "out"
    read_batch(scans, demo_layout(), out, bundle=model, workers=1)
    (page_path,), = _rows(out, "SELECT image_path FROM pages")
    assert page_path.endswith(".jpg")
    with Image.open(out / page_path) as im:
        assert im.format == "JPEG" and im.mode == "L"
        size = im.size
    for image_path, box in _rows(out, "SELECT image_path, box_px FROM fields"):
        with Image.open(out / image_path) as im:
            assert im.format == "PNG"
        x0, y0, x1, y1 = json.loads(box)
        assert 0 <= x0 < x1 <= size[0] and 0 <= y0 < y1 <= size[1]


@pytest.mark.parametrize("shape", [(110, 510), (1, 1), (7, 1), (1, 9)])
def test_field_crop_png_decodes_to_the_same_pixels(shape):
    # reference: Pillow's PNG decoder reads our own writer's files back pixel for pixel
    rng = np.random.default_rng(shape[0] * 31 + shape[1])
    gray = rng.integers(0, 256, shape).astype(np.uint8)
    gray[: shape[0] // 2] = 255                 # paper as well as noise
    with Image.open(io.BytesIO(pagework._png(gray))) as im:
        assert im.format == "PNG" and im.mode == "L" and im.size == (shape[1], shape[0])
        assert np.array_equal(np.asarray(im), gray)


def test_a_bug_mid_batch_stops_loudly_keeps_whole_pages_and_resumes(tmp_path, model, monkeypatch):
    scans = write_copies(tmp_path / "scans", 4)
    out = tmp_path / "out"
    real = pagework.decode_page
    calls = []

    def flaky(*a, **k):
        calls.append(1)
        if len(calls) == 3:
            raise RuntimeError("injected bug")
        return real(*a, **k)

    monkeypatch.setattr(pagework, "decode_page", flaky)
    with pytest.raises(RuntimeError, match="injected"):
        read_batch(scans, demo_layout(), out, bundle=model, workers=1)
    assert _rows(out, "SELECT count(*) FROM pages") == [(2,)]
    assert _rows(out, "SELECT count(*) FROM fields") == [(12,)]
    assert len(list(csv.DictReader((out / "readings.csv").read_text().splitlines()))) == 2
    monkeypatch.setattr(pagework, "decode_page", real)
    rep = read_batch(scans, demo_layout(), out, bundle=model, workers=1)
    assert (rep.read, rep.skipped) == (2, 2)
    assert _rows(out, "SELECT count(*) FROM pages") == [(4,)]


def test_worker_processes_read_the_same_as_one_process(tmp_path, model):
    scans = write_copies(tmp_path / "scans", 5)
    # three of the pages as one multi-page TIFF: its pages are spread over the workers
    ims = [Image.open(p) for p in scans[2:]]
    dpi = ims[0].info.get("dpi", (200, 200))
    ims[0].save(tmp_path / "scans" / "multi.tif", save_all=True, append_images=ims[1:], dpi=dpi)
    for im in ims:
        im.close()
    inputs = scans[:2] + [tmp_path / "scans" / "multi.tif"]
    read_batch(inputs, demo_layout(), tmp_path / "one", bundle=model, workers=1)
    rep = read_batch(inputs, demo_layout(), tmp_path / "two", bundle=model, workers=2)
    assert rep.read == 5 and rep.imaging_seconds > 0
    got = readings(tmp_path / "two")
    assert sorted(got) == [("multi.tif", 1), ("multi.tif", 2), ("multi.tif", 3), ("page_000.png", 1),
                           ("page_001.png", 1)]
    assert readings(tmp_path / "one") == got


@pytest.mark.skipif(not hasattr(os, "memfd_create"), reason="in-memory files are Linux's")
def test_a_page_handed_through_an_in_memory_file_arrives_whole(monkeypatch):
    from concurrent.futures import Future

    from formread.imaging.load import Page
    from formread.read import batch

    gray = np.random.default_rng(3).integers(0, 256, (37, 53)).astype(np.uint8)
    page = Page(gray=gray, dpi=200.0, source="a.png")
    monkeypatch.setattr(batch, "_work", lambda p, h: (p.gray.copy(), p.source, h))
    fd = batch._pixels_file(gray)
    assert fd is not None
    try:                                    # what the worker does: open the reader's file, read the pixels
        got, source, h = batch._work_from_file(dataclasses.replace(page, gray=None), os.getpid(), fd,
                                               gray.shape, "h1")
        assert np.array_equal(got, gray) and (source, h) == ("a.png", "h1")
        # a file the worker cannot open, or one too short: it asks for the pixels instead
        assert batch._work_from_file(page, os.getpid(), 10 ** 6, gray.shape, "h1") == batch._NEED_PIXELS
        assert batch._work_from_file(page, os.getpid(), fd, (38, 53), "h1") == batch._NEED_PIXELS
    finally:
        os.close(fd)

    class InlinePool:                       # runs each call at once; the worker never finds the file
        def submit(self, fn, *args):
            f = Future()
            f.set_result(batch._NEED_PIXELS if fn is batch._work_from_file else fn(*args))
            return f

    live: set = set()
    handed = batch._Handed(InlinePool(), page, "h2", batch._pixels_file(gray), live)
    assert live == {handed}
    got, _, h = handed.result()             # sent again with its pixels, and the file closed
    assert np.array_equal(got, gray) and h == "h2" and live == set() and handed._fd is None


def test_list_scans_refuses_missing_inputs_and_sorts_folders(tmp_path):
    (tmp_path / "b.png").write_bytes(b"")
    (tmp_path / "a.TIF").write_bytes(b"")
    (tmp_path / ".hidden").write_bytes(b"")
    (tmp_path / "c.doc").write_bytes(b"")
    got = list_scans([tmp_path])
    assert [(p.rsplit("/", 1)[1], r is None) for p, r in got] == [("a.TIF", True), ("b.png", True),
                                                                  ("c.doc", False)]
    from formread.errors import ImageError

    with pytest.raises(ImageError, match="no such file or folder"):
        list_scans([tmp_path / "nope"])


def test_recognition_is_one_network_call_for_several_pages():
    from types import SimpleNamespace

    from formread.read.recognise import recognise_pages

    class Counting:
        """Stands in for a model: digit image k (filled with value k) gets a one-hot row on digit k % 10."""

        def __init__(self):
            self.calls = []

        def predict_proba(self, x, batch_size=256):     # a bundle applies its own temperature
            self.calls.append(x.shape)
            k = x[:, 0, 0, 0].astype(int)
            return np.eye(10, dtype=np.float32)[k % 10]

    def field(name, kind, sizes, start):
        cands = []
        for n in sizes:
            d = np.zeros((n, 1, 28, 28), np.float32) + np.arange(start, start + n, dtype=np.float32)[:, None, None,
                                                                                                      None]
            cands.append(SimpleNamespace(digits=d, boxes=[], cost=float(n)))
            start += n
        blank = np.zeros(sizes[0], bool) if kind == "boxed" else None
        return SimpleNamespace(name=name, kind=kind, candidates=cands, blank=blank, doubtful=False, reason=None), start

    a, s = field("a", "boxed", [3], 0)
    b, s = field("b", "open", [2, 1], s)
    c, s = field("c", "open", [], s)                       # nothing segmented: no candidates
    d, s = field("d", "open", [2], s)
    model = Counting()
    out = recognise_pages([{"a": a, "b": b, "c": c}, {"d": d}], model)
    assert model.calls == [(8, 1, 28, 28)]                 # every digit of both pages in one call
    assert [np.argmax(p, axis=1).tolist() for p in (cand.probs for cand in out[0]["b"].candidates)] == [[3, 4], [5]]
    assert np.argmax(out[0]["a"].candidates[0].probs, axis=1).tolist() == [0, 1, 2]
    assert out[0]["c"].candidates == []
    assert np.argmax(out[1]["d"].candidates[0].probs, axis=1).tolist() == [6, 7]
    # candidates sharing a digit image: each distinct image is read once, every row gets its answer
    e = SimpleNamespace(name="e", kind="open", blank=None, doubtful=False, reason=None, candidates=[
        SimpleNamespace(digits=a.candidates[0].digits[[2, 0, 2]], boxes=[], cost=0.0),
        SimpleNamespace(digits=a.candidates[0].digits[[1, 2]], boxes=[], cost=1.0)])
    model = Counting()
    out = recognise_pages([{"a": a, "e": e}], model)
    assert model.calls == [(3, 1, 28, 28)]                 # 8 rows, 3 distinct images
    assert [np.argmax(c.probs, axis=1).tolist() for c in out[0]["e"].candidates] == [[2, 0, 2], [1, 2]]
    assert np.argmax(out[0]["a"].candidates[0].probs, axis=1).tolist() == [0, 1, 2]
