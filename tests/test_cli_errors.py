"""Every error a user meets is one sentence: each command of the command line run against a
locked SQLite database (another connection holds ``BEGIN EXCLUSIVE``) and against a
database that does not exist says what went wrong in one ``Error:`` line, with no
traceback and no SQL statement or parameters; so does the API for a write it cannot make.

Sources: SQLite, "File Locking And Concurrency" (an EXCLUSIVE lock keeps every other
writer out; readers of a WAL database go on) and "BEGIN TRANSACTION"; docs/architecture.md,
"Rules of the code" (errors at boundaries are one sentence naming the input); docs/api.md,
"Errors" (`internal_error`).
"""

from __future__ import annotations

import os
import re
import sqlite3
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from service_helpers import PLANT, ROOT, SAMPLES, plant_store

pytestmark = pytest.mark.slow

STREAM = SAMPLES / "ab-1.jsonl"
PASSWORD = "Pw-1234567890123"


def commands(url: str, tmp: Path) -> list[list[str]]:
    """Each command that reads or writes the store, with arguments that would succeed on
    a good database (the sample plant)."""
    return [
        ["db", "upgrade", "--database", url],
        ["db", "thin", "--database", url],
        ["machines", "import", str(PLANT), "--database", url],
        ["machines", "export", str(tmp / "out.toml"), "--database", url],
        ["baseline", "restart", "ab-1", "--comment", "bearing replaced", "--database", url],
        ["user", "add", "zed", "--role", "viewer", "--database", url],
        ["user", "password", "vic", "--database", url],
        ["token", "create", "--user", "vic", "--database", url],
        ["token", "revoke", "--token-stdin", "--database", url],
        ["bumptest", str(STREAM), "--record", "--database", url],
        ["passage", str(STREAM), "--record", "--machine", "ab-1", "--database", url],
        ["run", "--database", url, "--broker", "mqtt://127.0.0.1:1", "--client-id", "locked"],
    ]


def run(args: list[str], tmp: Path) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, WHIRLWATCH_DATABASE_BUSY_TIMEOUT_MS="300", WHIRLWATCH_SERVICE_DATA_DIR=str(tmp))
    env.pop("WHIRLWATCH_TRACEBACK", None)
    return subprocess.run([sys.executable, "-c", "from monitor.cli import main; main()", *args],
                          capture_output=True, text=True, timeout=120, cwd=ROOT, env=env,
                          input=f"{PASSWORD}\n{PASSWORD}\n")


def one_sentence_error(done: subprocess.CompletedProcess[str], args: list[str]) -> str:
    err = done.stderr
    assert done.returncode != 0, (args, err)
    assert "Traceback" not in err and "[SQL:" not in err and "[parameters:" not in err, (args, err)
    assert "sqlalche.me" not in err and "INSERT " not in err and "UPDATE " not in err, (args, err)
    errors = [line for line in err.splitlines() if line.startswith("Error:")]
    assert len(errors) == 1, (args, err)
    text = errors[0][len("Error: "):]
    # One sentence: ends with a full stop, no further sentence after one.
    assert text.endswith(".") and not re.search(r"\.\s+[A-Z]", text), (args, text)
    return text


def test_a_locked_database(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    url = f"sqlite:///{db}"
    plant_store(url)
    lock = sqlite3.connect(db, isolation_level=None, timeout=0)
    lock.execute("BEGIN EXCLUSIVE")
    try:
        cmds = commands(url, tmp_path)
        with ThreadPoolExecutor(2) as pool:
            results = list(pool.map(lambda a: (a, run(a, tmp_path)), cmds))
    finally:
        lock.rollback()
        lock.close()
    said = {}
    for args, done in results:
        if done.returncode == 0:
            # Reading a WAL database goes on under another's lock: export, and upgrade of a
            # schema at its head, have nothing to write.
            assert args[:2] in (["db", "upgrade"], ["machines", "export"]), (args, done.stderr)
            continue
        said[" ".join(args[:2])] = one_sentence_error(done, args)
    # Those that must write before anything else can fail say so (the others refuse an
    # unknown user or token first, in a sentence of their own).
    for k in ("db thin", "machines import", "baseline restart", "user add", "bumptest", "passage"):
        key = next(x for x in said if x.startswith(k))
        assert "the database refused the request (database is locked)" in said[key], (k, said[key])


def test_a_missing_database(tmp_path: Path) -> None:
    def fresh(i: int) -> str:
        return f"sqlite:///{tmp_path / f'missing-{i}' / 'store.sqlite'}"

    n = len(commands("", tmp_path))
    cmds = [commands(fresh(i), tmp_path)[i] for i in range(n)]  # each its own missing file
    cmds.append(["dashboard", "--database", fresh(len(cmds)), "--port", "1"])
    with ThreadPoolExecutor(2) as pool:
        results = list(pool.map(lambda a: (a, run(a, tmp_path)), cmds))
    for args, done in results:
        if args[:2] == ["db", "upgrade"]:  # creates the database: the one command that may
            assert done.returncode == 0, done.stderr
            continue
        text = one_sentence_error(done, args)
        assert "has no whirlwatch tables" in text and "whirlwatch db upgrade" in text, (args, text)


def test_an_unexpected_error_is_one_sentence_unless_asked(tmp_path: Path) -> None:
    # A registry file that is a directory: an OSError no command turns into its own message.
    target = tmp_path / "a-directory.toml"
    target.mkdir()
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    plant_store(url)
    done = run(["machines", "export", str(target), "--database", url], tmp_path)
    text = one_sentence_error(done, ["machines", "export"])
    assert "IsADirectoryError" in text or "directory" in text


def test_the_api_answers_a_write_it_cannot_make_in_one_sentence(tmp_path: Path) -> None:
    from dashboard_signin import make_app, seed_template, seeded_copy

    from monitor.store import Store
    from monitor.store.auth import create_api_token

    url = seeded_copy(seed_template(tmp_path / "seed"), tmp_path)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "eng", "lock test")
    finally:
        store.close()
    app = make_app(url, DATABASE_BUSY_TIMEOUT_MS=200)
    app.testing = False
    client = app.test_client()
    h = {"Authorization": f"Bearer {token}"}
    lock = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None, timeout=0)
    lock.execute("BEGIN EXCLUSIVE")
    try:
        resp = client.post("/api/v1/machines/fan-000/baseline", json={"comment": "locked"}, headers=h)
    finally:
        lock.rollback()
        lock.close()
        app.extensions["whirlwatch_engine"].dispose()
    body = resp.get_json()
    # RFC 9110, section 15.6.4: a temporary condition is 503, with Retry-After (10.2.3).
    assert resp.status_code == 503 and body["error"]["code"] == "database_unavailable", resp.get_data(as_text=True)
    assert int(resp.headers["Retry-After"]) > 0
    text = resp.get_data(as_text=True)
    assert body["error"]["message"] == "The database is busy or unreachable; nothing was changed. Try again shortly."
    assert "INSERT" not in text and "parameters" not in text and "Traceback" not in text


def test_every_listed_command_is_the_one_its_module_defines() -> None:
    # The group loads a sub-command's module when it is asked for (monitor/cli.py): each
    # name must lead to a command of that name, and every command must answer --help.
    from click.testing import CliRunner

    from monitor.cli import COMMANDS, main

    for name in COMMANDS:
        cmd = main.get_command(None, name)  # type: ignore[arg-type]
        assert cmd is not None and cmd.name == name, name
        done = CliRunner().invoke(main, [name, "--help"])
        assert done.exit_code == 0, (name, done.output)
    listed = CliRunner().invoke(main, ["--help"]).output
    assert all(f"  {name} " in listed for name in COMMANDS), listed
