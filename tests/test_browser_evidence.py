"""The machine page's evidence views in a real headless Chromium against the real dashboard
server: each chart drew the series and markers it should (growth features, a spectrum
against its baseline, a waterfall, a stored waveform and its envelope spectrum with the
bearing defect frequencies, the Bode and polar plots of a passage). The data is stored
through the service's batch path: a motor with an outer-race defect (tests/evidence_plant.py)
and a run-up and coast-down through a 20 Hz mode (tests/passage_run.py). Screenshots go to
test-artifacts/."""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
import pytest
from dashboard_seed import PASSWORDS
from dashboard_signin import dashboard_server
from evidence_plant import (
    FS_HZ,
    MACHINE,
    POINT,
    SHAFT_HZ,
    bpfo_hz,
    outer_race_samples,
    store_with_readings,
)
from passage_run import feed, machine, run_messages
from service_helpers import message, offline_service

from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.readings import Waveform
from monitor.model.registry import Registry
from monitor.store import Store, import_registry

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"
READINGS = 6
#: After the defect blocks, three clipped ones (the amplifier at its rails): sensor health
#: raises a sensor_fault on the third (persistence 3, docs/alarms.md), keeping its waveform.
CLIPPED = 3

pytestmark = [pytest.mark.browser, pytest.mark.slow]

try:
    from playwright.sync_api import sync_playwright
except ImportError:  # pragma: no cover
    sync_playwright = None


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    if sync_playwright is None:
        pytest.skip("the playwright Python package is not installed")
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"Chromium is not installed at {CHROMIUM} (apt-get install chromium)")
    url = f"sqlite:///{tmp_path_factory.mktemp('evidence') / 'store.sqlite'}"
    end = time.time() - 600.0
    store_with_readings(url, end, READINGS, spectra_snapshot_interval_s=30, spectra_waveform_interval_s=30)
    clipped = []
    for k in range(1, CLIPPED + 1):
        x = outer_race_samples(100 + k)
        rail = 0.05 * float(np.max(np.abs(x)))  # well inside the signal: long runs at the rails
        clipped.append(message(Waveform(MACHINE, POINT, end + 60.0 * k, FS_HZ, "m/s^2", np.clip(x, -rail, rail),
                                        speed_hz=SHAFT_HZ)))
    svc = offline_service(url, lambda: end + 60.0 * CLIPPED, spectra_snapshot_interval_s=30,
                          spectra_waveform_interval_s=30)
    try:
        for m in clipped:
            svc.handle_batch([m])
    finally:
        svc.store.close()
    store = Store.open(url)
    try:
        with store.transaction() as s:
            import_registry(s, Registry(machines=(machine(),)))
    finally:
        store.close()
    feed(url, run_messages(time.time() - 60.0))
    with dashboard_server(url) as port:
        yield f"http://127.0.0.1:{port}"


@pytest.fixture(scope="module")
def page(server):
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_playwright() as pw:
        browser = pw.chromium.launch(
            executable_path=CHROMIUM,
            args=["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update"])
        pg = browser.new_context(viewport={"width": 1400, "height": 1000}).new_page()
        pg.errors = []
        pg.on("console", lambda m: pg.errors.append(m.text) if m.type == "error" else None)
        pg.on("pageerror", lambda e: pg.errors.append(str(e)))
        pg.goto(server + "/login")
        pg.fill("input[name=username]", "vic")
        pg.fill("input[name=password]", PASSWORDS["vic"])
        pg.click("#login-form button[type=submit]")
        pg.wait_for_selector("body[data-loaded='1']")
        yield pg
        browser.close()


def ink(page, selector: str) -> int:
    """Non-transparent pixels of the chart's canvas: a drawn chart has many."""
    return page.eval_on_selector(selector + " canvas", """c => {
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
        let n = 0; for (let i = 3; i < d.length; i += 4) if (d[i] > 0) n++; return n; }""")


def test_bearing_evidence_views(server, page):
    page.goto(server + f"/machines/{MACHINE}")
    page.wait_for_selector("#evidence-root[data-loaded='1']", timeout=30000)
    page.wait_for_selector("#chart-envelope[data-drawn='1']", timeout=30000)
    # the features the API returns, one row per point and feature, with the overall level
    assert page.locator(f"#features-table tbody tr[data-point='{POINT}'][data-feature='overall']").count() == 1
    # newest against baseline: two series
    series = page.get_attribute("#chart-compare", "data-series").split("|")
    assert len(series) == 2 and series[0].startswith("now ") and series[1].startswith("baseline ")
    # one waterfall row per stored velocity spectrum
    assert len(page.get_attribute("#chart-waterfall", "data-series").split("|")) == READINGS + CLIPPED
    # the newest waveform, all its samples
    assert page.get_attribute("#chart-waveform", "data-points") == "32768"
    # envelope: BPFO, BPFI, BSF, FTF at 1x-3x and BPFI -+ fr (Randall and Antoni 2011)
    markers = page.get_attribute("#chart-envelope", "data-markers").split("|")
    for d in ("BPFO", "BPFI", "BSF", "FTF"):
        assert {d, "2x" + d, "3x" + d} <= set(markers)
    assert {"BPFI-fr", "BPFI+fr"} <= set(markers)
    # the caption gives the demodulation and the indicators; BPFO stands out for this defect
    caption = page.locator("#envelope-caption").inner_text()
    assert "BPFO" in caption and f"{SHAFT_HZ * 60:.0f} r/min" in caption
    geometry = BearingGeometry(9, 7.94, 39.04, 0.0)
    assert geometry.frequencies_hz(SHAFT_HZ).bpfo == pytest.approx(bpfo_hz(), rel=1e-12)
    for sel in ("#chart-compare", "#chart-waterfall", "#chart-waveform", "#chart-envelope"):
        assert ink(page, sel) > 1000, sel
    # an older stored waveform draws on choice
    page.select_option("#waveform-pick", index=READINGS - 1)
    page.wait_for_function("document.getElementById('chart-envelope').dataset.drawn === '1'")
    page.locator("#waveform-panel").screenshot(path=str(ARTIFACTS / "evidence-waveform.png"))
    page.locator("#waterfall-panel").screenshot(path=str(ARTIFACTS / "evidence-waterfall.png"))
    # the sensor_fault alarm's evidence opens the waveform of the reading that raised it
    page.click("#machine-alarms tbody tr >> nth=0 >> a.evidence-link")
    page.wait_for_selector("#alarm-summary")
    page.click(".evidence-step .open-waveform >> nth=0")
    page.wait_for_selector("#waveform-panel[data-opened]:not([data-opened='none'])")
    chosen = page.locator("#waveform-pick option:checked").inner_text()
    assert chosen.endswith("alarm evidence"), chosen
    page.wait_for_function("document.getElementById('chart-envelope').dataset.drawn === '1'")
    # no passage on this machine: the sweep plots say so
    assert page.get_attribute("#chart-bode-amplitude", "data-drawn") == "0"
    assert page.errors == [], page.errors


def test_sweep_plots_of_a_passage(server, page):
    page.goto(server + "/machines/fan-9")
    page.wait_for_selector("#evidence-root[data-loaded='1']", timeout=30000)
    page.wait_for_selector("#chart-polar[data-drawn='1']", timeout=30000)
    assert page.get_attribute("#chart-bode-amplitude", "data-series") == "1x amplitude"
    assert page.get_attribute("#chart-bode-amplitude", "data-markers").startswith("critical speed ")
    assert page.get_attribute("#chart-bode-phase", "data-series") == "phase change from the slowest point"
    assert page.get_attribute("#chart-bode-phase", "data-markers").split("|")[0] == "90°"
    assert page.get_attribute("#chart-polar", "data-series") == "1x (amplitude, -phase)"
    caption = page.locator("#sweep-caption").inner_text()
    assert "natural frequency" in caption and "amplification factor" in caption and "90°" in caption
    for sel in ("#chart-bode-amplitude", "#chart-bode-phase", "#chart-polar"):
        assert ink(page, sel) > 1000, sel
    # the other passage draws on choice
    page.select_option("#sweep-pick", index=1)
    page.wait_for_function("document.getElementById('chart-polar').dataset.drawn === '1'")
    page.locator("#sweep-panel").screenshot(path=str(ARTIFACTS / "evidence-sweep.png"))
    assert page.errors == [], page.errors
