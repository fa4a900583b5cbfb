"""The web page in a real browser: Debian's headless Chromium driven by playwright, against a real ``lenslane serve``.

Screenshots of the queue and of an order page are saved under ``test-output/web/``.
Playwright never downloads a browser here: it is pointed at the system's chromium.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from lenslane.vocabulary import CAUTION
from tests.conftest import REPO

pytestmark = pytest.mark.slow

CHROMIUM = os.environ.get("LENSLANE_CHROMIUM", "/usr/bin/chromium")
OUTPUT = REPO / "test-output" / "web"
#: Flags that work in this sandbox; the profile is a new empty folder for each test.
CHROMIUM_FLAGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"]


@pytest.fixture
def browser_page(tmp_path):
    """A page of a fresh headless Chromium (its own empty profile)."""
    if not (Path(CHROMIUM).exists() or shutil.which("chromium")):
        pytest.fail("the browser tests need Debian's chromium: run `apt-get install -y chromium` as root "
                    "(`make test` does it when run as root)")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        context = playwright.chromium.launch_persistent_context(
            str(tmp_path / "profile"), executable_path=CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium"),
            headless=True, args=CHROMIUM_FLAGS, viewport={"width": 1280, "height": 900})
        try:
            yield context.pages[0] if context.pages else context.new_page()
        finally:
            context.close()


@pytest.fixture
def server(sample_lab):
    """``lenslane serve LAB --port 0`` as a real process; yields (base URL, lab, results)."""
    lab, results = sample_lab
    process = subprocess.Popen([sys.executable, "-m", "lenslane.cli", "serve", str(lab.root), "--port", "0"],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        line = process.stdout.readline()
        found = re.search(r"at (http://127\.0\.0\.1:\d+/)", line)
        assert found, f"the server did not say where it listens: {line!r} {process.stderr.read() if process.poll() else ''}"
        yield found.group(1), lab, results
    finally:
        process.terminate()
        process.wait(timeout=10)


def _screenshot(page, name: str) -> Path:
    OUTPUT.mkdir(parents=True, exist_ok=True)
    path = OUTPUT / name
    page.screenshot(path=str(path), full_page=True)
    assert path.stat().st_size > 10_000
    return path


def test_queue_search_and_order_page_in_a_browser(server, browser_page):
    base, lab, results = server
    page = browser_page
    page.goto(base)
    assert page.locator("p.caution").first.inner_text().endswith(CAUTION)
    # Today's counts as the lab folder holds them.
    assert page.locator(".count-published").inner_text() == str(len(list((lab.root / "outbox").glob("*.json"))))
    assert page.locator(".count-review").inner_text() == str(len(list((lab.root / "review").glob("*.json"))))
    assert page.locator(".count-rejected").inner_text() == str(len(list((lab.root / "rejected").glob("*.errors.json"))))
    _screenshot(page, "queue.png")

    page.fill("input[name=q]", "minus-tilt")
    page.click("header form button")
    page.wait_for_url(re.compile(r"/search\?q=minus-tilt"))
    page.click("a[href='/orders/DP-1000']")
    page.wait_for_url(re.compile(r"/orders/DP-1000$"))
    assert page.locator("h1").inner_text().startswith("Order DP-1000")
    geometry = results["DP-1000"]["lenses"]["right"]["geometry"]
    assert page.locator(".eye").first.locator("svg").count() >= 3
    thinnest = page.locator(".eye").first.locator("text.mark-thinnest").text_content()
    assert thinnest == f"thinnest edge {geometry['edge_min_mm']:.1f} mm"
    assert page.locator(".flags section.warning .level").inner_text().lower() == "warning"
    # The pictures are drawn at a readable size.
    box = page.locator(".eye figure svg").first.bounding_box()
    assert box["width"] > 300
    _screenshot(page, "order-DP-1000.png")


def test_queue_order_approve_in_a_browser(server, browser_page):
    base, lab, results = server
    page = browser_page
    page.goto(base)
    page.click("table.queue a[href='/orders/DP-1011']")
    page.wait_for_url(re.compile(r"/orders/DP-1011$"))
    _screenshot(page, "order-DP-1011-in-review.png")
    page.check("input[name=action][value=approve]")
    page.fill("#by", "Technician T-7")
    page.fill("#note", "Wrap checked with the practice.")
    page.click("form.decide button[type=submit]")
    page.wait_for_url(re.compile(r"/orders/DP-1011\?done=approve$"))
    assert page.locator("p.message").inner_text() == "Decision recorded: approve."
    assert page.locator("form.decide").count() == 0
    published = lab.root / "outbox" / "DP-1011.json"
    for _ in range(50):  # a running engine may apply the decision a moment later
        if published.exists():
            break
        time.sleep(0.1)
    import json

    result = json.loads(published.read_text())
    assert result["status"] == "ready" and result["approved"]["by"] == "Technician T-7"
    page.goto(base)
    assert page.locator("table.queue a[href='/orders/DP-1011']").count() == 0
    assert page.locator(".count-review").inner_text() == "1"  # it went to review today, and was approved
    assert page.locator(".count-published").inner_text() == str(len(list((lab.root / "outbox").glob("*.json"))))
