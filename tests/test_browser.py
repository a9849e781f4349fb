"""The real dashboard server in a real headless Chromium: sign in, overview, machine
charts, acknowledge an alarm. Screenshots go to test-artifacts/."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
from dashboard_seed import BLOCK, FS_HZ, PASSWORDS, T_END, seed
from service_helpers import message, offline_service

from monitor.model.readings import SpeedReading, Waveform

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

pytestmark = [pytest.mark.browser, pytest.mark.slow]

try:
    from playwright.sync_api import expect, sync_playwright
except ImportError:  # pragma: no cover
    sync_playwright = None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    if sync_playwright is None:
        pytest.skip("the playwright Python package is not installed")
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"Chromium is not installed at {CHROMIUM} (apt-get install chromium)")
    db = tmp_path_factory.mktemp("browser") / "store.sqlite"
    url = f"sqlite:///{db}"
    seed(url, machines=6, readings_per_point=60, names={2: "<script>alert(1)</script>"})
    _flagged_then_speed_topic(url)
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


@pytest.fixture(scope="module")
def page(server):
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_playwright() as pw:
        browser = pw.chromium.launch(
            executable_path=CHROMIUM,
            args=["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update"],
        )
        ctx = browser.new_context(viewport={"width": 1400, "height": 1000})
        pg = ctx.new_page()
        pg.errors = []
        pg.on("console", lambda m: pg.errors.append(m.text) if m.type == "error" else None)
        pg.on("pageerror", lambda e: pg.errors.append(str(e)))
        yield pg
        browser.close()


def _flagged_then_speed_topic(url: str) -> None:
    """fan-005 after the seeded range, through the service's batch path: three readings of
    de-h at 14 Hz, the middle one with five samples knocked to 400 m/s^2 (sensor health
    flags its spikes), then speed messages alone (the sensor gone, the tach reporting)."""
    t0 = T_END.timestamp() + 600.0
    t = np.arange(BLOCK) / FS_HZ
    speeds = [SpeedReading("fan-005", t0 + 1200.0 + 60.0 * k, 14.0 + 0.1 * k) for k in range(10)]
    msgs = []
    for k in range(3):
        x = 0.5 * np.sin(2 * np.pi * 14.0 * t) + np.random.default_rng(k).normal(0.0, 0.01, BLOCK)
        if k == 1:
            x[[400, 1400, 2400, 3000, 3600]] = 400.0
        msgs.append(message(Waveform("fan-005", "de-h", t0 + 600.0 * k, FS_HZ, "m/s^2", x, speed_hz=14.0)))
    msgs += [message(r) for r in speeds]
    svc = offline_service(url, clock=lambda: speeds[-1].ts + 60.0)
    try:
        for m in msgs:
            svc.handle_batch([m])
    finally:
        svc.store.close()


def _canvas_ink(page, selector):
    # Count non-transparent pixels of the chart's canvas: a drawn chart has many.
    return page.eval_on_selector(selector + " canvas", """c => {
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
        let n = 0; for (let i = 3; i < d.length; i += 4) if (d[i] > 0) n++; return n; }""")


def test_walkthrough(server, page):
    page.goto(server + "/")
    assert "/login" in page.url
    page.fill("input[name=username]", "eng")
    page.fill("input[name=password]", PASSWORDS["eng"])
    page.click("#login-form button[type=submit]")
    page.wait_for_selector("body[data-loaded='1']")
    rows = page.locator("#machines-table tbody tr")
    assert rows.count() == 6
    # A machine named <script> shows as text.
    assert page.locator("#machines-table tbody tr[data-machine='fan-002'] a").inner_text() == "<script>alert(1)</script>"
    assert page.locator("#caution").is_visible()
    # The overview's filters, sort and pages are the server's (docs/api.md, "Machines").
    assert page.locator("#page-where").inner_text() == "1–6 of 6"
    page.fill("#f-text", "Dryer fan 4")
    expect(rows).to_have_count(1)
    expect(page.locator("#page-where")).to_have_text("1–1 of 1")
    page.fill("#f-text", "")
    expect(rows).to_have_count(6)
    page.click("#machines-table th[data-key='name']")
    expect(page.locator("#machines-table tbody tr").first).to_have_attribute("data-machine", "fan-002")
    page.click("#machines-table th[data-key='name']")
    expect(page.locator("#machines-table tbody tr").first).to_have_attribute("data-machine", "fan-005")
    page.select_option("#f-state", "alarm")
    expect(rows).not_to_have_count(6)
    assert all(c == "state-row-alarm" for c in rows.evaluate_all("rs => rs.map(r => r.className)"))
    page.select_option("#f-state", "")
    expect(rows).to_have_count(6)
    page.screenshot(path=str(ARTIFACTS / "overview.png"), full_page=True)

    page.click("#machines-table tbody tr[data-machine='fan-001'] a")
    page.wait_for_selector("body[data-loaded='1']")
    page.wait_for_selector("#chart-overall[data-drawn='1']")
    assert page.get_attribute("#chart-resonance", "data-series") == "1x|2x|7x"
    assert page.get_attribute("#chart-spectrum", "data-series") == "de-h velocity"
    assert page.get_attribute("#chart-overall", "data-series") == "overall|A/B|B/C|C/D|baseline"
    assert page.get_attribute("#chart-orders", "data-series") == "1x|1x baseline|2x|2x baseline|7x|7x baseline"
    assert page.locator("#caution").is_visible()
    for sel in ("#chart-resonance", "#chart-spectrum", "#chart-overall", "#chart-orders"):
        assert _canvas_ink(page, sel) > 1000, sel
    assert page.locator("#margins-table tbody tr").count() == 6
    # The newest alarm's evidence page, then the spectrum stored when it was raised.
    page.click("#machine-alarms tbody tr >> nth=0 >> a.evidence-link")
    page.wait_for_selector(".evidence-table")
    page.click(".evidence-step[data-step='raised'] .open-spectrum >> nth=0")
    page.wait_for_selector("body[data-loaded='1']")
    page.locator("#spectrum-latest").wait_for(state="visible")
    assert page.locator("#spectrum-caption").inner_text().startswith("stored with 'raised'")
    page.screenshot(path=str(ARTIFACTS / "machine.png"), full_page=True)

    page.goto(server + "/alarms/?state=active&machine=fan-001")
    row = page.locator("#alarms-table tbody tr").first
    alarm_id = row.get_attribute("data-alarm")
    row.locator("input[name=comment]").fill("checked the pedestal bolts")
    row.locator("button").click()
    page.wait_for_load_state()
    page.goto(server + "/alarms/?machine=fan-001")
    done = page.locator(f"#alarms-table tr[data-alarm='{alarm_id}']")
    assert done.locator(".astate").inner_text() == "acknowledged"
    assert done.locator(".ack-by").inner_text() == "eng"
    assert page.locator("#caution").is_visible()
    page.screenshot(path=str(ARTIFACTS / "alarms.png"), full_page=True)
    # No script errors and no CSP violations on any page.
    assert page.errors == [], page.errors


def test_flagged_readings_and_speed_topic(server, page):
    page.goto(server + "/machines/fan-005")
    if "/login" in page.url:
        page.fill("input[name=username]", "vic")
        page.fill("input[name=password]", PASSWORDS["vic"])
        page.click("#login-form button[type=submit]")
        page.goto(server + "/machines/fan-005")
    page.wait_for_selector("body[data-loaded='1']")
    page.wait_for_selector("#chart-overall[data-drawn='1']")
    # The running speed is the tach's, after the last vibration reading.
    assert page.get_attribute("#fact-speed", "data-source") == "speed_topic"
    assert page.locator("#fact-speed").inner_text().endswith("(14.90 Hz)")
    # The spike-flagged reading is drawn apart from the trend line.
    assert page.get_attribute("#chart-overall", "data-series").startswith("overall|flagged by sensor health|A/B|B/C|C/D")
    # The resonance map runs on to the last speed message.
    assert float(page.get_attribute("#chart-resonance", "data-x-last")) == T_END.timestamp() + 600.0 + 1200.0 + 540.0
    assert page.locator("#margins-table tbody tr").count() == 6
    for sel in ("#chart-resonance", "#chart-overall"):
        assert _canvas_ink(page, sel) > 1000, sel
    page.screenshot(path=str(ARTIFACTS / "machine-flagged.png"), full_page=True)
    assert page.errors == [], page.errors
