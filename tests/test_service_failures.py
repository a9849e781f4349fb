"""Which errors are retried (transient) and which set a reading aside (deterministic).

Every error here is produced by a real database or a real socket, not constructed: the
classification must hold for what the drivers actually raise. SQLSTATE codes: PostgreSQL
manual, Appendix A "PostgreSQL Error Codes"; SQLite result codes: sqlite.org/rescode.html.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from broker import free_port
from fixtures_db import fresh_database
from sqlalchemy import create_engine, text

from monitor.service.failures import is_transient, printable, short_cause
from monitor.store.db import make_engine


def error_of(engine, *statements: str) -> BaseException:
    """The exception the last of ``statements`` raises (the others must succeed)."""
    with engine.connect() as c:
        for stmt in statements[:-1]:
            c.execute(text(stmt))
        try:
            c.execute(text(statements[-1]))
        except Exception as exc:
            return exc
    raise AssertionError(f"{statements[-1]!r} did not fail")


def test_refused_connection_is_transient() -> None:
    engine = make_engine(f"postgresql://postgres@127.0.0.1:{free_port()}/test")
    try:
        with pytest.raises(Exception) as info:
            engine.connect()
    finally:
        engine.dispose()
    assert is_transient(info.value)
    assert short_cause(info.value).startswith("OperationalError: ")


@pytest.mark.postgres
def test_postgres_errors(tmp_path: Path) -> None:
    with fresh_database("postgresql", tmp_path) as url:
        engine = make_engine(url)
        try:
            with engine.begin() as c:
                c.execute(text("CREATE TABLE t (id integer PRIMARY KEY, v varchar(3))"))
                c.execute(text("INSERT INTO t VALUES (1, 'a')"))
            # 23505 unique_violation: the same row fails again -> deterministic
            dup = error_of(engine, "INSERT INTO t VALUES (1, 'b')")
            assert type(dup).__name__ == "IntegrityError" and not is_transient(dup)
            # 22001 string_data_right_truncation -> deterministic
            long = error_of(engine, "INSERT INTO t VALUES (2, 'abcd')")
            assert type(long).__name__ == "DataError" and not is_transient(long)
            # 42P01 undefined_table: no reading causes it -> transient
            missing = error_of(engine, "SELECT * FROM nowhere")
            assert type(missing).__name__ == "ProgrammingError" and is_transient(missing)
            # 55P03 lock_not_available while another connection holds the row
            with engine.connect() as holder:
                holder.execute(text("SELECT * FROM t WHERE id = 1 FOR UPDATE"))
                locked = error_of(engine, "SET lock_timeout = '50ms'", "SELECT * FROM t WHERE id = 1 FOR UPDATE")
                holder.rollback()
            assert is_transient(locked) and "lock" in short_cause(locked).lower()
            # A value the driver refuses before sending: NUL in text -> deterministic
            with engine.connect() as c, pytest.raises(Exception) as info:
                c.execute(text("INSERT INTO t VALUES (3, :v)"), {"v": "a\x00"})
            assert not is_transient(info.value)
            # The short cause is the driver's first line, without SQL or parameters.
            assert "[SQL" not in short_cause(dup) and "\n" not in short_cause(dup)
        finally:
            engine.dispose()


def test_sqlite_errors(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'x.sqlite'}")
    try:
        with engine.begin() as c:
            c.execute(text("CREATE TABLE t (id integer PRIMARY KEY)"))
            c.execute(text("INSERT INTO t VALUES (1)"))
        dup = error_of(engine, "INSERT INTO t VALUES (1)")  # SQLITE_CONSTRAINT_PRIMARYKEY
        assert not is_transient(dup)
        # RFC 3629 section 3: UTF-8 has no surrogates
        with engine.connect() as c, pytest.raises(UnicodeEncodeError) as info:
            c.execute(text("INSERT INTO t VALUES (:v)"), {"v": "x\ud83d"})
        assert not is_transient(info.value)
        assert printable(short_cause(info.value)).encode("utf-8")
    finally:
        engine.dispose()
    # SQLITE_NOTADB: a damaged file, not a reading -> transient
    bad = tmp_path / "bad.sqlite"
    bad.write_bytes(b"this is not an SQLite file" * 100)
    engine = create_engine(f"sqlite:///{bad}")
    try:
        notadb = error_of(engine, "SELECT * FROM sqlite_master")
    finally:
        engine.dispose()
    assert is_transient(notadb), type(notadb)


def test_printable_keeps_any_text_storable() -> None:
    # UTF-8 cannot encode a lone surrogate (RFC 3629 section 3); PostgreSQL text cannot
    # hold NUL (PostgreSQL manual, "Character Types").
    out = printable("id x\ud83d and a\x00b")
    assert out.encode("utf-8") and "\x00" not in out
    assert out == "id x\\ud83d and a\\x00b"


def test_a_locked_sqlite_file_makes_the_write_transaction_fail_transiently(tmp_path: Path) -> None:
    # SQLITE_BUSY (sqlite.org/rescode.html): another connection holds the write lock. The
    # lock the service's write transaction takes first must fail as a retryable error, not
    # as one that sets the batch's readings aside.
    import sqlite3

    from monitor.store import Store, upgrade

    url = f"sqlite:///{tmp_path / 'locked.sqlite'}"
    upgrade(url)
    holder = sqlite3.connect(tmp_path / "locked.sqlite", isolation_level=None)
    holder.execute("BEGIN EXCLUSIVE")
    store = Store.open(url, busy_timeout_ms=100)
    try:
        with pytest.raises(Exception) as info, store.write_transaction():
            pass
    finally:
        holder.execute("ROLLBACK")
        holder.close()
        store.close()
    assert "locked" in str(info.value)
    assert is_transient(info.value), type(info.value)
