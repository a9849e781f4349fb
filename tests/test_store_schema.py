"""The Alembic migrations create exactly the models' schema, on SQLite and PostgreSQL."""

from __future__ import annotations

import subprocess
import sys
import time

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect, text

from monitor.store import Store, make_engine, upgrade
from monitor.store.migrate import current_revision
from monitor.store.models import Base


def test_upgrade_head_matches_models(database_url):
    upgrade(database_url)
    engine = make_engine(database_url)
    try:
        with engine.connect() as conn:
            ctx = MigrationContext.configure(conn, opts={"compare_type": True})
            diff = compare_metadata(ctx, Base.metadata)
        assert diff == []
        tables = set(inspect(engine).get_table_names()) - {"alembic_version"}
        assert tables == set(Base.metadata.tables)
        assert current_revision(engine) == "0009"
    finally:
        engine.dispose()


def test_upgrade_twice_is_harmless(database_url):
    upgrade(database_url)
    upgrade(database_url)
    engine = make_engine(database_url)
    try:
        assert current_revision(engine) == "0009"
    finally:
        engine.dispose()


def test_upgrade_from_0001_keeps_the_registry(database_url):
    # A database made by the first release, with a value that release let in, upgraded.
    upgrade(database_url, "0001")
    engine = make_engine(database_url)
    try:
        with engine.begin() as conn:
            conn.execute(text(
                "INSERT INTO machines (id, name, location, machine_class, speed_min_rpm, speed_max_rpm, "
                "excitation_orders, settings, active, position, created_at, updated_at) VALUES "
                "('ef-2', 'fan', '', 'group2/rigid', 600, 1500, '[1, 2]', '{}', true, 0, "
                ":t, :t)"), {"t": "2026-01-01 00:00:00"})
            conn.execute(text(
                "INSERT INTO modes (machine_id, name, frequency_hz, source, position, updated_at) "
                "VALUES ('ef-2', 'sway', 1e-80, '', 0, :t)"), {"t": "2026-01-01 00:00:00"})
        upgrade(database_url)
        assert current_revision(engine) == "0009"
        with engine.connect() as conn:
            assert conn.execute(text("SELECT version FROM registry_state")).all() == [(0,)]
            assert conn.execute(text("SELECT registry_version, file_digest FROM machines")).all() == [(0, None)]
            assert conn.execute(text("SELECT count(*) FROM baseline_restarts")).scalar() == 0
    finally:
        engine.dispose()
    # The old value is still there to be shown as invalid and fixed (not silently lost).
    from monitor.store.registry_sync import read_registry

    store = Store.open(database_url)
    try:
        with store.session() as s:
            registry, problems = read_registry(s)
    finally:
        store.close()
    assert registry.machine("ef-2").modes == ()
    assert len(problems) == 1 and "'sway'" in problems[0] and "'frequency_hz'" in problems[0]


def test_sqlite_connection_settings(tmp_path):
    # SQLite documents these PRAGMAs (sqlite.org/pragma.html); read them back as set.
    engine = make_engine(f"sqlite:///{tmp_path / 'sub' / 'x.sqlite'}", busy_timeout_ms=1234)
    try:
        with engine.connect() as conn:
            assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
            assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
            assert conn.execute(text("PRAGMA busy_timeout")).scalar() == 1234
    finally:
        engine.dispose()


def test_postgres_url_uses_psycopg3():
    from monitor.store import normalise_url

    assert normalise_url("postgresql://u@h/db").drivername == "postgresql+psycopg"
    assert normalise_url("postgres://u@h/db").drivername == "postgresql+psycopg"


def test_sqlite_writer_gate_queues_a_second_process(tmp_path):
    # flock(2) locks are per open file and exclusive across processes (Linux man page
    # flock(2)): a second process entering the gate waits until the first leaves it.
    url = f"sqlite:///{tmp_path / 'gate.sqlite'}"
    store = Store(make_engine(url))
    script = (
        "import sys, time\n"
        "from monitor.store.db import Store, make_engine\n"
        "s = Store(make_engine(sys.argv[1]))\n"
        "print('ready', flush=True)\n"
        "with s.writer_gate():\n"
        "    print(time.time(), flush=True)\n"
    )
    try:
        with store.writer_gate():
            child = subprocess.Popen([sys.executable, "-c", script, url], stdout=subprocess.PIPE, text=True)
            assert child.stdout.readline().strip() == "ready"
            time.sleep(0.5)
            released = time.time()
        out, _ = child.communicate(timeout=30)
        entered = float(out.strip())
        assert entered >= released
    finally:
        store.close()
    # PostgreSQL and in-memory SQLite have no file to lock: the gate is a no-op there.
    memory = Store(make_engine("sqlite://"))
    try:
        with memory.writer_gate():
            pass
        assert [p.name for p in tmp_path.glob("*.writers")] == ["gate.sqlite.writers"]
    finally:
        memory.close()


def test_json_columns_store_nan_as_null_and_plain_data_unchanged(tmp_path):
    # RFC 8259 section 6: NaN and Infinity are not permitted JSON numbers; the store writes
    # null for them. Plain data reads back as it was, read by the standard library's parser
    # (the sign of a negative zero included; IEEE 754 keeps it).
    import dataclasses
    import datetime as dt
    import json
    import math

    import numpy as np

    from monitor.store.db import dumps_json

    plain = {"a": [1, 2.5, "x", None, True, 0.1 + 0.2, 1e-7, 2**63 - 1], "b": {"c": -0.0}, "é": "µm/s"}
    back = json.loads(dumps_json(plain))
    assert back == plain
    assert math.copysign(1.0, back["b"]["c"]) == -1.0
    # Dataclasses, dates, non-string keys and integers beyond 64 bits take jsonable's forms.
    @dataclasses.dataclass
    class Pair:
        x: float
        when: dt.datetime

    odd = {1: Pair(float("nan"), dt.datetime(2026, 1, 2, 3, 4, 5, tzinfo=dt.UTC)), "big": 2**70}
    assert json.loads(dumps_json(odd)) == {"1": {"x": None, "when": "2026-01-02T03:04:05+00:00"}, "big": 2**70}
    assert json.loads(dumps_json({"v": float("nan"), "w": [float("inf"), 1.0]})) == {"v": None, "w": [None, 1.0]}
    assert json.loads(dumps_json({"n": np.int64(3), "f": np.float32(0.5)})) == {"n": 3, "f": 0.5}
    engine = make_engine(f"sqlite:///{tmp_path / 'j.sqlite'}")
    try:
        with engine.begin() as conn:
            conn.execute(text("CREATE TABLE t (j JSON)"))
            from sqlalchemy import JSON, Column, MetaData, Table

            t = Table("t", MetaData(), Column("j", JSON))
            conn.execute(t.insert(), [{"j": {"ratio": float("nan"), "value": 2.0}}])
            raw = conn.execute(text("SELECT j FROM t")).scalar()
        assert json.loads(raw) == {"ratio": None, "value": 2.0}
    finally:
        engine.dispose()
