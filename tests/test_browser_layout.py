"""The real dashboard in headless Chromium: a 390 px phone screen (no sideways scrolling,
the header clear of the page) and times as the plant's clock shows them (charts, tables,
the overview). Screenshots go to test-artifacts/."""

from __future__ import annotations

import datetime as dt
import os
import re
from pathlib import Path

import pytest
from dashboard_seed import PASSWORDS, seed
from dashboard_signin import dashboard_server

from monitor.model.timefmt import plant_time, time_zone

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"
#: Viewport width of a common phone, CSS px (the issue's test case).
PHONE_PX = 390
ZONE = "Europe/Berlin"
SHOWN = re.compile(r"\d{4}-\d\d-\d\d [0-2]\d:[0-5]\d [+-]\d\d:\d\d")

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
    url = f"sqlite:///{tmp_path_factory.mktemp('layout') / 'store.sqlite'}"
    # Long names and locations: the phone layout must wrap them, not widen the page.
    seed(url, machines=4, readings_per_point=40,
         names={1: "Secondary-air-preheater-recirculation-fan-with-a-long-name"})
    with dashboard_server(url, "--time-zone", ZONE) as port:
        yield f"http://127.0.0.1:{port}"


@pytest.fixture(scope="module")
def browser():
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=CHROMIUM, args=[
            "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update"])
        yield b
        b.close()


def _page(browser, server, width: int, height: int, user: str = "ada"):
    ctx = browser.new_context(viewport={"width": width, "height": height})
    page = ctx.new_page()
    page.errors = []
    page.on("console", lambda m: page.errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: page.errors.append(str(e)))
    page.goto(server + "/login")
    page.fill("input[name=username]", user)
    page.fill("input[name=password]", PASSWORDS[user])
    page.click("#login-form button[type=submit]")
    page.wait_for_selector("body[data-loaded='1']")
    return page


def _overlaps(a: dict, b: dict) -> bool:
    return not (a["right"] <= b["left"] or b["right"] <= a["left"]
                or a["bottom"] <= b["top"] or b["bottom"] <= a["top"])


HEADER_BOXES = """() => {
  const box = e => { const r = e.getBoundingClientRect();
    return { left: r.left, right: r.right, top: r.top, bottom: r.bottom }; };
  const bar = document.querySelector('.topbar');
  return { bar: box(bar), main: box(document.querySelector('main')),
           items: [...bar.querySelectorAll('.brand, .mainnav a, .whoami span, .whoami button')].map(box) };
}"""


@pytest.mark.parametrize("path", ["/", "/alarms/"])
def test_phone_screen_has_no_sideways_scrolling_and_a_clear_header(browser, server, path):
    page = _page(browser, server, PHONE_PX, 844)
    if path != "/":
        page.goto(server + path)
        page.wait_for_load_state()
    # Before: the overview's and the alarms page's tables made the page wider than the
    # screen, and the header's links ran into each other.
    width = page.evaluate("document.documentElement.scrollWidth")
    assert width <= PHONE_PX, f"{path}: {width} px wide"
    boxes = page.evaluate(HEADER_BOXES)
    items = boxes["items"]
    assert len(items) >= 6  # brand, five links for an admin, name, sign-out
    for i, a in enumerate(items):
        assert a["left"] >= 0 and a["right"] <= PHONE_PX, (path, a)
        assert a["bottom"] <= boxes["bar"]["bottom"] + 0.5, (path, a)  # inside the bar
        for b in items[i + 1:]:
            assert not _overlaps(a, b), (path, a, b)
    assert boxes["bar"]["bottom"] <= boxes["main"]["top"] + 0.5  # the page starts below it
    if path == "/":
        # Each machine is still there, with its name and state readable.
        assert page.locator("#machines-table tbody tr").count() == 4
        assert page.locator("#machines-table tbody tr[data-machine='fan-001'] a").is_visible()
    else:
        assert page.locator("#alarms-table tbody tr").count() >= 1
    page.screenshot(path=str(ARTIFACTS / f"phone{path.replace('/', '-').rstrip('-') or '-overview'}.png"),
                    full_page=True)
    assert page.errors == [], page.errors


def test_times_on_the_plant_clock_in_the_browser(browser, server):
    page = _page(browser, server, 1400, 1000, "eng")
    assert SHOWN.search(page.locator("#refreshed").inner_text())
    # The browser writes exactly what the server writes for the same instants, across
    # both daylight-saving changes of the zone (the EU rule: Directive 2000/84/EC).
    zone = time_zone(ZONE)
    instants = [dt.datetime(2026, 3, 29, 0, 59, tzinfo=dt.UTC), dt.datetime(2026, 3, 29, 1, 0, tzinfo=dt.UTC),
                dt.datetime(2026, 10, 25, 0, 30, tzinfo=dt.UTC), dt.datetime(2026, 10, 25, 1, 30, tzinfo=dt.UTC),
                dt.datetime(2026, 7, 1, 13, 7, tzinfo=dt.UTC)]
    shown = page.evaluate("xs => xs.map(x => WW.when(x))", [t.isoformat() for t in instants])
    assert shown == [plant_time(t, zone) for t in instants]
    assert shown[-1] == "2026-07-01 15:07 +02:00"  # 24-hour, summer time UTC+2

    page.click("#machines-table tbody tr[data-machine='fan-000'] a")
    page.wait_for_selector("#chart-overall[data-drawn='1']")
    assert SHOWN.fullmatch(page.locator("#fact-last").inner_text())
    # The chart's legend: hover the middle of the trend and read the time it shows.
    plot = page.locator("#chart-overall .u-over")
    plot.scroll_into_view_if_needed()
    box = plot.bounding_box()
    for step in (3, 2):  # pointer moves inside the plot area: uPlot follows mouse events
        page.mouse.move(box["x"] + box["width"] / step, box["y"] + box["height"] / 2, steps=4)
    legend_time = page.locator("#chart-overall .u-legend .u-series").first.locator(".u-value").inner_text()
    assert SHOWN.fullmatch(legend_time), legend_time
    # Axis ticks: clock times (and dates), never "1pm" or "AM"/"PM".
    ticks = page.evaluate("splits => WW.timeTicks(null, splits)",
                          [dt.datetime(2026, 3, 10, h, tzinfo=dt.UTC).timestamp() for h in (10, 12, 14)])
    assert ticks == ["11:00\n2026-03-10", "13:00", "15:00"]  # UTC+1 in March before the change
    assert not any(re.search(r"[ap]m", t, re.I) for t in ticks)
    page.screenshot(path=str(ARTIFACTS / "machine-times.png"), full_page=True)
    assert page.errors == [], page.errors
