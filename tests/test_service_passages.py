"""Live passages through the service: simulated waveforms with once-per-revolution pulses
and speed messages go in through ``Service.handle_batch`` (the batch path, no broker) and
come out as stored passages, candidate modes and mode-shift alarms.

The machine is the simulator's (monitor/sim/simulate.py): one structural mode driven by a
rotating unbalance, integrated in the time domain, swept up and down through the mode.
Its modal parameters (20 Hz, damping ratio 0.02) are the physics inputs; the checks are
the textbook method's: the half-power estimate of the natural frequency and damping ratio
(W. T. Thomson, *Theory of Vibration with Applications*, half-power points; API 684,
amplification factor) and the SDOF phase, which lags the force by 45 deg at the lower
half-power point and 135 deg at the upper (Thomson, forced SDOF response).

The run (tests/passage_run.py) sweeps at 0.1 Hz/s, slow enough for a quasi-steady
response (the sweep-rate limit is cited there).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from passage_run import FN_HZ, ZETA, feed, machine, run_messages, store_with
from sqlalchemy import select

from monitor.model.registry import Machine, Mode
from monitor.store import Store
from monitor.store.models import Alarm, AlarmTransitionRow, PassageRow, PassageTrackerState


@pytest.fixture(scope="module")
def traffic() -> list[tuple[str, bytes]]:
    return run_messages()


def db(tmp_path: Path, name: str, spec: Machine) -> str:
    return store_with(f"sqlite:///{tmp_path / name}", spec)


def stored(url: str) -> dict[str, Any]:
    """Passages (every column but the id), tracker state and alarm transitions."""
    store = Store.open(url)
    try:
        with store.session() as s:
            cols = [c.name for c in PassageRow.__table__.columns if c.name != "id"]
            passages = [{c: getattr(r, c) for c in cols}
                        for r in s.scalars(select(PassageRow).order_by(PassageRow.id))]
            trackers = s.scalar(select(PassageTrackerState.state))
            transitions = s.execute(
                select(Alarm.kind, Alarm.subject, Alarm.point_id, AlarmTransitionRow.transition,
                       AlarmTransitionRow.severity, AlarmTransitionRow.at)
                .join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id).order_by(AlarmTransitionRow.id)).all()
    finally:
        store.close()
    return {"passages": passages, "trackers": trackers, "transitions": [tuple(t) for t in transitions]}


def test_a_run_up_and_a_coast_down_become_two_candidate_passages(
        tmp_path: Path, traffic: list[tuple[str, bytes]]) -> None:
    url = db(tmp_path, "fresh.sqlite", machine())
    feed(url, traffic)
    got = stored(url)["passages"]
    assert [p["kind"] for p in got] == ["run-up", "coast-down"]
    for p in got:
        assert p["method"] == "phase" and p["unit"] == "mm/s" and p["point_id"] == "de-h"
        # half-power method (Thomson; API 684): fn within 1 %, zeta within 15 % (issue 13)
        assert p["natural_frequency_hz"] == pytest.approx(FN_HZ, rel=0.01)
        assert p["damping_ratio"] == pytest.approx(ZETA, rel=0.15)
        assert p["amplification_factor"] == pytest.approx(1 / (2 * p["damping_ratio"]))
        # SDOF phase: 45 deg at N1, 135 at N2, so 90 deg between them (Thomson), within 15
        assert p["phase_change_deg"] == pytest.approx(90.0, abs=15.0)
        # no stored mode: a candidate mode for an engineer to accept or reject
        assert p["mode"] is None and p["shift_pct"] is None and p["candidate"] == "open"
        speeds = [q["speed_hz"] for q in p["points"]]
        assert min(speeds) < 19.0 and max(speeds) > 21.0 and len(speeds) > 50
        assert all(q["phase_deg"] is not None and q["amplitude"] > 0 for q in p["points"])
    up, down = got
    assert up["started_at"] < up["ended_at"] <= down["started_at"] < down["ended_at"]


def test_a_restart_midway_carries_on_as_an_uninterrupted_run(
        tmp_path: Path, traffic: list[tuple[str, bytes]]) -> None:
    # A stored mode 8 % below the passage: each passage raises or keeps a mode-shift alarm
    # (beyond the 5 % tolerance), so the alarms are compared too.
    spec = machine((Mode("pedestal", 18.5, damping_ratio=0.02, source="impact test"),))
    whole = db(tmp_path, "whole.sqlite", spec)
    feed(whole, traffic)
    reference = stored(whole)
    assert [(p["kind"], p["mode"]) for p in reference["passages"]] == [
        ("run-up", "pedestal"), ("coast-down", "pedestal")]
    for p in reference["passages"]:
        # (identified - stored) / stored, stored 18.5 Hz (docs/modes.md, "Mode shift")
        assert p["shift_pct"] == pytest.approx((p["natural_frequency_hz"] - 18.5) / 18.5 * 100)
        assert p["candidate"] is None
    shifts = [t for t in reference["transitions"] if t[0] == "mode_shift"]
    assert shifts and shifts[0][1] == "pedestal" and shifts[0][2] == "de-h"
    assert shifts[0][3] == "raised" and shifts[0][4] == "advisory"  # 5-10 %: advisory

    # The same messages with the service restarted twice, each time in the middle of a
    # sweep: once in the run-up below the mode, once in the coast-down above it.
    url = db(tmp_path, "restarted.sqlite", spec)
    start = 0
    for cut in (len(traffic) // 5 + 7, len(traffic) * 3 // 5 + 3, len(traffic)):
        feed(url, traffic[start:cut], batch=17)  # another service each time, other batches
        start = cut
    assert stored(url) == reference
