"""The machine page and the alarm evidence page in headless Chromium (issue 15): the shaded
bands drawn are the margin table's own (API 684 separation margins, below and above each
mode), the resonance map's axis spans the modes and 1x, 2x rather than the highest order,
the spectrum opens on the span of interest with the full span one click away, and the
evidence page reads as words. The server and browser are tests/test_browser.py's fixtures
(a server of this module's own). Screenshots go to test-artifacts/."""

from __future__ import annotations

import json

import pytest
from test_browser import ARTIFACTS, _canvas_ink, page, server  # noqa: F401  (fixtures)
from test_dashboard_explain import PEDESTAL_ZETA, api684_margins_pct, significant_digits

pytestmark = [pytest.mark.browser, pytest.mark.slow]

#: Headroom the page leaves above what an axis must show (dashboard/static/js/machine.js).
HEADROOM = 0.1


def _sign_in(page, server, path):  # noqa: F811
    page.goto(server + path)
    if "/login" in page.url:
        page.fill("input[name=username]", "eng")
        from dashboard_seed import PASSWORDS

        page.fill("input[name=password]", PASSWORDS["eng"])
        page.click("#login-form button[type=submit]")
        page.goto(server + path)
    page.wait_for_load_state()


def _api(page, url, method="GET", body=None):  # noqa: F811
    return page.evaluate("([u, m, b]) => WW.api(u, m === 'GET' ? undefined : { method: m, body: b })", [url, method, body])


def test_bands_axis_and_spectrum_span(server, page):  # noqa: F811
    _sign_in(page, server, "/machines/fan-003")
    page.wait_for_selector("body[data-loaded='1']")
    base = "/api/v1/machines/fan-003"
    # A mode low enough that the highest order (7x) runs above it, and the pump
    # case: a mode with 2x 19.9 % above it (clear of its API 684 band, inside a symmetric one).
    plate = next(m for m in _api(page, base + "/modes")["items"] if m["name"] == "base plate")
    _api(page, f"{base}/modes/{plate['id']}", "PUT", {"frequency_hz": 45.0})
    two_x = next(r for r in _api(page, base)["margins"] if r["excitation"] == "2x")
    _api(page, base + "/modes", "POST", {"name": "pump-like lateral", "frequency_hz": two_x["excitation_hz"] / 1.199,
                                         "damping_ratio": PEDESTAL_ZETA})
    page.reload()
    page.wait_for_selector("body[data-loaded='1']")
    page.wait_for_selector("#chart-resonance[data-drawn='1']")
    m = _api(page, base)

    # The bands drawn are the read layer's, edge for edge.
    drawn = {b["mode"]: b for b in json.loads(page.get_attribute("#chart-resonance", "data-bands"))}
    assert drawn == {b["mode"]: {"mode": b["mode"], "low_hz": b["low_hz"], "high_hz": b["high_hz"]} for b in m["mode_bands"]}
    assert json.loads(page.get_attribute("#chart-spectrum", "data-bands")) == list(drawn.values())
    below, above = api684_margins_pct(1.0 / (2.0 * PEDESTAL_ZETA))  # API 684 at AF 12.5
    pump = next(b for b in m["mode_bands"] if b["mode"] == "pump-like lateral")
    assert drawn["pump-like lateral"]["high_hz"] == pytest.approx(pump["mode_hz"] * (1 + below / 100), rel=1e-12)
    assert drawn["pump-like lateral"]["low_hz"] == pytest.approx(pump["mode_hz"] * (1 - above / 100), rel=1e-12)
    for r in m["margins"]:
        b = drawn[r["mode"]]
        assert (b["low_hz"] < r["excitation_hz"] < b["high_hz"]) == (r["status"] == "inside"), r
    pump_row = next(r for r in m["margins"] if r["mode"] == "pump-like lateral" and r["excitation"] == "2x")
    assert pump_row["status"] != "inside" and pump_row["excitation_hz"] > drawn["pump-like lateral"]["high_hz"]

    # The axis: a bit above the highest band or the 2x line, whichever is larger; the
    # highest order (7x) runs off the top.
    speeds = [v for v in _api(page, base + "/trends?from=0&max_points=5000")["speed"]["speed_hz"] if v is not None]
    highest_band = max(max(b["high_hz"], b["mode_hz"]) for b in m["mode_bands"])
    y_max = float(page.get_attribute("#chart-resonance", "data-y-max"))
    assert y_max == pytest.approx(max(highest_band, 2 * max(speeds)) * (1 + HEADROOM), rel=1e-9)
    assert y_max < 7 * min(speeds)

    # The spectrum opens up to the modes and ten times running speed; full span one click away.
    sp = page.locator("#chart-spectrum")
    point = page.input_value("#spectrum-point")
    speed = next(p for p in m["points"] if p["id"] == point)["latest"]["speed_hz"]
    full = float(sp.get_attribute("data-full-hz"))
    span = float(sp.get_attribute("data-span-hz"))
    assert span == pytest.approx(min(full, max(highest_band, 10 * speed) * (1 + HEADROOM)), rel=1e-9)
    assert span < full and float(sp.get_attribute("data-x-max")) == pytest.approx(span)
    page.click("#spectrum-span")
    assert float(sp.get_attribute("data-x-max")) == pytest.approx(full)
    page.click("#spectrum-span")
    assert float(sp.get_attribute("data-x-max")) == pytest.approx(span)
    assert _canvas_ink(page, "#chart-resonance") > 1000 and _canvas_ink(page, "#chart-spectrum") > 1000
    page.screenshot(path=str(ARTIFACTS / "machine-bands.png"), full_page=True)
    assert page.errors == [], page.errors


def test_alarm_rows_lead_to_readable_evidence(server, page):  # noqa: F811
    _sign_in(page, server, "/alarms/")
    rows = page.locator("#alarms-table tbody tr[data-alarm]")
    assert rows.count() > 0
    for i in range(rows.count()):
        row = rows.nth(i)
        assert row.locator("a.evidence-link").get_attribute("href") == f"/alarms/{row.get_attribute('data-alarm')}"
    first = rows.nth(0).get_attribute("data-alarm")
    rows.nth(0).locator("a.evidence-link").click()
    page.wait_for_selector(".evidence-table")
    assert page.url.endswith(f"/alarms/{first}")
    text = page.inner_text("main")
    assert max(significant_digits(text), default=0) <= 6
    assert "_" not in page.inner_text("#alarm-summary") and "@" not in text
    assert page.locator("#alarm-json").get_attribute("href") == f"/api/v1/alarms/{first}"
    assert page.locator("#caution").is_visible()
    page.screenshot(path=str(ARTIFACTS / "alarm-evidence.png"), full_page=True)
    assert page.errors == [], page.errors
