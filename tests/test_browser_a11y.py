"""Accessibility of every dashboard page in headless Chromium: axe-core (tests/axe_audit.py)
finds no serious or critical violation, signed in as the role that sees the whole page;
every chart has a text alternative (a name saying what it shows, and its plotted data as
a table on demand) whose rows are the data the chart drew. Screenshots of each page go to
test-artifacts/ (tests/README.md)."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from axe_audit import audit, axe_source, describe, failing
from dashboard_seed import PASSWORDS, seed
from dashboard_signin import dashboard_server
from passage_run import MACHINE as SWEPT, feed, machine, run_messages, store_with

from dashboard import create_app

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


def _new_page(browser, server, user: str | None):
    """A page in a fresh context, signed in as ``user`` (None: anonymous)."""
    ctx = browser.new_context(viewport={"width": 1400, "height": 1000})
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
    page.click("#machine-alarms tbody tr >> nth=0 >> button")
    page.wait_for_selector("#alarm-evidence:not([hidden])")


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


#: Each page of the dashboard, in the state that shows most of it: name -> (user who sees
#: all of it, how to get there, the endpoints of dashboard/*.py it covers).
PAGES = {
    "login": (None, lambda p, s: p.goto(s + "/login"), {"auth.login"}),
    "login-failed": (None, _failed_sign_in, {"auth.login"}),
    "overview": ("ada", lambda p, s: p.goto(s + "/"), {"overview.index"}),
    "machine": ("eng", lambda p, s: _machine(p, s, "fan-001"), {"machines.detail"}),
    "alarm-evidence": ("eng", _evidence, {"machines.detail"}),
    "spectrum": ("eng", _stored_spectrum, {"machines.detail"}),
    "passages": ("eng", lambda p, s: _machine(p, s, SWEPT), {"machines.detail"}),
    "alarms": ("eng", lambda p, s: p.goto(s + "/alarms/"), {"alarms.index"}),
    "users": ("ada", lambda p, s: p.goto(s + "/users/"), {"users.index"}),
    "tokens": ("ada", _new_token, {"tokens.index"}),
    "audit": ("ada", lambda p, s: p.goto(s + "/audit/"), {"audit.index"}),
    "password": ("vic", lambda p, s: p.goto(s + "/account/password"), {"auth.change_password"}),
    "error": ("vic", lambda p, s: p.goto(s + "/machines/no-such-machine"), set()),
}
#: Pages that answer with an error status, which the browser logs as a console error.
STATUS = {"login-failed": 401, "error": 404}
#: GET routes that answer with no page of their own.
NOT_PAGES = {"static", "alarms.export_csv"}


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
    page = _new_page(browser, server, user)
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
