"""Helpers for the dashboard's security tests: a seeded database per test, a browser-like
client that signs in with the page's CSRF token, and the real dashboard server.

The plant and users come from tests/dashboard_seed.py (invented; never expected values).
"""

from __future__ import annotations

import http.client
import re
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator, Mapping
from contextlib import closing, contextmanager
from pathlib import Path
from urllib.parse import urlencode

from dashboard_seed import PASSWORDS, seed

from dashboard import create_app
from monitor.demo import free_port

ROOT = Path(__file__).resolve().parent.parent
_CSRF = re.compile(r'name="csrf-token" content="([^"]+)"')


def seeded_copy(template: Path, directory: Path) -> str:
    """A URL of a fresh copy of the seeded SQLite file ``template`` (made once per module)."""
    target = directory / "store.sqlite"
    # SQLite's backup API, not a file copy: the seeded file is in WAL mode and part of it
    # may still sit in its -wal file.
    with closing(sqlite3.connect(template)) as src, closing(sqlite3.connect(target)) as dst:
        src.backup(dst)
    return f"sqlite:///{target}"


def seed_template(directory: Path) -> Path:
    """Seed a small plant with the three users of tests/dashboard_seed.py into a file (its
    readings raise alarms through the service, the first with id 1: a resonance alarm
    needs the dwell, then three readings, so four readings 10 minutes apart)."""
    path = directory / "template.sqlite"
    seed(f"sqlite:///{path}", machines=1, readings_per_point=4, detected=1)
    return path


def make_app(db_url: str, **config):
    return create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test-key", "TESTING": True, **config})


def user_id(app, name: str) -> int:
    """The database id of user ``name`` in ``app``'s store."""
    from dashboard.db import db_session
    from monitor.store.reads import get_user

    with app.app_context():
        user = get_user(db_session(), name)
        assert user is not None, name
        return user.id


class Browser:
    """A Flask test client used like a browser: reads the CSRF token from each page."""

    def __init__(self, app, base_url: str = "http://localhost", environ: Mapping[str, str] | None = None):
        self.client = app.test_client()
        self.base_url = base_url
        self.environ = dict(environ or {})
        # Flask-WTF checks the Referer of HTTPS form posts (same origin).
        self.headers = {"Referer": base_url + "/"} if base_url.startswith("https") else {}

    def get(self, path: str, **kw):
        return self.client.get(path, base_url=self.base_url, environ_base=self.environ,
                               headers=self.headers, **kw)

    def csrf(self, path: str = "/login") -> str:
        m = _CSRF.search(self.get(path).get_data(as_text=True))
        assert m, f"no CSRF token on {path}"
        return m.group(1)

    def post(self, path: str, data: dict | None = None, *, token_from: str = "/login", **kw):
        form = {"csrf_token": self.csrf(token_from), **(data or {})}
        return self.client.post(path, data=form, base_url=self.base_url, environ_base=self.environ,
                                headers=self.headers, **kw)

    def sign_in(self, user: str, password: str | None = None, **extra):
        return self.post("/login", {"username": user, "password": password or PASSWORDS[user], **extra})

    def signed_in(self, user: str) -> Browser:
        r = self.sign_in(user)
        assert r.status_code == 302, r.get_data(as_text=True)
        return self

    def sign_out(self):
        return self.post("/logout", token_from="/")

    def cookie(self) -> str | None:
        c = self.client.get_cookie("session")
        return None if c is None else c.value


@contextmanager
def dashboard_server(db_url: str, *extra: str) -> Iterator[int]:
    """``whirlwatch dashboard`` as a child process on a free port; yields the port."""
    port = free_port()
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "dashboard",
           "--port", str(port), "--database", db_url, *extra]
    with tempfile.TemporaryFile() as log:
        proc = subprocess.Popen(cmd, cwd=ROOT, stdout=log, stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 30
            while True:
                try:
                    request(port, "GET", "/api/v1/openapi.json")
                    break
                except OSError:
                    if proc.poll() is not None or time.monotonic() > deadline:
                        log.seek(0)
                        tail = log.read().decode(errors="replace")[-2000:]
                        raise RuntimeError(f"the dashboard did not start: {tail}") from None
                    time.sleep(0.1)
            yield port
        finally:
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()


def request(port: int, method: str, path: str, body: str | None = None,
            headers: Mapping[str, str] | None = None) -> tuple[int, http.client.HTTPMessage, str]:
    """One raw HTTP request to 127.0.0.1:``port`` (the path is sent exactly as given);
    returns the status, the headers and the body text."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    try:
        conn.request(method, path, body=body, headers=dict(headers or {}))
        resp = conn.getresponse()
        return resp.status, resp.headers, resp.read().decode(errors="replace")
    finally:
        conn.close()


def raw_sign_in(port: int, user: str, password: str | None = None,
                headers: Mapping[str, str] | None = None) -> str:
    """Sign ``user`` in on the real server (password default: the seeded one), sending
    ``headers`` too; returns the Cookie header to send."""
    extra = dict(headers or {})
    _, got, html = request(port, "GET", "/login", headers=extra)
    cookie = got["Set-Cookie"].split(";", 1)[0]
    token = _CSRF.search(html).group(1)
    form = urlencode({"username": user, "password": password or PASSWORDS[user], "csrf_token": token})
    status, got, _ = request(port, "POST", "/login", form, {
        **extra, "Cookie": cookie, "Content-Type": "application/x-www-form-urlencoded"})
    assert status == 302, status
    return got["Set-Cookie"].split(";", 1)[0]
