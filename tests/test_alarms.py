"""Alarm engine: lifecycle, persistence, hysteresis, acknowledgement, persistence of state."""

from __future__ import annotations

import json

import numpy as np
import pytest

from monitor.detection.alarms import AlarmEngine, AlarmKey, levels_above

KEY = AlarmKey("fan-1", "de-h", "amplitude_growth", "overall")


def _feed(engine, levels, key=KEY, t0=0.0):
    out = []
    for i, (r, h) in enumerate(levels):
        out += engine.update(key, t0 + i, r, h, {"i": i}, f"r{i}")
    return out


def test_persistence_before_raise():
    e = AlarmEngine(persistence=3)
    assert _feed(e, [("alert", "alert")] * 2 + [(None, None)] + [("alert", "alert")] * 2) == []
    tr = _feed(e, [("alert", "alert")], t0=10)
    # definition of persistence (docs/alarms.md, "Lifecycle, persistence and hysteresis"):
    # raised on the 3rd consecutive reading, stamped with that reading's time and id (t0 + 0)
    assert [t.name for t in tr] == ["raised"]
    assert tr[0].severity == "alert" and tr[0].ts == 10 and tr[0].reading_id == "r0"


def test_full_lifecycle_and_json_shape():
    e = AlarmEngine(persistence=2)
    tr = _feed(e, [("advisory", "advisory")] * 2)
    aid = tr[0].alarm_id
    # Escalation needs the higher raise condition for N readings.
    tr = _feed(e, [("alert", "alert")] * 2, t0=10)
    assert [(t.name, t.previous_severity, t.severity) for t in tr] == [("escalated", "advisory", "alert")]
    ack = e.acknowledge(aid, "r.okafor", "checked on site, planning balancing", 20.0)
    assert ack.name == "acknowledged" and ack.user == "r.okafor"
    a = e.find(aid)
    assert a.state == "acknowledged" and a.acknowledged_by == "r.okafor"
    # Acknowledging does not clear: the alarm stays until its condition goes away.
    assert _feed(e, [("alert", "alert")] * 5, t0=30) == []
    assert e.find(aid).state == "acknowledged"
    # De-escalation: only the lower level's relaxed condition holds for N readings; ack kept.
    tr = _feed(e, [(None, "advisory")] * 2, t0=40)
    assert [(t.name, t.severity) for t in tr] == [("de-escalated", "advisory")]
    assert e.find(aid).state == "acknowledged"
    tr = _feed(e, [(None, None)] * 2, t0=50)
    assert [t.name for t in tr] == ["cleared"]
    assert e.find(aid).cleared_at == 51  # persistence 2: the 2nd clear reading, t0 50 + 1
    js = tr[0].to_json()
    for k in ("id", "machine", "point", "kind", "severity", "state", "raised_at", "cleared_at",
              "acknowledged_by", "evidence"):
        assert k in js
    assert js["state"] == "cleared" and js["kind"] == "amplitude_growth"
    assert js["raised_at"] == "1970-01-01T00:00:01Z"
    assert js["transition"]["name"] == "cleared"
    json.dumps(js)  # serialisable
    # Re-raised after a clear: a new alarm id.
    tr = _feed(e, [("alert", "alert")] * 2, t0=60)
    assert tr[0].name == "raised" and tr[0].alarm_id != aid
    with pytest.raises(ValueError, match="already cleared"):
        e.acknowledge(aid, "x", "", 70.0)


def test_escalation_needs_new_ack():
    e = AlarmEngine(persistence=1)
    aid = _feed(e, [("advisory", "advisory")])[0].alarm_id
    e.acknowledge(aid, "a.user", "seen", 1.0)
    _feed(e, [("severe", "severe")], t0=2)
    a = e.find(aid)
    assert a.severity == "severe" and a.state == "active" and a.acknowledged_by is None


def test_hold_level_keeps_alarm():
    e = AlarmEngine(persistence=2)
    _feed(e, [("alert", "alert")] * 2)
    assert _feed(e, [(None, "alert")] * 50, t0=10) == []
    assert e.alarm(KEY).state == "active"


def test_ack_validation():
    e = AlarmEngine(persistence=1)
    aid = _feed(e, [("alert", "alert")])[0].alarm_id
    with pytest.raises(ValueError, match="user"):
        e.acknowledge(aid, "  ", "x", 1.0)
    with pytest.raises(KeyError):
        e.acknowledge("nope", "u", "x", 1.0)


def test_levels_above():
    # definition of hysteresis (docs/alarms.md, "Lifecycle, persistence and hysteresis"):
    # (raise, hold) levels; a level is raised at its limit and held down to limit x (1 - 0.1):
    # 1.9 holds advisory, 3.7 holds alert
    th = {"advisory": 2.0, "alert": 4.0}
    assert levels_above(1.0, th, 0.1) == (None, None)
    assert levels_above(1.9, th, 0.1) == (None, "advisory")
    assert levels_above(2.0, th, 0.1) == ("advisory", "advisory")
    assert levels_above(3.7, th, 0.1) == ("advisory", "alert")
    assert levels_above(4.0, th, 0.1) == ("alert", "alert")


@pytest.mark.parametrize("seed", range(3))
def test_no_chatter_hovering_on_limit(seed):
    # 1,000 readings of a feature hovering on its limit with noise (sigma 2 % of the limit):
    # at most one raise and one clear (hysteresis 10 %, persistence 3).
    rng = np.random.default_rng(seed)
    limit = 4.5
    e = AlarmEngine(persistence=3)
    values = limit * (1 + 0.02 * rng.standard_normal(1000))
    trans = []
    for i, v in enumerate(values):
        r, h = levels_above(v, {"alert": limit}, 0.10)
        trans += e.update(KEY, float(i), r, h, {"value": v})
    names = [t.name for t in trans]
    assert names.count("raised") <= 1 and names.count("cleared") <= 1
    assert names.count("raised") == 1  # it did sit on the limit


def test_no_chatter_then_clear_after_leaving():
    rng = np.random.default_rng(11)
    limit = 4.5
    e = AlarmEngine(persistence=3)
    values = np.concatenate([limit * (1 + 0.02 * rng.standard_normal(1000)),
                             0.7 * limit * (1 + 0.02 * rng.standard_normal(20))])
    names = []
    for i, v in enumerate(values):
        r, h = levels_above(v, {"alert": limit}, 0.10)
        names += [t.name for t in e.update(KEY, float(i), r, h)]
    assert names == ["raised", "cleared"]


def test_snapshot_restore_mid_stream_is_equivalent():
    rng = np.random.default_rng(4)
    seq = []
    for v in 4.5 * (1 + 0.15 * rng.standard_normal(300)):
        seq.append(levels_above(v, {"advisory": 3.0, "alert": 4.5, "severe": 6.0}, 0.1))
    a = AlarmEngine(persistence=3)
    b = AlarmEngine(persistence=3)
    out_a = [t.to_json() for i, (r, h) in enumerate(seq) for t in a.update(KEY, float(i), r, h)]
    out_b = []
    for i, (r, h) in enumerate(seq):
        if i % 37 == 0:
            b = AlarmEngine.restore(json.loads(json.dumps(b.snapshot())))
        out_b += [t.to_json() for t in b.update(KEY, float(i), r, h)]
    assert out_a == out_b and len(out_a) > 2


def test_bad_arguments():
    with pytest.raises(ValueError, match="persistence"):
        AlarmEngine(persistence=0)
    with pytest.raises(ValueError, match="kind"):
        AlarmKey("m", None, "vibration", "x")
    with pytest.raises(ValueError, match="severity"):
        AlarmEngine().update(KEY, 0.0, "critical", None)


def test_update_by_rank_matches_update_by_name():
    # update_ranked is update with the levels as ranks: random raise/hold sequences (every
    # pairing, including a hold below the raise) give the same transitions and states.
    rng = np.random.default_rng(5)
    names = [None, "advisory", "alert", "severe"]
    by_name, by_rank = AlarmEngine(3), AlarmEngine(3)
    key = AlarmKey("m", "p", "amplitude_growth", "overall")
    for i in range(2000):
        r, h = (int(v) for v in rng.integers(0, 4, 2))
        a = [t.to_json() for t in by_name.update(key, float(i), names[r], names[h], {"i": i})]
        b = [t.to_json() for t in by_rank.update_ranked(key, float(i), r, h, {"i": i})]
        assert a == b
        if i % 97 == 0 and by_name.active():
            aid = by_name.active()[0].id
            by_name.acknowledge(aid, "r.osei", "seen", float(i))
            by_rank.acknowledge(aid, "r.osei", "seen", float(i))
    assert by_name.snapshot() == by_rank.snapshot()


def test_alternating_lower_levels_bring_the_alarm_down_to_the_worst_of_them():
    # Rule (docs/alarms.md, "Going down: the worst level of the last N readings"): an alert
    # whose readings alternate between nothing and advisory goes down to advisory after N
    # readings, and clears only after N readings that hold nothing. An alarm that outlives
    # its condition is a stale alarm (ANSI/ISA-18.2, alarm states; from memory).
    e = AlarmEngine(persistence=3)
    _feed(e, [("alert", "alert")] * 3)
    tr = _feed(e, [(None, None), ("advisory", "advisory"), (None, None)], t0=10)
    assert [(t.name, t.previous_severity, t.severity, t.ts) for t in tr] == [
        ("de-escalated", "alert", "advisory", 12)]
    # Still alternating: advisory is what the readings support, so it stays.
    assert _feed(e, [(None, None), ("advisory", "advisory")] * 5, t0=20) == []
    tr = _feed(e, [(None, None)] * 3, t0=40)
    assert [(t.name, t.ts) for t in tr] == [("cleared", 42)]


@pytest.mark.parametrize("persistence", [1, 2, 3, 5])
def test_an_alarm_never_outlasts_every_level_of_its_last_n_readings(persistence):
    # Property of the rule in docs/alarms.md: after any reading, a live alarm's severity is
    # held by at least one of the last N readings, unless fewer than N readings have come
    # since its last transition.
    rng = np.random.default_rng(persistence)
    names = [None, "advisory", "alert", "severe"]
    e = AlarmEngine(persistence)
    holds: list[int] = []
    since = 0
    for i in range(3000):
        r = int(rng.integers(0, 4))
        h = max(r, int(rng.integers(0, 4)))
        trans = e.update(KEY, float(i), names[r], names[h])
        holds.append(h)
        since = 0 if trans else since + 1
        a = e.alarm(KEY)
        if a is not None and a.state != "cleared" and since >= persistence:
            assert max(holds[-persistence:]) >= names.index(a.severity), (i, holds[-persistence:], a.severity)


def test_restore_reads_the_older_clear_counter():
    # A snapshot written before going down was judged by the worst level kept readings
    # holding nothing in 'clear_count': two of three such readings, then one more clears.
    e = AlarmEngine(persistence=3)
    _feed(e, [("alert", "alert")] * 3)
    _feed(e, [(None, None)] * 2, t0=10)
    snap = e.snapshot()
    stream = snap["streams"][0]
    stream.update(clear_count=stream.pop("down_count"), down_count=0, down_level=0)
    tr = _feed(AlarmEngine.restore(snap), [(None, None)], t0=20)
    assert [t.name for t in tr] == ["cleared"]
