"""The soak's measuring tool on known input: retry loops read from log lines in the
service's JSON shape (docs/service.md, "Database errors")."""

from __future__ import annotations

import datetime as dt
import json

from soak_harness import retry_loops

T0 = dt.datetime(2026, 3, 2, 6, 0, tzinfo=dt.UTC)


def line(at_s: float, msg: str, **extra) -> dict:
    """One record as monitor.service.logs.JsonLineFormatter writes it, ``at_s`` after T0."""
    ts = (T0 + dt.timedelta(seconds=at_s)).isoformat(timespec="milliseconds")
    return json.loads(json.dumps({"ts": ts, "level": "warning", "msg": msg, **extra}))


def failed(at_s: float, for_s: float, worker: str = "worker") -> dict:
    return line(at_s, "database work failed; retrying", error="refused", retry_in_s=0.2,
                failing_for_s=for_s, worker=worker)


def recovered(at_s: float, for_s: float, worker: str = "worker") -> dict:
    return line(at_s, "database work succeeded again", failed_for_s=for_s, worker=worker)


def epoch(at_s: float) -> float:
    return (T0 + dt.timedelta(seconds=at_s)).timestamp()


def test_retry_loops_per_worker_from_first_failure_to_recovery() -> None:
    # The worker fails from 10 s (first logged 0.5 s into its first failing attempt), is
    # reminded at 40.5 s and recovers at 52 s; the periodic thread fails meanwhile.
    records = [failed(10.5, 0.5), failed(12.0, 0.0, "periodic"), recovered(14.0, 2.0, "periodic"),
               line(20.0, "alarm transition"), failed(40.5, 30.5), recovered(52.0, 42.0)]
    loops = retry_loops(records, [(epoch(0.0), None)])
    assert [(x.worker, x.warnings) for x in loops] == [("worker", 2), ("periodic", 1)]
    assert abs(loops[0].age_s - 42.0) < 1e-3  # 10 s to 52 s
    assert abs(loops[1].age_s - 2.0) < 1e-3


def test_a_loop_the_process_never_recovered_from_ends_with_it() -> None:
    lives = [(epoch(0.0), epoch(25.0)), (epoch(26.0), None)]
    loops = retry_loops([failed(5.0, 0.0), failed(27.0, 0.0), recovered(27.5, 0.5)], lives)
    assert [round(x.age_s, 3) for x in loops] == [20.0, 0.5]  # killed at 25 s; the new life's
