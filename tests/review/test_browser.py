"""The review page in a real browser: headless Chromium (Debian's package) driven by Playwright.

Clears flagged fields by keyboard alone, reloads, and checks the ledger, the audit rows and the
export; checks that a request without the token is refused and that a stale save is refused.
Never downloads a browser: it uses /usr/bin/chromium (`.ci/run` installs it with apt-get).

``FORMREAD_UPDATE_SCREENSHOT=1`` also writes the real demo run's first screen to docs/review.png
(the README picture).
"""

import csv
import io
import os
import shutil
from pathlib import Path

import pytest
from PIL import Image

from formread.ledger.store import open_ledger
from formread.review import queries
from formread.review.export import export_final
from formread.review.server import running

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
DOCS_PNG = Path(__file__).resolve().parents[2] / "docs" / "review.png"

pytestmark = pytest.mark.browser


def _wait_js(page, expression: str, timeout: float = 15.0) -> None:
    """Poll a JavaScript expression from Python until it is true.  (Playwright's own
    wait_for_function polls with eval inside the page, which the page's CSP rightly forbids.)"""
    import time

    end = time.monotonic() + timeout
    while not page.evaluate(expression):
        if time.monotonic() > end:
            raise AssertionError(f"still false after {timeout} s: {expression}")
        time.sleep(0.05)


def _playwright():
    """Playwright's sync API, or a clear failure (CI installs both; this test must not skip)."""
    try:
        from playwright.sync_api import expect, sync_playwright
    except ImportError:
        pytest.fail("the browser test needs Playwright's Python package: pip install -e '.[test]'")
    if not (os.path.isfile(CHROMIUM) or shutil.which("chromium")):
        pytest.fail(f"the browser test needs Debian's chromium at {CHROMIUM}: apt-get install chromium")
    return sync_playwright, expect


def _small_png(png: bytes, path: Path) -> None:
    """Save a screenshot as a palette PNG (well under 200 KB)."""
    img = Image.open(io.BytesIO(png)).convert("RGB").quantize(colors=96, method=Image.Quantize.MEDIANCUT)
    path.parent.mkdir(parents=True, exist_ok=True)
    img.save(path, optimize=True)


def test_clerk_clears_fields_by_keyboard(ledger, tmp_path):
    sync_playwright, expect = _playwright()
    out, info = ledger
    ids = info["ids"]
    problems = []
    with running(out, reviewer="ann") as srv, sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM if os.path.isfile(CHROMIUM) else shutil.which("chromium"),
                                    args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 800})
            page.set_default_timeout(10_000)
            page.on("console", lambda m: problems.append(m.text) if m.type in ("error", "warning") else None)
            page.on("pageerror", lambda e: problems.append(str(e)))

            # without the token: refused, and nothing shown
            res = page.goto(srv.url.split("?")[0])
            assert res.status == 403 and "session token" in page.content()

            page.goto(srv.url)
            name, left, msg = page.locator("#field-name"), page.locator("#left"), page.locator("#msg")
            expect(name).to_have_text("current_reading")
            expect(left).to_contain_text("9 left to check")
            expect(page.locator("#why")).to_contain_text("62% sure, 95% needed")
            expect(page.locator("#alts li").first).to_contain_text("03241")
            expect(page.locator("#positions td")).to_have_count(15)
            _wait_js(page, "document.getElementById('field-img').complete && "
                                   "document.getElementById('field-img').naturalWidth > 0")
            assert page.evaluate("document.activeElement.id") == "value"
            # the page view, on and off, with this field outlined
            page.keyboard.press("p")
            expect(page.locator("#pageview")).to_be_visible()
            expect(page.locator("#page-frame .box")).to_have_count(5)
            expect(page.locator("#page-frame .box.here")).to_have_text("current_reading")
            page.keyboard.press("p")
            expect(page.locator("#pageview")).to_be_hidden()

            # letters never reach the value box
            page.keyboard.type("03x2")
            expect(msg).to_contain_text("Digits only")
            assert page.input_value("#value") == "032"
            page.keyboard.press("Escape")
            assert page.input_value("#value") == ""

            # 1. type and Enter: a correction
            page.keyboard.type("03247")
            page.keyboard.press("Enter")
            expect(name).to_have_text("litres_used")
            expect(msg).to_contain_text("Saved current_reading (page 1 of cards-2026-04.tif): 03247, corrected.")
            expect(left).to_contain_text("8 left")
            # 2. A keeps the proposal
            page.keyboard.press("a")
            expect(name).to_have_text("plot_number")
            expect(msg).to_contain_text("57, proposal kept")
            # 3. U: cannot be read
            page.keyboard.press("u")
            expect(name).to_have_text("reading_date")
            expect(msg).to_contain_text("cannot be read")
            # 4. B goes back; deciding again replaces the earlier decision
            page.keyboard.press("b")
            expect(name).to_have_text("plot_number")
            expect(page.locator("#earlier")).to_contain_text("Already decided: nothing (cannot be read) by ann")
            page.keyboard.type("0233")
            page.keyboard.press("Enter")
            expect(name).to_have_text("reading_date")
            # 5. E: blank on paper
            page.keyboard.press("e")
            expect(msg).to_contain_text("blank on paper")
            expect(name).to_have_text("plot_number")
            expect(page.locator("#field-where")).to_contain_text("page 3")
            expect(page.locator("#no-img")).to_be_visible()  # unregistered page: no crop,
            expect(page.locator("#pageview")).to_be_visible()  # so the whole page is shown

            # a second reviewer saves this field between showing and saving: refused with 409
            bob = open_ledger(out, create=False)
            try:
                queries.save_decision(bob, ids[(2, "plot_number")], action="correct", value="0051",
                                      version=0, reviewer="bob")
            finally:
                bob.close()
            page.keyboard.type("0052")
            page.keyboard.press("Enter")
            expect(msg).to_contain_text("Another reviewer saved this field")
            expect(page.locator("#earlier")).to_contain_text("Already decided: 0051 (corrected) by bob")

            # a request from the page without the token header is refused
            status = page.evaluate(f"fetch('/api/field/{ids[(2, 'plot_number')]}', "
                                   "{method: 'POST', headers: {'Content-Type': "
                                   "'application/json'}, body: JSON.stringify({action: 'confirm', version: 1})})"
                                   ".then(r => r.status)")
            assert status == 403

            # reload: the queue holds what is left
            page.reload()
            expect(left).to_contain_text("4 left to check")
            expect(name).to_have_text("reading_date")
            expect(page.locator("#field-where")).to_contain_text("page 3")
            assert page.evaluate("document.activeElement.id") == "value"

            # the filters narrow the list
            page.select_option("#f-name", "litres_used")
            expect(left).to_contain_text("1 left to check (4 in all)")
            expect(name).to_have_text("litres_used")
            assert page.evaluate("document.activeElement.id") == "value"
        finally:
            browser.close()

    # the only console complaints are the refusals this test provoked (403 without token, one 409)
    refused = [m for m in problems if m.startswith("Failed to load resource") and ("403" in m or "409" in m)]
    assert [m for m in problems if m not in refused] == []
    assert sum("409" in m for m in refused) == 1
    conn = open_ledger(out, create=False)
    try:
        rows = [dict(r) for r in conn.conn.execute("SELECT * FROM reviews ORDER BY id")]
        finals = {r["id"]: (r["final_value"], r["final_status"]) for r in conn.conn.execute("SELECT * FROM fields")}
    finally:
        conn.close()
    assert [(r["field_id"], r["action"], r["old_value"], r["new_value"], r["reviewer"]) for r in rows] == [
        (ids[(0, "current_reading")], "correct", "03241", "03247", "ann"),
        (ids[(0, "litres_used")], "confirm", "57", "57", "ann"),
        (ids[(1, "plot_number")], "unreadable", "0283", None, "ann"),
        (ids[(1, "plot_number")], "correct", None, "0233", "ann"),
        (ids[(1, "reading_date")], "empty", "32042026", "", "ann"),
        (ids[(2, "plot_number")], "correct", None, "0051", "bob"),
    ]
    # the model of the run, and the threshold that applied to each field (current_reading has its own)
    assert [(r["model_sha256"], r["threshold"]) for r in rows] == [("c0ffee00", 0.95)] + [("c0ffee00", 0.9)] * 5
    assert finals[ids[(1, "plot_number")]] == ("0233", "corrected")
    assert finals[ids[(2, "plot_number")]] == ("0051", "corrected")

    res = export_final(out, tmp_path / "export")
    with open(res.csv_path, newline="") as f:
        pages = list(csv.DictReader(f))
    assert (pages[0]["current_reading"], pages[0]["current_reading_how"]) == ("03247", "corrected")
    assert (pages[0]["litres_used"], pages[0]["litres_used_how"]) == ("57", "confirmed")
    assert (pages[1]["plot_number"], pages[1]["plot_number_how"]) == ("0233", "corrected")
    assert (pages[1]["reading_date"], pages[1]["reading_date_how"]) == ("", "empty")
    assert pages[2]["current_reading_how"] == "pending"


def test_review_of_a_real_demo_run(tmp_path):
    """`formread read` on three shipped demo pages with the shipped model, then the review page on its ledger.

    Also takes the README picture (docs/review.png) when FORMREAD_UPDATE_SCREENSHOT=1.
    """
    import json

    from typer.testing import CliRunner

    from formread.cli.main import app
    from formread.nn.modelfile import read_header
    from formread.store import demo_forms as demo_dir
    from formread.store import in_use_path as default_model_path

    sync_playwright, expect = _playwright()
    scans = tmp_path / "scans"
    scans.mkdir()
    names = ["scan_002.jpg", "scan_004.jpg", "scan_007.jpg"]
    for n in names:
        shutil.copy(demo_dir() / n, scans / n)
    truth = {json.loads(line)["source"]: json.loads(line)["fields"]
             for line in (demo_dir() / "truth.jsonl").read_text().splitlines() if line.strip()}
    model = default_model_path()
    out = tmp_path / "out"
    res = CliRunner().invoke(app, ["read", str(scans), "-l", str(demo_dir() / "layout.toml"), "-o", str(out),
                                   "-w", "1", "-q"])
    assert res.exit_code in (0, 3), res.output
    conn = open_ledger(out, create=False)
    try:
        pending = queries.list_pending(conn)
        first = queries.field_detail(conn, pending[0])
        second = queries.field_detail(conn, pending[1])
    finally:
        conn.close()
    assert len(pending) >= 2, "these three demo pages should leave at least two fields to review"
    assert first["has_image"]
    value = truth[Path(first["source"]).name][first["name"]]  # what is written on the card

    with running(out, reviewer="dora") as srv, sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM if os.path.isfile(CHROMIUM) else shutil.which("chromium"),
                                    args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 800})
            page.set_default_timeout(10_000)
            page.goto(srv.url)
            name = page.locator("#field-name")
            expect(name).to_have_text(first["name"])
            _wait_js(page, "document.getElementById('field-img').naturalWidth > 0")
            expect(page.locator("#alts li").first).to_be_visible()
            page.keyboard.press("p")
            expect(page.locator("#page-frame .box.here")).to_have_text(first["name"])
            expect(page.locator("#page-frame .box")).to_have_count(6)
            _wait_js(page, "document.getElementById('page-img').naturalWidth > 0")
            shot = page.screenshot()
            if os.environ.get("FORMREAD_UPDATE_SCREENSHOT") == "1":
                _small_png(shot, DOCS_PNG)
            if value:
                page.keyboard.type(value)
                page.keyboard.press("Enter")
            else:
                page.keyboard.press("e")
            expect(page.locator("#msg")).to_contain_text(f"Saved {first['name']}")
            expect(name).to_have_text(second["name"])
            page.keyboard.press("u")
            expect(page.locator("#msg")).to_contain_text("cannot be read")
        finally:
            browser.close()

    conn = open_ledger(out, create=False)
    try:
        rows = [dict(r) for r in conn.conn.execute("SELECT * FROM reviews ORDER BY id")]
    finally:
        conn.close()
    sha = read_header(model)["sha256"]
    assert [(r["field_id"], r["new_value"], r["reviewer"], r["model_sha256"]) for r in rows] == [
        (first["id"], value, "dora", sha), (second["id"], None, "dora", sha)]
    recs = {(r["page_id"], r["field"]): r for r in
            (json.loads(line) for line in export_final(out).jsonl_path.read_text().splitlines())}
    assert recs[(first["page_id"], first["name"])]["value"] == value
    assert recs[(first["page_id"], first["name"])]["how"] in (("corrected", "confirmed") if value else ("empty",))
    assert recs[(second["page_id"], second["name"])]["how"] == "unreadable"
