"""Running / stopped in a real headless Chromium against the real dashboard server: an
engineer announces a planned stop on the machine page, the overview shows the machine
stopped, the machine page too, and ending the stop takes it back (docs/api.md, "Planned
stops"; docs/alarms.md, "Running and stopped")."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from dashboard_seed import PASSWORDS, seed
from test_browser import CHROMIUM, _free_port

pytestmark = [pytest.mark.browser, pytest.mark.slow]

try:
    from playwright.sync_api import expect, sync_playwright
except ImportError:  # pragma: no cover
    sync_playwright = None


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    if sync_playwright is None:
        pytest.skip("the playwright Python package is not installed")
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"Chromium is not installed at {CHROMIUM} (apt-get install chromium)")
    url = f"sqlite:///{tmp_path_factory.mktemp('stops-browser') / 'store.sqlite'}"
    seed(url, machines=2, readings_per_point=8, detected=1)
    port = _free_port()
    exe = shutil.which("whirlwatch", path=str(Path(sys.executable).parent)) or "whirlwatch"
    proc = subprocess.Popen([exe, "dashboard", "--port", str(port), "--database", url],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 30
    while True:
        try:
            urllib.request.urlopen(base + "/api/v1/openapi.json", timeout=1).read()
            break
        except OSError:
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                raise RuntimeError("dashboard did not start: " + proc.stderr.read().decode()[-2000:]) from None
            time.sleep(0.2)
    yield base
    proc.terminate()
    proc.wait(10)
    proc.stderr.close()


def test_an_engineer_announces_and_ends_a_planned_stop(server) -> None:
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=[
            "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update"])
        try:
            page = browser.new_context(viewport={"width": 1400, "height": 1000}).new_page()
            errors: list[str] = []
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(server + "/login")
            page.fill("input[name=username]", "eng")
            page.fill("input[name=password]", PASSWORDS["eng"])
            page.click("#login-form button[type=submit]")
            page.wait_for_selector("body[data-loaded='1']")
            row = page.locator("#machines-table tbody tr[data-machine='fan-000']")
            expect(row.locator("[data-running]")).to_have_attribute("data-running", "running")

            page.goto(server + "/machines/fan-000")
            expect(page.locator("#fact-running")).to_have_text("running")
            expect(page.locator("#stops-table tbody")).to_contain_text("No planned stop.")
            page.fill("#stop-form input[name=hours]", "2")
            page.fill("#stop-form input[name=comment]", "coupling change")
            page.click("#stop-form button[type=submit]")
            stop_row = page.locator("#stops-table tbody tr[data-stop]")
            expect(stop_row).to_have_count(1)
            expect(stop_row).to_contain_text("coupling change")
            page.reload()
            expect(page.locator("#fact-running")).to_have_text("stopped")

            page.goto(server + "/")
            expect(row.locator("[data-running]")).to_have_attribute("data-running", "stopped")

            page.goto(server + "/machines/fan-000")
            page.locator("#stops-table button[data-stop]").click()
            expect(page.locator("#stops-table tbody tr[data-stop]")).to_have_count(0)
            page.goto(server + "/")
            expect(row.locator("[data-running]")).to_have_attribute("data-running", "running")
            assert errors == [], errors
        finally:
            browser.close()
