"""Accessibility of every dashboard page in headless Chromium: axe-core (tests/axe_audit.py)
finds no serious or critical violation, signed in as the role that sees the whole page;
every chart has a text alternative (a name saying what it shows, and its plotted data as
a table on demand) whose rows are the data the chart drew. Screenshots of each page go to
test-artifacts/ (tests/README.md)."""

from __future__ import annotations

import datetime as dt
import json
import os
import re
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

import pytest
from axe_audit import audit, axe_source, describe, failing
from dashboard_seed import PASSWORDS, seed
from dashboard_signin import dashboard_server
from passage_run import MACHINE as SWEPT
from passage_run import feed, machine, run_messages, store_with

from dashboard import create_app
from monitor.model.timefmt import plant_time, time_zone

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

pytestmark = [pytest.mark.browser, pytest.mark.slow]

try:
    from playwright.sync_api import sync_playwright
except ImportError:  # pragma: no cover
    sync_playwright = None


@pytest.fixture(scope="module")
def axe() -> str:
    source, why = axe_source()
    if source is None:
        pytest.skip(why)
    return source


def _need_chromium() -> None:
    if sync_playwright is None:
        pytest.skip("the playwright Python package is not installed")
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"Chromium is not installed at {CHROMIUM} (apt-get install chromium)")


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    _need_chromium()
    url = f"sqlite:///{tmp_path_factory.mktemp('a11y') / 'store.sqlite'}"
    seed(url, machines=3, readings_per_point=40)
    # A machine with a run-up and a coast-down through a mode it does not know: the
    # passages table with its candidate modes and their accept forms.
    store_with(url, machine())
    feed(url, run_messages())
    with dashboard_server(url) as port:
        yield f"http://127.0.0.1:{port}"


@pytest.fixture(scope="module")
def browser():
    _need_chromium()
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=CHROMIUM, args=[
            "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update"])
        yield b
        b.close()


def _new_page(browser, server, user: str | None, width: int = 1400):
    """A page ``width`` CSS px wide in a fresh context, signed in as ``user`` (None: anonymous)."""
    ctx = browser.new_context(viewport={"width": width, "height": 1000})
    page = ctx.new_page()
    page.errors = []
    page.on("console", lambda m: page.errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: page.errors.append(str(e)))
    if user is not None:
        page.goto(server + "/login")
        page.fill("input[name=username]", user)
        page.fill("input[name=password]", PASSWORDS[user])
        page.click("#login-form button[type=submit]")
        page.wait_for_selector("body[data-loaded='1']")
    return page


def _machine(page, server, machine_id: str) -> None:
    page.goto(f"{server}/machines/{machine_id}")
    page.wait_for_selector("body[data-loaded='1']")


def _evidence(page, server) -> None:
    _machine(page, server, "fan-001")
    page.click("#machine-alarms tbody tr >> nth=0 >> a.evidence-link")
    page.wait_for_selector("#alarm-summary")


def _stored_spectrum(page, server) -> None:
    _evidence(page, server)
    page.click(".open-spectrum >> nth=0")
    page.locator("#spectrum-latest").wait_for(state="visible")


def _new_token(page, server) -> None:
    page.goto(server + "/tokens/")
    page.fill("input[name=label]", "maintenance system")
    page.click("form.row-form button[type=submit]")
    page.wait_for_selector("#new-token")


def _failed_sign_in(page, server) -> None:
    page.goto(server + "/login")
    page.fill("input[name=username]", "eng")
    page.fill("input[name=password]", "not the password")
    page.click("#login-form button[type=submit]")
    page.wait_for_selector("#login-form")


def _out_of_service(page, server) -> None:
    # The machine page with a period out of service (its list, the return form) and the
    # banner every page then shows (docs/alarms.md, "Shelving and out of service").
    _machine(page, server, "fan-002")
    page.fill("#out-of-service-form input[name=comment]", "coupling realignment")
    page.click("#out-of-service-form button[type=submit]")
    page.wait_for_selector("#machine-out-of-service")
    page.wait_for_selector("body[data-loaded='1']")


def _shelved_alarm(page, server) -> None:
    page.goto(server + "/alarms/?state=open")
    page.click("#alarms-table tbody tr >> nth=0 >> a.evidence-link")
    until = (dt.datetime.now(dt.UTC) + dt.timedelta(hours=4)).strftime("%Y-%m-%dT%H:%M")
    page.fill("#shelve-form input[name=until]", until)
    page.fill("#shelve-form input[name=comment]", "known, repair booked")
    page.click("#shelve-form button[type=submit]")
    page.wait_for_selector("#alarm-shelved")


#: Each page of the dashboard, in the state that shows most of it: name -> (user who sees
#: all of it, how to get there, the endpoints of dashboard/*.py it covers).
PAGES = {
    "login": (None, lambda p, s: p.goto(s + "/login"), {"auth.login"}),
    "login-failed": (None, _failed_sign_in, {"auth.login"}),
    "overview": ("ada", lambda p, s: p.goto(s + "/"), {"overview.index"}),
    "machine": ("eng", lambda p, s: _machine(p, s, "fan-001"), {"machines.detail"}),
    "alarm-evidence": ("eng", _evidence, {"alarms.detail"}),
    "spectrum": ("eng", _stored_spectrum, {"machines.detail"}),
    "passages": ("eng", lambda p, s: _machine(p, s, SWEPT), {"machines.detail"}),
    "alarms": ("eng", lambda p, s: p.goto(s + "/alarms/"), {"alarms.index"}),
    "users": ("ada", lambda p, s: p.goto(s + "/users/"), {"users.index"}),
    "tokens": ("ada", _new_token, {"tokens.index"}),
    "audit": ("ada", lambda p, s: p.goto(s + "/audit/"), {"audit.index"}),
    "password": ("vic", lambda p, s: p.goto(s + "/account/password"), {"auth.change_password"}),
    "error": ("vic", lambda p, s: p.goto(s + "/machines/no-such-machine"), set()),
    # The phone layout (tables as cards, the header on two rows, site.css).
    "overview-phone": ("ada", lambda p, s: p.goto(s + "/"), set()),
    "alarms-phone": ("eng", lambda p, s: p.goto(s + "/alarms/"), set()),
    # Last: what they change shows on the pages after them.
    "out-of-service": ("eng", _out_of_service, {"machines.detail"}),
    "shelved-alarm": ("eng", _shelved_alarm, {"alarms.detail"}),
}
#: Viewport width of a common phone, CSS px (as tests/test_browser_layout.py).
PHONE_PX = 390
#: Pages that answer with an error status, which the browser logs as a console error.
STATUS = {"login-failed": 401, "error": 404}
#: GET routes that answer with no page of their own.
NOT_PAGES = {"static", "alarms.export_csv", "health.healthz", "health.readyz"}


def test_every_page_of_the_dashboard_is_checked():
    # A new page must join PAGES, or it escapes the check.
    app = create_app({"DATABASE_URL": "sqlite://", "SECRET_KEY": "k", "TESTING": True})
    pages = {r.endpoint for r in app.url_map.iter_rules()
             if "GET" in (r.methods or ()) and not r.rule.startswith("/api/")} - NOT_PAGES
    covered = set().union(*(endpoints for _, _, endpoints in PAGES.values()))
    assert pages - covered == set(), f"pages no axe-core check visits: {sorted(pages - covered)}"


@pytest.mark.parametrize("name", list(PAGES))
def test_no_serious_or_critical_axe_violations(browser, server, axe, name):
    user, go, _ = PAGES[name]
    page = _new_page(browser, server, user, PHONE_PX if name.endswith("-phone") else 1400)
    try:
        go(page, server)
        page.wait_for_load_state("networkidle")
        assert page.locator("#caution").is_visible()  # the caution stays on every page
        page.screenshot(path=str(ARTIFACTS / f"a11y-{name}.png"), full_page=True)
        found = audit(page, axe)
        _record(name, found)
        bad = failing(found)
        assert bad == [], "axe-core found serious or critical violations:\n" + describe(name, bad)
        expected = f"the server responded with a status of {STATUS[name]}" if name in STATUS else None
        assert [e for e in page.errors if not (expected and expected in e)] == [], page.errors
    finally:
        page.context.close()


def _record(name: str, violations: list[dict]) -> None:
    """Keep every violation (all impacts) of the page beside its screenshot."""
    (ARTIFACTS / f"a11y-{name}.json").write_text(json.dumps(violations, indent=1), encoding="utf-8")


def js_fixed(v: float, digits: int) -> str:
    """``v.toFixed(digits)`` as the browser writes it: the exact value of the double rounded
    half up (ECMA-262, Number.prototype.toFixed), which Python's format (half even) is not."""
    return str(Decimal(v).quantize(Decimal(1).scaleb(-digits), rounding=ROUND_HALF_UP))


def relative_luminance(rgb: tuple[int, int, int]) -> float:
    """Relative luminance of an sRGB colour, 0-255 per channel (WCAG 2.1, definition of
    relative luminance)."""
    lin = [c / 255 / 12.92 if c / 255 <= 0.04045 else ((c / 255 + 0.055) / 1.055) ** 2.4 for c in rgb]
    return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]


def contrast(a: tuple[int, int, int], b: tuple[int, int, int]) -> float:
    """Contrast ratio (L1 + 0.05) / (L2 + 0.05) (WCAG 2.1, definition of contrast ratio)."""
    hi, lo = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def test_contrast_formula_matches_the_published_extremes():
    # WCAG 2.1, contrast ratio: from 1:1 to 21:1 (black on white).
    assert contrast((0, 0, 0), (255, 255, 255)) == pytest.approx(21.0)
    assert contrast((119, 119, 119), (255, 255, 255)) == pytest.approx(4.48, abs=0.01)  # #777 on white, common practice


TABLE = """id => { const d = document.querySelector(`details.chart-data[data-for="${id}"]`);
  const t = d.querySelector('table');
  return { head: [...t.tHead.rows[0].cells].map(c => c.textContent),
           rows: [...t.tBodies[0].rows].map(r => [...r.cells].map(c => c.textContent)) }; }"""


def _open_table(page, chart: str) -> dict:
    box = page.locator(f"details.chart-data[data-for='{chart}']")
    if box.get_attribute("open") is None:
        box.locator("summary").click()
    page.wait_for_selector(f"details.chart-data[data-for='{chart}'] table")
    return page.evaluate(TABLE, chart)


def test_each_chart_has_a_name_and_its_data_as_a_table(browser, server):
    page = _new_page(browser, server, "eng")
    got: list = []
    page.on("response", lambda r: got.append(r) if "/api/v1/machines/fan-001" in r.url else None)
    try:
        _machine(page, server, "fan-001")
        page.wait_for_selector("#chart-overall[data-drawn='1']")
        answers = {r.url.split("?")[0].rsplit("/", 1)[-1]: r.json() for r in got if r.ok}
        machine_json, trends = answers["fan-001"], answers["trends"]
        zone = time_zone(page.get_attribute("meta[name=time-zone]", "content"))

        def at(ts: float) -> str:
            return plant_time(dt.datetime.fromtimestamp(ts, dt.UTC), zone)

        for chart in ("chart-resonance", "chart-spectrum", "chart-overall", "chart-orders"):
            name = page.get_attribute(f"#{chart}", "aria-label")
            series = page.get_attribute(f"#{chart}", "data-series").split("|")
            # The name says what is plotted, over what span, and each series' range.
            assert name.startswith(page.get_attribute(f"#{chart}", "data-title") + ": " + ", ".join(series)), name
            assert all(f"; {s} " in "; " + name.split(". ", 1)[1] for s in series), name
            table = _open_table(page, chart)
            assert table["head"][1:] == series, chart
            assert len(table["rows"]) == int(page.get_attribute(f"#{chart}", "data-rows")) > 0, chart

        # The rows are the data the chart was drawn from (the API's answers), as written.
        speed = trends["speed"]
        rows = _open_table(page, "chart-resonance")["rows"]
        assert [r[0] for r in rows] == [at(t) for t in speed["ts"]]
        for k, order in enumerate((1.0, 2.0, 7.0), start=1):
            assert [r[k] for r in rows] == [js_fixed(s * order, 2) + " Hz" for s in speed["speed_hz"]]

        spectrum = next(s for s in machine_json["latest_spectra"] if s["point"] == "de-h")
        rows = _open_table(page, "chart-spectrum")["rows"]
        assert [r[0] for r in rows] == [js_fixed(f, 2) + " Hz" for f in spectrum["freq_hz"]]
        assert [r[1] for r in rows] == [js_fixed(a, 4) + " " + spectrum["unit"] for a in spectrum["amplitude"]]

        for point in ("de-h", "nde-v"):  # the open tables follow the chart to another point
            page.select_option("#trend-point", point)
            p = next(x for x in trends["points"] if x["point"] == point)
            rows = _open_table(page, "chart-overall")["rows"]
            assert [r[0] for r in rows] == [at(t) for t in p["ts"]]
            assert [r[1] for r in rows] == [js_fixed(v, 2) + " mm/s RMS" for v in p["overall_mm_s_rms"]]
            assert [r[2] for r in rows] == [js_fixed(p["zone_limits_mm_s"][0], 2) + " mm/s RMS"] * len(p["ts"])
            table = _open_table(page, "chart-orders")
            one = table["head"].index("1x")
            assert [r[one] for r in table["rows"]] == [js_fixed(v, 3) + " mm/s peak" for v in p["orders"]["1x"]]
        page.screenshot(path=str(ARTIFACTS / "a11y-chart-tables.png"), full_page=True)
        assert page.errors == [], page.errors
    finally:
        page.context.close()


def test_chart_lines_stand_out_from_the_plot(browser, server):
    page = _new_page(browser, server, "eng")
    try:
        _machine(page, server, "fan-001")
        page.wait_for_selector("#chart-overall[data-drawn='1']")
        # Each series' colour as its legend marker shows it (uPlot draws the marker in the
        # series' stroke), against the white plot: 3:1 for graphics (WCAG 2.1 SC 1.4.11).
        strokes = page.evaluate("""() => [...document.querySelectorAll('.chart .u-legend .u-series')]
            .filter(s => s.querySelector('.u-marker'))
            .map(s => [s.querySelector('.u-label').textContent, getComputedStyle(s.querySelector('.u-marker')).borderTopColor])""")
        assert len(strokes) >= 12
        low = []
        for label, css in strokes:
            rgb = tuple(int(x) for x in re.findall(r"\d+", css)[:3])
            if contrast(rgb, (255, 255, 255)) < 3.0:
                low.append((label, css, round(contrast(rgb, (255, 255, 255)), 2)))
        assert low == [], low
        palette = page.evaluate("WW.palette")
        assert all(contrast(tuple(int(c[i:i + 2], 16) for i in (1, 3, 5)), (255, 255, 255)) >= 3.0 for c in palette)
    finally:
        page.context.close()
