"""The dashboard's defences, each probed the way an attacker would: redirects after sign-in,
sessions after sign-out and account changes, cookie and transport headers, the login
limiter (memory and a shared Redis), CSRF on every form. A real Flask app on a real SQLite
file (tests/dashboard_signin.py), and the real server where the HTTP server's own
behaviour matters.

Each check names the OWASP Application Security Verification Standard 4.0.3 requirement
it stands for (requirement numbers from memory).
"""

from __future__ import annotations

import re
import shutil
import subprocess
import time

import pytest
from dashboard_seed import PASSWORDS
from dashboard_signin import (
    Browser,
    dashboard_server,
    make_app,
    raw_sign_in,
    request,
    seed_template,
    seeded_copy,
    user_id,
)

from dashboard.redirects import same_origin_path
from monitor.demo import free_port


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    return seed_template(tmp_path_factory.mktemp("security"))


@pytest.fixture()
def db_url(template, tmp_path):
    return seeded_copy(template, tmp_path)


@pytest.fixture()
def app(db_url):
    a = make_app(db_url)
    yield a
    a.extensions["whirlwatch_engine"].dispose()


# ----------------------------------------------------------------------------- redirects

# Browsers drop tabs and line breaks from URLs and read "\" as "/" (WHATWG URL Standard,
# basic URL parser), so each of these would leave the site.
LEAVING = [
    "/\t/127.0.0.2:8/landed", "/\n/127.0.0.2:8/landed", "/\r/evil.example", "//evil.example/x",
    "/\\evil.example", "\\\\evil.example", "https://evil.example/", "http:/evil.example",
    "javascript:alert(1)", "evil.example/x", "/\x00/evil.example", "/\u2028/evil.example",
    "/\u200b/evil.example", "", None, "/" + "a" * 3000,
]
STAYING = ["/", "/alarms/?state=active", "/machines/fan-000", "/%09/not-a-tab", "/a//b"]


@pytest.mark.parametrize("target", LEAVING)
def test_next_refuses_anything_but_a_path_on_this_site(target):
    assert same_origin_path(target) is None  # OWASP ASVS 4.0.3 V5.1.5


@pytest.mark.parametrize("target", STAYING)
def test_next_keeps_a_path_on_this_site(target):
    assert same_origin_path(target) == target  # OWASP ASVS 4.0.3 V5.1.5


def test_signed_in_user_is_never_sent_to_another_host(app):
    b = Browser(app).signed_in("eng")
    for encoded in ("%09", "%0A", "%0D", "%5C", "/"):
        r = b.get(f"/login?next=/{encoded}/127.0.0.2:8/landed")
        # OWASP ASVS 4.0.3 V5.1.5: the unsafe target falls back to the home page, no 500.
        assert (r.status_code, r.headers["Location"]) == (302, "/"), encoded
    assert b.get("/login?next=/alarms/%3Fstate%3Dactive").headers["Location"] == "/alarms/?state=active"
    # The same through the sign-in form's hidden field.
    b2 = Browser(app)
    r = b2.sign_in("vic", next="/\t/127.0.0.2:8/landed")
    assert (r.status_code, r.headers["Location"]) == (302, "/")  # OWASP ASVS 4.0.3 V5.1.5


def test_back_after_acknowledging_stays_on_the_alarms_page(app):
    b = Browser(app).signed_in("eng")
    r = b.post("/alarms/1/acknowledge", {"comment": "seen", "back": "/alarms/\n/evil.example"}, token_from="/alarms/")
    # OWASP ASVS 4.0.3 V5.1.5: a control character gives the alarms page, not HTTP 500.
    assert (r.status_code, r.headers["Location"]) == (302, "/alarms/")


def test_real_server_redirect_and_server_header(db_url):
    with dashboard_server(db_url) as port:
        cookie = raw_sign_in(port, "eng")
        for encoded in ("%09", "%0A"):
            status, headers, _ = request(port, "GET", f"/login?next=/{encoded}/127.0.0.2:{port}/landed",
                                         headers={"Cookie": cookie})
            # Before: "Location: //127.0.0.2:PORT/landed" (tab) and HTTP 500 (line feed).
            assert (status, headers["Location"]) == (302, "/")  # OWASP ASVS 4.0.3 V5.1.5
        status, headers, _ = request(port, "GET", "/", headers={"Cookie": cookie})
        assert status == 200
        # OWASP ASVS 4.0.3 V14.3.3: no product or version in the Server header.
        assert headers.get_all("Server") == ["whirlwatch"]


# ----------------------------------------------------------------------------- sessions


def _replay(app, cookie: str, path: str = "/api/v1/machines") -> int:
    c = app.test_client()
    c.set_cookie("session", cookie)
    return c.get(path).status_code


def test_cookie_saved_before_sign_out_stops_working(app):
    b = Browser(app).signed_in("eng")
    saved = b.cookie()
    assert _replay(app, saved) == 200
    assert b.sign_out().status_code == 302
    # OWASP ASVS 4.0.3 V3.3.1: sign-out ends the session on the server; the copy is dead.
    assert _replay(app, saved) == 401
    assert _replay(app, saved, "/") == 302  # to the sign-in page


@pytest.mark.parametrize("change, form", [
    ("role", {"role": "viewer"}),
    ("disable", {}),
    ("password", {"password": "a-brand-new-passphrase"}),
])
def test_account_changes_end_the_users_sessions(app, change, form):
    eng = Browser(app).signed_in("eng")
    saved = eng.cookie()
    admin = Browser(app).signed_in("ada")
    r = admin.post(f"/users/{user_id(app, 'eng')}/{change}", form, token_from="/users")
    assert r.status_code == 302, r.get_data(as_text=True)
    # OWASP ASVS 4.0.3 V3.3.1 (server-side end of session) on a role change, disabling
    # and a password reset: the session eng had is refused at once.
    assert eng.get("/api/v1/machines").status_code == 401
    assert _replay(app, saved) == 401


def test_own_password_change_ends_the_other_sessions(app):
    here, there = Browser(app).signed_in("vic"), Browser(app).signed_in("vic")
    r = here.post("/account/password", {"current_password": PASSWORDS["vic"],
                                         "new_password": "correct-horse-battery",
                                         "new_password_again": "correct-horse-battery"}, token_from="/")
    assert r.status_code == 302, r.get_data(as_text=True)
    assert here.get("/api/v1/machines").status_code == 200  # this browser stays signed in
    # OWASP ASVS 4.0.3 V3.3.3: the other sessions end with the password change.
    assert there.get("/api/v1/machines").status_code == 401


def _set_cookie(resp) -> str:
    return next(v for k, v in resp.headers.items() if k == "Set-Cookie" and v.startswith("session="))


@pytest.mark.parametrize("base, proxied, secure", [
    ("http://localhost", False, False),
    ("https://localhost", False, True),
    ("http://localhost", True, True),
])
def test_secure_cookie_and_hsts(db_url, base, proxied, secure):
    app = make_app(db_url, BEHIND_TLS_PROXY=proxied)
    b = Browser(app, base)
    r = b.sign_in("vic")
    assert r.status_code == 302
    cookie = _set_cookie(r)
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie  # OWASP ASVS 4.0.3 V3.4.2, V3.4.3
    assert ("; Secure" in cookie) is secure  # OWASP ASVS 4.0.3 V3.4.1
    hsts = r.headers.get("Strict-Transport-Security")
    # OWASP ASVS 4.0.3 V14.4.5 (HSTS on HTTPS); RFC 6797 section 6.1: max-age in seconds.
    assert (hsts == "max-age=31536000") if secure else hsts is None
    app.extensions["whirlwatch_engine"].dispose()


def test_behind_the_proxy_the_forwarded_address_is_the_client(db_url):
    app = make_app(db_url, BEHIND_TLS_PROXY=True)
    b = Browser(app, environ={"REMOTE_ADDR": "10.1.1.1", "HTTP_X_FORWARDED_FOR": "192.0.2.44",
                              "HTTP_X_FORWARDED_PROTO": "https", "HTTP_REFERER": "https://localhost/"})
    b.signed_in("ada")
    events = b.get("/api/v1/audit?action=sign_in").get_json()["items"]
    assert events[0]["address"] == "192.0.2.44"  # OWASP ASVS 4.0.3 V7.1.4 (from where)
    app.extensions["whirlwatch_engine"].dispose()


# ----------------------------------------------------------------------------- login limiter


def _wrong(app, user: str, addr: str):
    return Browser(app, environ={"REMOTE_ADDR": addr}).sign_in(user, "not-the-password-1")


def test_thirty_user_names_from_one_address_are_held_back(app):
    codes = [_wrong(app, f"user{i}", "198.51.100.7").status_code for i in range(30)]
    # OWASP ASVS 4.0.3 V2.2.1: password spraying from one address is slowed (429, RFC
    # 6585 section 4) after the default 10 failures a minute (dashboard/__init__.py).
    assert codes == [401] * 10 + [429] * 20
    r = _wrong(app, "user31", "198.51.100.7")
    assert 0 < int(r.headers["Retry-After"]) <= 60
    assert "Try again in" in r.get_data(as_text=True)
    # Another address is not held back by that one.
    assert _wrong(app, "user1", "198.51.100.8").status_code == 401


def test_guessing_cannot_lock_a_user_out_of_their_usual_address(app):
    vic_home = "203.0.113.5"
    Browser(app, environ={"REMOTE_ADDR": vic_home}).signed_in("vic")
    # Guesses at vic's password from many addresses (none of them held back by address).
    codes = [_wrong(app, "vic", f"192.0.2.{i}").status_code for i in range(1, 8)]
    # OWASP ASVS 4.0.3 V2.2.1: the account limit (default 5 failures a minute) holds.
    assert codes == [401] * 5 + [429] * 2
    # The right password from an address vic never used is held back too ...
    assert Browser(app, environ={"REMOTE_ADDR": "192.0.2.99"}).sign_in("vic").status_code == 429
    # ... but vic, from where vic signed in before, gets in: no lock-out (V2.2.1).
    assert Browser(app, environ={"REMOTE_ADDR": vic_home}).sign_in("vic").status_code == 302


def test_delays_grow_as_guessing_goes_on(db_url):
    app = make_app(db_url, LOGIN_LIMIT_PER_ADDRESS="2 per 2 second; 3 per 12 second")
    first = [_wrong(app, "eng", "198.51.100.9") for _ in range(3)]
    assert [r.status_code for r in first] == [401, 401, 429]
    short = int(first[-1].headers["Retry-After"])
    time.sleep(2.2)
    second = [_wrong(app, "eng", "198.51.100.9") for _ in range(2)]
    assert [r.status_code for r in second] == [401, 429]
    long = int(second[-1].headers["Retry-After"])
    # OWASP ASVS 4.0.3 V2.2.1 ("ever increasing delays"): the second wait is the longer.
    assert short <= 2 < 5 <= long <= 12
    app.extensions["whirlwatch_engine"].dispose()


@pytest.fixture()
def redis_url(tmp_path):
    """A private Redis on a free port (nothing on disk), stopped afterwards."""
    binary = shutil.which("redis-server")
    if binary is None:
        pytest.skip("redis-server is not installed (apt-get install redis-server)")
    pytest.importorskip("redis")
    port = free_port()
    proc = subprocess.Popen([binary, "--port", str(port), "--bind", "127.0.0.1", "--save", "",
                             "--appendonly", "no", "--dir", str(tmp_path)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        import redis

        client = redis.Redis(port=port)
        deadline = time.monotonic() + 10
        while True:
            try:
                client.ping()
                break
            except redis.ConnectionError:
                if time.monotonic() > deadline:
                    raise RuntimeError("the private redis-server did not answer") from None
                time.sleep(0.05)
        client.close()
        yield f"redis://127.0.0.1:{port}/0"
    finally:
        proc.terminate()
        proc.wait(10)


def test_several_processes_share_the_counts_through_redis(db_url, redis_url):
    # Two apps, each with its own limiter and storage connection, as two processes have.
    one = make_app(db_url, LOGIN_LIMIT_STORAGE_URL=redis_url)
    two = make_app(db_url, LOGIN_LIMIT_STORAGE_URL=redis_url)
    codes = [_wrong(app, f"user{i}", "198.51.100.20").status_code
             for i, app in enumerate([one, two] * 6)]
    # OWASP ASVS 4.0.3 V2.2.1: 10 failures per address in all, whichever process saw them.
    assert codes == [401] * 10 + [429] * 2
    for app in (one, two):
        app.extensions["whirlwatch_engine"].dispose()


def test_limits_hold_while_redis_is_away(db_url):
    app = make_app(db_url, LOGIN_LIMIT_STORAGE_URL=f"redis://127.0.0.1:{free_port()}/0")
    codes = [_wrong(app, f"user{i}", "198.51.100.21").status_code for i in range(12)]
    # Counted in memory meanwhile (docs/security.md): no 500, and still held back (V2.2.1).
    assert codes == [401] * 10 + [429] * 2
    app.extensions["whirlwatch_engine"].dispose()


# ----------------------------------------------------------------------------- CSRF

POST_FORMS = ["/login", "/logout", "/account/password", "/users/", "/users/2/role", "/users/2/disable",
              "/users/2/enable", "/users/2/delete", "/users/2/password", "/tokens/", "/tokens/1/revoke",
              "/alarms/1/acknowledge"]
PAGES = ["/", "/account/password", "/users", "/tokens", "/audit", "/alarms/"]


def test_every_form_needs_the_csrf_token(app):
    login_form = re.findall(r'<form[^>]*method="post".*?</form>', Browser(app).get("/login").get_data(as_text=True), re.S)
    assert len(login_form) == 1 and 'name="csrf_token"' in login_form[0]  # OWASP ASVS 4.0.3 V4.2.2
    b = Browser(app).signed_in("ada")
    for path in POST_FORMS:
        r = b.client.post(path, data={"role": "viewer", "password": "x" * 20, "username": "ada"})
        assert r.status_code == 400 and "CSRF" in r.get_data(as_text=True), path  # OWASP ASVS 4.0.3 V4.2.2
    assert b.get("/api/v1/machines").status_code == 200  # still signed in: nothing happened
    for path in PAGES:
        html = b.get(path).get_data(as_text=True)
        forms = re.findall(r'<form[^>]*method="post".*?</form>', html, flags=re.S)
        assert forms, path
        assert all('name="csrf_token"' in f for f in forms), path  # OWASP ASVS 4.0.3 V4.2.2


# ----------------------------------------------------------------------------- docs = code


def test_documented_dashboard_settings_are_the_commands():
    from pathlib import Path

    from dashboard import DEFAULTS
    from monitor.commands.dashboard import OPTION_SETTINGS, dashboard
    from monitor.settings import BY_NAME, SETTINGS

    doc = (Path(__file__).resolve().parent.parent / "docs" / "security.md").read_text(encoding="utf-8")
    section = doc.split("## Dashboard settings", 1)[1].split("\n## ", 1)[0]
    rows = [[c.strip().strip("`") for c in line.strip("|").split("|")]
            for line in section.splitlines() if line.startswith("| ") and not line.startswith("| option")]
    documented = {(opt, setting, env) for opt, setting, env, _ in rows}
    # Every option overrides one registry setting and is documented with its variable.
    options = {p.opts[0] for p in dashboard.params} - {"--config", "--debug"}
    assert options == set(OPTION_SETTINGS)
    expected = {(opt, name, BY_NAME[name].env) for opt, name in OPTION_SETTINGS.items()}
    expected.add(("", "dashboard.secret_key", "WHIRLWATCH_DASHBOARD_SECRET_KEY"))
    assert documented == expected
    # Every [dashboard] setting is in the table.
    assert {s.name for s in SETTINGS if s.section == "dashboard"} <= {r[1] for r in rows}
    # The limits as the table under "Sign-in and the login limiter" words them.
    for key, words in (("LOGIN_LIMIT_PER_ADDRESS", "10 a minute, 50 an hour, 200 a day"),
                       ("LOGIN_LIMIT_PER_ACCOUNT", "5 a minute, 20 an hour, 100 a day")):
        assert DEFAULTS[key].replace(" per ", " a ").replace("a hour", "an hour").replace(";", ",") == words
        assert words in doc
