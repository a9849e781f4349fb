"""``whirlwatch dashboard`` as a real process: a production WSGI server (waitress), the
development server only with ``--debug``, the service's settings registry (``--config``,
``WHIRLWATCH_DATABASE_URL``, the old ``WHIRLWATCH_DATABASE`` with a warning), and the proxy
headers handled as docs/security.md says."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from contextlib import contextmanager
from pathlib import Path

import pytest
from dashboard_signin import ROOT, raw_sign_in, request, seed_template, seeded_copy

from monitor.commands.dashboard import LEGACY_DATABASE_ENV, environment
from monitor.config import load_settings
from monitor.demo import free_port

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    return seed_template(tmp_path_factory.mktemp("serving"))


@pytest.fixture()
def db_url(template, tmp_path):
    return seeded_copy(template, tmp_path)


@contextmanager
def serving(*args: str, env: dict[str, str] | None = None, port: int | None = None):
    """``whirlwatch dashboard ARGS`` with only ``env`` of our variables set; yields the
    port and a function returning what the process printed so far."""
    port = port or free_port()
    clean = {k: v for k, v in os.environ.items() if not k.startswith("WHIRLWATCH_")}
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "dashboard", *args]
    if "--config" not in args:
        cmd += ["--port", str(port)]
    log = Path(os.environ.get("TMPDIR", "/tmp")) / f"dashboard-{port}.log"
    with log.open("w+b") as out:
        proc = subprocess.Popen(cmd, cwd=ROOT, env={**clean, **(env or {})}, stdout=out,
                                stderr=subprocess.STDOUT)

        def printed() -> str:
            return log.read_text(errors="replace")

        try:
            deadline = time.monotonic() + 30
            while True:
                try:
                    request(port, "GET", "/login")
                    break
                except OSError:
                    if proc.poll() is not None or time.monotonic() > deadline:
                        raise RuntimeError(f"the dashboard did not start: {printed()[-2000:]}") from None
                    time.sleep(0.1)
            yield port, printed
        finally:
            proc.terminate()
            proc.wait(15)
            log.unlink()
    # SIGTERM ends it like Ctrl-C: no traceback, exit 0.
    assert proc.returncode == 0, printed


def test_production_server_and_no_development_warning(db_url):
    with serving("--database", db_url) as (port, printed):
        status, headers, _ = request(port, "GET", "/login")
        assert status == 200
        # OWASP ASVS 4.0.3 V14.3.3: no product or version in the Server header.
        assert headers.get_all("Server") == ["whirlwatch"]
        time.sleep(0.3)
        assert "development server" not in printed().lower()
        assert f"whirlwatch dashboard on http://127.0.0.1:{port}/" in printed()


def test_debug_only_on_a_loopback_address(db_url):
    res = subprocess.run([sys.executable, "-c", "from monitor.cli import main; main()", "dashboard",
                          "--database", db_url, "--debug", "--host", "0.0.0.0"],
                         capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert res.returncode == 2 and "--debug" in res.stderr and "'0.0.0.0'" in res.stderr


def test_config_file_and_the_service_variable(db_url, tmp_path):
    port = free_port()
    conf = tmp_path / "whirlwatch.toml"
    conf.write_text(f'[dashboard]\nport = {port}\ntime_zone = "Asia/Kolkata"\n')
    # The store from WHIRLWATCH_DATABASE_URL, as the service reads it; the rest from the file.
    with serving("--config", str(conf), env={"WHIRLWATCH_DATABASE_URL": db_url}, port=port) as (_, printed):
        cookie = raw_sign_in(port, "ada")
        status, _, html = request(port, "GET", "/audit", headers={"Cookie": cookie})
        assert status == 200
        # India keeps UTC+05:30 all year (Indian Standard Time).
        assert re.search(r"<td>\d{4}-\d\d-\d\d \d\d:\d\d \+05:30</td>", html)
        assert "deprecated" not in printed()


def test_old_database_variable_still_works_with_a_warning(db_url):
    with serving(env={LEGACY_DATABASE_ENV: db_url}) as (port, printed):
        raw_sign_in(port, "eng")  # the seeded store, not an empty one
        assert "WHIRLWATCH_DATABASE is deprecated; set WHIRLWATCH_DATABASE_URL" in printed()


def test_the_new_variable_wins_over_the_old():
    said: list[str] = []
    env = environment({LEGACY_DATABASE_ENV: "sqlite:///old.sqlite", "WHIRLWATCH_DATABASE_URL": "sqlite:///new.sqlite"},
                      warn=said.append)
    assert env == {"WHIRLWATCH_DATABASE_URL": "sqlite:///new.sqlite"}
    assert len(said) == 1 and "ignored" in said[0]
    assert environment({"PATH": "/bin"}, warn=said.append) == {"PATH": "/bin"} and len(said) == 1


def test_the_deploy_file_serves_the_dashboard_too():
    settings = load_settings(ROOT / "deploy" / "whirlwatch.toml", env={})
    assert settings.dashboard.behind_tls_proxy is True
    assert settings.dashboard.time_zone == "Europe/Berlin"
    unit = (ROOT / "deploy" / "whirlwatch-dashboard.service").read_text()
    assert "whirlwatch dashboard --config /etc/whirlwatch/whirlwatch.toml" in unit


def _audit_addresses(port: int, cookie: str, headers: dict[str, str]) -> list[str]:
    status, _, body = request(port, "GET", "/api/v1/audit?action=sign_in", headers={"Cookie": cookie, **headers})
    assert status == 200, body
    return [e["address"] for e in json.loads(body)["items"]]


@pytest.mark.parametrize("proxied", [False, True])
def test_forwarded_headers_only_behind_the_proxy(db_url, proxied):
    args = ("--database", db_url) + (("--behind-tls-proxy",) if proxied else ())
    forwarded = {"X-Forwarded-For": "192.0.2.44", "X-Forwarded-Proto": "https"}
    with serving(*args) as (port, _):
        status, headers, _ = request(port, "GET", "/login", headers=forwarded)
        assert status == 200
        # OWASP ASVS 4.0.3 V14.4.5 (HSTS on HTTPS); RFC 6797 section 6.1: max-age in seconds.
        assert (headers.get("Strict-Transport-Security") == "max-age=31536000") is proxied
        # OWASP ASVS 4.0.3 V3.4.1: the cookie is Secure only when the proxy speaks HTTPS.
        assert ("Secure" in headers["Set-Cookie"]) is proxied
        # Flask-WTF checks the Referer of HTTPS form posts (same origin).
        cookie = raw_sign_in(port, "ada", headers={**forwarded, "Referer": f"https://127.0.0.1:{port}/"})
        # OWASP ASVS 4.0.3 V7.1.4 (from where): the proxy's client behind it; otherwise a
        # client cannot choose its own address with a header.
        assert _audit_addresses(port, cookie, forwarded)[0] == ("192.0.2.44" if proxied else "127.0.0.1")
