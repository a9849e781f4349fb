"""`whirlwatch db backup FILE` / `db restore FILE` on real SQLite files and a real
PostgreSQL server (pg_dump/pg_restore), through click's CliRunner.

The store is filled through the service's batch path (tests/service_helpers.py) plus a user
and a token, so most tables hold rows; every check compares the two databases table by
table, row by row (tests/db_contents.py).
"""

from __future__ import annotations

import re
import shutil
import sqlite3
import threading
import time
from pathlib import Path

import psycopg
import pytest
from click.testing import CliRunner
from db_contents import row_counts, table_rows
from fixtures_db import fresh_database
from service_helpers import offline_service, plant_store, traffic
from sqlalchemy import delete, select

from monitor.cli import main
from monitor.store import Store
from monitor.store.auth import create_api_token, create_user
from monitor.store.backup import known_revisions
from monitor.store.models import Measurement
from monitor.store.writes import add_dead_letter

#: Sample messages fed through the service for the seed: a motor with a tachometer (speed
#: readings) and the pump whose bearing defect raises an alarm within its stream.
SEED_MESSAGES = 24
BATCH = 32


def _cli(*args: str):
    return CliRunner().invoke(main, list(args), catch_exceptions=False)


def _one_sentence(output: str) -> str:
    """The error a command printed, asserting it is one line and one sentence."""
    lines = [ln for ln in output.strip().splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("Error: "), output
    text = lines[0][len("Error: "):]
    assert text.endswith(".") and "Traceback" not in output, text
    return text


def seed(url: str) -> None:
    """The sample plant, a few readings through the service's batch path, a user, a token."""
    plant_store(url)
    svc = offline_service(url)
    try:
        svc.handle_batch(traffic("bwm-1", 0, SEED_MESSAGES))
        messages = traffic("sp-2")
        for i in range(0, len(messages), BATCH):
            svc.handle_batch(messages[i:i + BATCH])
    finally:
        svc.store.close()
    store = Store.open(url)
    try:
        with store.transaction() as s:
            user = create_user(s, "ana", "pw-long-enough", "engineer")
            create_api_token(s, user.name, "backup test")
    finally:
        store.close()


def _pg_schema(url: str) -> str:
    found = re.search(r"search_path%3D(\w+)", url)
    assert found, url
    return found.group(1)


def _empty_again(url: str, tmp_path: Path) -> str:
    """A fresh empty database for ``url``'s kind: a new SQLite file, or ``url``'s
    PostgreSQL schema dropped and made anew (a dump restores into its own schema)."""
    if url.startswith("sqlite"):
        return f"sqlite:///{tmp_path / 'fresh.sqlite'}"
    schema = _pg_schema(url)
    with psycopg.connect("host=127.0.0.1 port=5432 user=postgres dbname=test", autocommit=True) as conn:
        conn.execute(f'DROP SCHEMA "{schema}" CASCADE')
        conn.execute(f'CREATE SCHEMA "{schema}"')
    return url


def test_round_trip_keeps_every_row(database_url, tmp_path):
    seed(database_url)
    before = table_rows(database_url)
    counts = row_counts(before)
    # the seed reached the tables a backup must keep
    for name in ("machines", "measurement_points", "measurements", "spectrum_snapshots",
                 "speed_readings", "users", "api_tokens", "audit_events", "machine_status",
                 "alarms", "alarm_transitions", "waveform_snapshots", "detector_state"):
        assert counts[name] > 0, (name, counts)

    file = tmp_path / "store.backup"
    r = _cli("db", "backup", str(file), "--database", database_url)
    assert r.exit_code == 0, r.output
    assert file.is_file() and not file.with_name(file.name + ".partial").exists()

    # the store changes after the backup; a restore over it needs --force
    store = Store.open(database_url)
    try:
        with store.transaction() as s:
            s.execute(delete(Measurement).where(Measurement.id.in_(select(Measurement.id).limit(3))))
            add_dead_letter(s, topic="whirlwatch/x/y/waveform", reason="not_json", payload=b"{")
    finally:
        store.close()
    assert table_rows(database_url) != before
    r = _cli("db", "restore", str(file), "--database", database_url)
    assert r.exit_code != 0
    assert "already holds data" in _one_sentence(r.output)
    assert table_rows(database_url)["dead_letters"], "a refused restore changed nothing"

    r = _cli("db", "restore", str(file), "--database", database_url, "--force")
    assert r.exit_code == 0, r.output
    after = table_rows(database_url)
    assert row_counts(after) == counts
    for name in before:
        assert after[name] == before[name], name

    # into a fresh, empty database: no --force needed
    fresh = _empty_again(database_url, tmp_path)
    r = _cli("db", "restore", str(file), "--database", fresh)
    assert r.exit_code == 0, r.output
    assert f"schema revision {known_revisions()[-1]}" in r.output
    assert table_rows(fresh) == before


def test_backup_while_another_connection_writes(database_url, tmp_path):
    """Each backup taken while a second connection commits dead letters one by one is one
    consistent moment: every other table whole, the dead letters a gap-free prefix of
    what was committed (ids 1..k), and every row identical to the store's."""
    seed(database_url)
    stop = threading.Event()
    written: list[int] = []
    errors: list[BaseException] = []

    def writer() -> None:
        store = Store.open(database_url)
        try:
            deadline = time.monotonic() + 30.0
            for i in range(5000):  # bounded in count and in time
                if stop.is_set() or time.monotonic() > deadline:
                    break
                with store.transaction() as s:
                    written.append(add_dead_letter(s, topic=f"whirlwatch/w/{i}/waveform", reason="not_json",
                                                   payload=b"x" * 64))
        except BaseException as exc:  # reported by the test below
            errors.append(exc)
        finally:
            store.close()

    thread = threading.Thread(target=writer, daemon=True)
    thread.start()
    files = []
    try:
        for k in range(3):
            while len(written) < 20 * (k + 1) and thread.is_alive():
                time.sleep(0.01)
            file = tmp_path / f"during-{k}.backup"
            r = _cli("db", "backup", str(file), "--database", database_url)
            assert r.exit_code == 0, r.output
            files.append(file)
    finally:
        stop.set()
        thread.join(30)
    assert not errors, errors
    assert not thread.is_alive()
    final = table_rows(database_url)
    source_letters = {row[0]: row for row in final["dead_letters"]}
    first_id = min(source_letters)
    for k, file in enumerate(files):
        # SQLite: a new file each; PostgreSQL: the schema anew (a dump restores into its own)
        target = (f"sqlite:///{tmp_path / f'r{k}.sqlite'}" if database_url.startswith("sqlite")
                  else _empty_again(database_url, tmp_path))
        r = _cli("db", "restore", str(file), "--database", target)
        assert r.exit_code == 0, r.output
        copy = table_rows(target)
        ids = sorted(row[0] for row in copy["dead_letters"])
        assert ids == list(range(first_id, first_id + len(ids))), "a backup is one moment: no gaps"
        assert len(ids) >= 20 * (k + 1)
        assert all(source_letters[row[0]] == row for row in copy["dead_letters"])
        for name, rows in copy.items():
            if name != "dead_letters":
                assert rows == final[name], name


def test_sqlite_backup_is_one_self_contained_file(tmp_path):
    url = f"sqlite:///{tmp_path / 'live.sqlite'}"
    seed(url)
    file = tmp_path / "copy.sqlite"
    assert _cli("db", "backup", str(file), "--database", url).exit_code == 0
    conn = sqlite3.connect(file)
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        conn.close()
    assert not Path(str(file) + "-wal").exists()


def test_refusals_in_one_sentence(tmp_path):
    url = f"sqlite:///{tmp_path / 'live.sqlite'}"
    seed(url)
    file = tmp_path / "copy.sqlite"
    assert _cli("db", "backup", str(file), "--database", url).exit_code == 0

    r = _cli("db", "backup", str(file), "--database", url)
    assert r.exit_code != 0 and "exists already" in _one_sentence(r.output)
    assert _cli("db", "backup", str(file), "--database", url, "--force").exit_code == 0

    fresh = f"sqlite:///{tmp_path / 'fresh.sqlite'}"
    r = _cli("db", "restore", str(tmp_path / "missing.sqlite"), "--database", fresh)
    assert "does not exist" in _one_sentence(r.output)

    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"not a database at all, just text" * 10)
    r = _cli("db", "restore", str(junk), "--database", fresh)
    assert "is not a SQLite database" in _one_sentence(r.output)

    plain = tmp_path / "plain.sqlite"
    sqlite3.connect(plain).execute("CREATE TABLE t (x)").connection.close()
    r = _cli("db", "restore", str(plain), "--database", fresh)
    assert "not a whirlwatch backup" in _one_sentence(r.output)

    future = tmp_path / "future.sqlite"
    shutil.copy(file, future)
    conn = sqlite3.connect(future)
    conn.execute("UPDATE alembic_version SET version_num = '9999'")
    conn.commit()
    conn.close()
    r = _cli("db", "restore", str(future), "--database", fresh)
    text = _one_sentence(r.output)
    assert "'9999'" in text and "does not know" in text
    assert not (tmp_path / "fresh.sqlite").exists() or table_rows(fresh) == {}, "nothing restored"

    r = _cli("db", "backup", str(tmp_path / "x.sqlite"), "--database", f"sqlite:///{tmp_path / 'none.sqlite'}")
    assert "does not exist" in _one_sentence(r.output)


@pytest.mark.postgres
def test_postgres_refuses_a_dump_of_another_schema(tmp_path):
    with fresh_database("postgresql", tmp_path) as one, fresh_database("postgresql", tmp_path) as two:
        seed(one)
        file = tmp_path / "one.dump"
        assert _cli("db", "backup", str(file), "--database", one).exit_code == 0
        r = _cli("db", "restore", str(file), "--database", two)
        text = _one_sentence(r.output)
        assert _pg_schema(one) in text and _pg_schema(two) in text
        assert table_rows(two) == {}


def test_restore_of_an_older_backup_upgrades_it(tmp_path):
    """A backup of an earlier release's store restores and is brought to the newest schema
    (tests/test_upgrade_previous.py checks that an upgrade keeps the rows)."""
    from monitor.store.migrate import upgrade

    old = f"sqlite:///{tmp_path / 'old.sqlite'}"
    older = known_revisions()[-3]
    upgrade(old, older)
    file = tmp_path / "old.backup"
    r = _cli("db", "backup", str(file), "--database", old)
    assert r.exit_code == 0 and f"revision {older}" in r.output, r.output
    r = _cli("db", "restore", str(file), "--database", f"sqlite:///{tmp_path / 'new.sqlite'}")
    assert r.exit_code == 0, r.output
    assert f"schema revision {older}" in r.output and f"schema revision {known_revisions()[-1]}" in r.output


@pytest.mark.postgres
def test_postgres_without_the_client_tools_says_what_to_run(tmp_path, monkeypatch):
    with fresh_database("postgresql", tmp_path) as url:
        seed(url)
        monkeypatch.setenv("PATH", str(tmp_path))  # a PATH without pg_dump and pg_restore
        r = _cli("db", "backup", str(tmp_path / "x.dump"), "--database", url)
        text = _one_sentence(r.output)
        assert "pg_dump is not on PATH" in text and "pg_dump --format=custom" in text
        assert not (tmp_path / "x.dump").exists()
