"""The soak's measuring tools on known input: retry loops read from log lines of the
service's JSON shape, and the deploy broker's settings read from deploy/mosquitto.conf."""

from __future__ import annotations

import datetime as dt
import json

from soak_harness import DEPLOY_MOSQUITTO, deploy_persistence, retry_loops

T0 = dt.datetime(2026, 3, 2, 6, 0, tzinfo=dt.UTC)


def line(at_s: float, msg: str, **extra) -> dict:
    """One record as monitor.service.JsonLineFormatter writes it, ``at_s`` after T0."""
    ts = (T0 + dt.timedelta(seconds=at_s)).isoformat(timespec="milliseconds")
    return json.loads(json.dumps({"ts": ts, "level": "warning", "msg": msg, **extra}))


def retry(at_s: float, wait_s: float) -> dict:
    return line(at_s, "database work failed; retrying", error="refused", retry_in_s=wait_s)


def epoch(at_s: float) -> float:
    return (T0 + dt.timedelta(seconds=at_s)).timestamp()


def test_retry_loops_join_back_offs_and_split_at_a_quiet_stretch_or_a_new_process() -> None:
    waits = [0.2, 0.4, 0.8, 1.6, 3.2, 6.4, 10.0]
    at = [sum(waits[:k]) for k in range(len(waits))]  # each attempt fails at once
    first = [retry(t, w) for t, w in zip(at, waits, strict=True)]
    # The periodic thread retries too, interleaved with the worker: still one stretch.
    first.insert(3, retry(at[2] + 0.1, 0.2))
    # 40 s of quiet after the last back-off: a new loop.
    later = [retry(at[-1] + 10.0 + 40.0, 0.2), line(at[-1] + 51.0, "alarm transition")]
    # A new process (killed and restarted at 100 s): its warnings start a loop of their own.
    restarted = [retry(100.5, 0.2), retry(100.7, 0.4)]
    lives = [(epoch(-1.0), epoch(99.0)), (epoch(100.0), None)]
    loops = retry_loops(first + later + restarted, lives)
    assert [x.warnings for x in loops] == [8, 1, 2]
    # The first loop lasts from its first warning to its last attempt: the sum of the
    # back-offs (arithmetic on the inputs above).
    assert abs(loops[0].age_s - sum(waits)) < 1e-3
    assert abs(loops[2].age_s - (0.2 + 0.4)) < 1e-3


def test_a_loop_cut_by_a_kill_ends_with_its_process() -> None:
    lives = [(epoch(-1.0), epoch(5.0)), (epoch(6.0), None)]
    loops = retry_loops([retry(0.0, 0.2), retry(0.2, 0.4), retry(0.6, 10.0)], lives)
    assert len(loops) == 1 and abs(loops[0].age_s - 5.0) < 1e-3


def test_deploy_persistence_takes_the_deploy_file_lines() -> None:
    conf = deploy_persistence()
    text = DEPLOY_MOSQUITTO.read_text(encoding="utf-8")
    assert conf["persistence"] == "true"
    for key, value in conf.items():
        assert f"\n{key} {value}" in text
    assert "persistence_location" not in conf  # the private broker keeps its own directory
