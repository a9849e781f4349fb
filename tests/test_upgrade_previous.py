"""Upgrade from an earlier schema: a store made by the migrations of an earlier release,
filled with rows of that revision, upgraded to the newest schema keeps every row, and the
service then runs a batch on it. On SQLite and PostgreSQL (tests/fixtures_db.py).

The old store is made by Alembic at :data:`PREVIOUS` (before the machine statuses of 0005
and the raw waveforms of 0006). Its rows are realistic: made by the service's batch path
in a scratch store at the newest revision, then copied with plain INSERTs of exactly the
old revision's columns (reflected from the old store, so an insert naming a column the old
schema lacks would fail).
"""

from __future__ import annotations

from click.testing import CliRunner
from db_contents import VERSION_TABLE, table_columns, table_rows
from fixtures_db import fresh_database
from service_helpers import offline_service, plant_store, traffic
from sqlalchemy import MetaData, func, select, text

from monitor.cli import main
from monitor.service.items import OutcomeKind
from monitor.store.backup import known_revisions
from monitor.store.db import make_engine
from monitor.store.migrate import current_revision, upgrade

#: The revision of the earlier release's store.
PREVIOUS = "0004"
#: The motor's first messages (waveforms and tachometer speeds), split: before / after the upgrade.
MOTOR_MESSAGES = 48
BATCH = 32


def _seed_newest(url: str, messages: list[tuple[str, bytes]]) -> None:
    """The sample plant at the newest schema, ``messages`` and the bearing-defect pump
    (an alarm) through the service's batch path."""
    plant_store(url)
    svc = offline_service(url)
    try:
        svc.handle_batch(messages)
        pump = traffic("sp-2")
        for i in range(0, len(pump), BATCH):
            svc.handle_batch(pump[i:i + BATCH])
    finally:
        svc.store.close()


def _copy_into_old(source: str, old: str) -> set[str]:
    """Copy every row of ``source`` into the tables ``old`` has (in place of any the old
    migrations wrote), naming only ``old``'s columns; returns the tables copied. PostgreSQL's id sequences are moved past the copied
    ids, as a store that had made those rows itself would have them."""
    src, dst = make_engine(source), make_engine(old)
    try:
        src_meta, dst_meta = MetaData(), MetaData()
        src_meta.reflect(src)
        dst_meta.reflect(dst)
        copied = set()
        with src.connect() as read, dst.begin() as write:
            for tbl in reversed(dst_meta.sorted_tables):  # the rows the migrations wrote (registry_state)
                if tbl.name != VERSION_TABLE:
                    write.execute(tbl.delete())
            for tbl in dst_meta.sorted_tables:
                if tbl.name == VERSION_TABLE:
                    continue
                cols = [c.name for c in tbl.columns]
                rows = [dict(r._mapping) for r in read.execute(select(*(src_meta.tables[tbl.name].c[c] for c in cols)))]
                if rows:
                    write.execute(tbl.insert(), rows)
                copied.add(tbl.name)
                if dst.dialect.name == "postgresql" and "id" in cols and tbl.c.id.autoincrement is not False:
                    write.execute(text(
                        f"SELECT setval(pg_get_serial_sequence('{tbl.name}', 'id'), "
                        f"(SELECT COALESCE(MAX(id), 0) + 1 FROM {tbl.name}), false) "
                        f"WHERE pg_get_serial_sequence('{tbl.name}', 'id') IS NOT NULL"))
        return copied
    finally:
        src.dispose()
        dst.dispose()


def test_store_of_the_previous_release_upgrades_and_runs(database_url, tmp_path):
    kind = "sqlite" if database_url.startswith("sqlite") else "postgresql"
    motor = traffic("bwm-1", 0, MOTOR_MESSAGES)
    half = MOTOR_MESSAGES // 2
    upgrade(database_url, PREVIOUS)
    with fresh_database(kind, tmp_path) as scratch:
        _seed_newest(scratch, motor[:half])
        copied = _copy_into_old(scratch, database_url)
    assert {"machine_status", "waveform_snapshots"}.isdisjoint(copied), "tables of later revisions"
    before = table_rows(database_url)
    old_columns = table_columns(database_url)
    for name in ("machines", "measurements", "spectrum_snapshots", "speed_readings", "alarms",
                 "alarm_transitions", "detector_state", "dead_letters"):
        assert before[name], f"the old store has rows in {name}"

    # the command the container and the systemd unit run before the service
    r = CliRunner().invoke(main, ["db", "upgrade", "--database", database_url], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    engine = make_engine(database_url)
    try:
        assert current_revision(engine) == known_revisions()[-1]
    finally:
        engine.dispose()
    # Columns later revisions add (the shelving of an alarm, ...) are not the old rows'.
    after = table_rows(database_url, columns=old_columns)
    for name, rows in before.items():
        assert after[name] == rows, f"{name} changed in the upgrade"
    machines = {row[0] for row in before["machines"]}
    # 0005 writes a blank status for each active machine (all five here)
    assert {row[0] for row in after["machine_status"]} == machines
    assert after["waveform_snapshots"] == []

    # the service runs on the upgraded store: the motor's next readings are stored and evaluated
    svc = offline_service(database_url)
    try:
        outcomes = svc.handle_batch(motor[half:])
    finally:
        svc.store.close()
    kinds = {o.kind for o in outcomes}
    assert kinds <= {OutcomeKind.WAVEFORM, OutcomeKind.SPEED}, [(o.kind, o.reason) for o in outcomes][:3]
    engine = make_engine(database_url)
    try:
        with engine.connect() as conn:
            stored = conn.execute(select(func.count()).select_from(text("measurements"))).scalar()
            waveforms = conn.execute(select(func.count()).select_from(text("waveform_snapshots"))).scalar()
    finally:
        engine.dispose()
    new_waveforms = sum(o.kind == OutcomeKind.WAVEFORM for o in outcomes)
    assert new_waveforms > 0
    assert stored == len(before["measurements"]) + new_waveforms  # one row per new reading's point
    assert waveforms and waveforms > 0
    final = table_rows(database_url, columns=old_columns)
    for name in ("machines", "alarms", "alarm_transitions", "spectrum_snapshots"):
        assert set(before[name]) <= set(final[name]), f"{name} lost rows when the service ran"
