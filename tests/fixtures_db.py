"""Database fixtures: every store test runs on a temporary SQLite file and on PostgreSQL.

``database_url``
    Parametrised: ``sqlite`` (a fresh file in tmp_path) and ``postgresql`` (a fresh schema
    in database ``test`` at 127.0.0.1:5432, dropped afterwards; skipped with the reason when
    the server cannot be reached).
``store``
    A :class:`monitor.store.Store` on ``database_url`` after ``upgrade`` (Alembic head).
``plant``
    A small invented registry (two machines) imported into ``store``.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import uuid
from collections.abc import Iterator

import numpy as np
import pytest

PG_SERVER_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
_pg_state: dict[str, str | None] = {}


def postgres_unreachable_reason() -> str | None:
    """None when PostgreSQL answers at 127.0.0.1:5432, else why not (cached)."""
    if "reason" not in _pg_state:
        try:
            import psycopg

            with psycopg.connect(
                "host=127.0.0.1 port=5432 user=postgres dbname=test", connect_timeout=3
            ) as conn:
                conn.execute("SELECT 1")
            _pg_state["reason"] = None
        except Exception as exc:  # any failure means: skip, and say why
            _pg_state["reason"] = f"PostgreSQL at 127.0.0.1:5432 (db test) unreachable: {exc}"
    return _pg_state["reason"]


@contextlib.contextmanager
def fresh_database(kind: str, directory) -> Iterator[str]:
    """A URL of an empty database: a SQLite file in ``directory`` or a new PostgreSQL
    schema (dropped afterwards); skips when PostgreSQL is unreachable."""
    if kind == "sqlite":
        yield f"sqlite:///{directory / f'store-{uuid.uuid4().hex[:8]}.sqlite'}"
        return
    reason = postgres_unreachable_reason()
    if reason:
        pytest.skip(reason)
    import psycopg

    schema = f"t_{uuid.uuid4().hex[:12]}"
    dsn = "host=127.0.0.1 port=5432 user=postgres dbname=test"
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute(f'CREATE SCHEMA "{schema}"')
    try:
        yield f"{PG_SERVER_URL}?options=-csearch_path%3D{schema}"
    finally:
        with psycopg.connect(dsn, autocommit=True) as conn:
            conn.execute(f'DROP SCHEMA "{schema}" CASCADE')


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def database_url(request: pytest.FixtureRequest, tmp_path) -> Iterator[str]:
    with fresh_database(request.param, tmp_path) as url:
        yield url


@pytest.fixture
def store(database_url: str):
    from monitor.store import Store, upgrade

    upgrade(database_url)
    s = Store.open(database_url)
    try:
        yield s
    finally:
        s.close()


def small_registry():
    """Two invented machines: a fan with two points and two modes, a pump with one point."""
    from monitor.model.registry import Machine, Mode, Point, Registry

    return Registry(
        machines=(
            Machine(
                id="fan-7",
                name="Exhaust fan 7",
                location="Hall B",
                machine_class="group2/flexible",
                speed_range_rpm=(300.0, 1500.0),
                excitation_orders=(1.0, 2.0, 9.0),
                points=(
                    Point(id="de-h", direction="horizontal", quantity="acceleration", unit="m/s^2", fs_hz=25600.0),
                    Point(id="nde-v", direction="vertical", quantity="velocity", unit="mm/s"),
                ),
                modes=(
                    Mode(name="frame lateral", frequency_hz=18.4, damping_ratio=0.03, source="impact test", date=dt.date(2026, 3, 4)),
                    Mode(name="pedestal rocking", frequency_hz=31.0, amplification_factor=12.0, required_margin_pct=15.0),
                ),
                limits_mm_s=(2.0, 4.0, 6.5),
                settings={"note": "belt drive"},
            ),
            Machine(
                id="pump-2",
                name="Feed pump 2",
                machine_class="group1/rigid",
                line_frequency_hz=50.0,
                points=(Point(id="m-ax", direction="axial", quantity="displacement", unit="um"),),
            ),
        )
    )


@pytest.fixture
def plant(store):
    from monitor.store import import_registry

    registry = small_registry()
    with store.transaction() as session:
        import_registry(session, registry)
    return registry


def make_analysis(machine: str = "fan-7", point: str = "de-h", ts: float = 1_780_000_000.0, *, overall: float = 2.5, n_bins: int = 1025, seed: int = 0):
    """A ReadingAnalysis with random spectra (inputs only; never an expected value)."""
    from monitor.analysis.waveform import OrderAmplitude, Peak, ReadingAnalysis, Spectrum

    rng = np.random.default_rng(seed)
    freq = np.arange(n_bins) * 12.5
    spec = Spectrum(freq_hz=freq, amplitude=rng.random(n_bins), unit="m/s^2", scaling="peak", resolution_hz=12.5, enbw_hz=18.75)
    vel = Spectrum(freq_hz=freq, amplitude=rng.random(n_bins) * 3.0, unit="mm/s", scaling="peak", resolution_hz=12.5, enbw_hz=18.75)
    return ReadingAnalysis(
        machine=machine,
        point=point,
        ts=ts,
        speed_hz=24.7,
        speed_source="estimated",
        speed_uncertainty_hz=0.05,
        overall_velocity_mm_s_rms=overall,
        orders=(OrderAmplitude(1.0, 24.7, 0.8, 3.1, None), OrderAmplitude(2.0, 49.4, 0.2, 0.4, 12.0)),
        one_x_normalised=3.1 / 24.7**2,
        peaks=(Peak(24.7, 0.8), Peak(222.3, 0.3)),
        spectrum=spec,
        velocity_spectrum=vel,
        reading_id=f"r-{ts}",
    )
