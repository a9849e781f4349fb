"""Shelving and out of service (ISA-18.2 / IEC 62682 terms) in a real headless Chromium
against `whirlwatch dashboard`: an engineer shelves an open alarm with the alarm page's
form and sees it "shelved until" there and on the alarms list; puts a machine out of
service with the machine page's form and sees the banner on every page; returns it to
service and the banner goes. Screenshots go to test-artifacts/."""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import pytest
from dashboard_seed import PASSWORDS, seed
from dashboard_signin import dashboard_server

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

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
    url = f"sqlite:///{tmp_path_factory.mktemp('shelf') / 'store.sqlite'}"
    seed(url, machines=2, readings_per_point=40)
    with dashboard_server(url) as port:  # the plant's time zone is UTC (the default)
        yield f"http://127.0.0.1:{port}"


@pytest.fixture()
def page(server):
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=CHROMIUM, args=[
            "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update"])
        pg = b.new_context(viewport={"width": 1400, "height": 1000}).new_page()
        pg.set_default_timeout(15_000)
        pg.goto(server + "/login")
        pg.fill("input[name=username]", "eng")
        pg.fill("input[name=password]", PASSWORDS["eng"])
        pg.click("#login-form button[type=submit]")
        pg.wait_for_selector("body[data-loaded='1']")
        yield pg
        b.close()


def test_shelved_state_and_out_of_service_banner_show(page, server):
    page.goto(server + "/alarms/?state=open")
    alarm_id = page.locator("#alarms-table tbody tr >> nth=0").get_attribute("data-alarm")
    page.goto(f"{server}/alarms/{alarm_id}")
    until = (dt.datetime.now(dt.UTC) + dt.timedelta(hours=4)).strftime("%Y-%m-%dT%H:%M")
    page.fill("#shelve-form input[name=until]", until)
    page.fill("#shelve-form input[name=comment]", "vibration known, repair on Monday")
    page.click("#shelve-form button[type=submit]")
    expect(page.locator(".notice-ok")).to_contain_text(f"Alarm {alarm_id} shelved.")
    expect(page.locator("#alarm-shelved")).to_contain_text("vibration known, repair on Monday")
    expect(page.locator("#alarm-shelved")).to_contain_text(until.replace("T", " "))
    page.screenshot(path=str(ARTIFACTS / "shelved-alarm.png"), full_page=True)
    page.goto(server + "/alarms/?state=open")
    expect(page.locator(f"#alarms-table tr[data-alarm='{alarm_id}'] .astate-shelved")).to_contain_text("shelved until")

    page.goto(server + "/machines/fan-001")
    page.fill("#out-of-service-form input[name=comment]", "coupling realignment")
    page.click("#out-of-service-form button[type=submit]")
    expect(page.locator("#machine-out-of-service")).to_contain_text("coupling realignment")
    for path in ("/", "/alarms/", "/machines/fan-000"):
        page.goto(server + path)
        banner = page.locator("#planned-work")
        expect(banner).to_be_visible()
        expect(banner).to_contain_text("fan-001")
        expect(banner).to_contain_text("coupling realignment")
    page.screenshot(path=str(ARTIFACTS / "out-of-service-banner.png"), full_page=True)

    page.goto(server + "/machines/fan-001")
    page.click("#return-form button[type=submit]")
    expect(page.locator("#machine-in-service")).to_be_visible()
    page.goto(server + "/")
    expect(page.locator("#planned-work")).to_have_count(0)
