"""Webhook notifications end to end: alarm transitions made by the service's batch path
(sample motor bwm-1, whose sensor faults raise and clear; sample_streams/README.md) sent to
a real HTTP server on loopback. The body is checked against the published alarm-event
schema and its signature recomputed with the standard library's HMAC (RFC 2104); the
delivery attempts are read back from the store, the API and the evidence page; a failing
target is retried with exponential back-off and a bounded number of attempts; a target that
hangs does not hold up the batches."""

from __future__ import annotations

import hashlib
import hmac
import json
import logging

from contracts import check_alarm_event
from dashboard_seed import PASSWORDS
from evidence_plant import login
from notify_servers import HookReceiver, closed_port, feed, hanging_port, notify_file
from service_helpers import offline_service, plant_store, traffic, wait_for

from dashboard import create_app
from monitor.store import Store
from monitor.store.auth import create_user
from monitor.store.reads import alarm_deliveries

SECRET = "test-signing-key-0f3a9c"  # a throwaway key for this test only
ALL = 'transitions = ["raised", "escalated", "de-escalated", "acknowledged", "cleared"]'


def motor_readings() -> list[tuple[str, bytes]]:
    return [m for m in traffic("bwm-1") if m[0].endswith("/waveform")]


def deliveries(url: str, alarm_ids: set[int]) -> list[dict]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return [d | {"alarm_id": a} for a in sorted(alarm_ids) for d in alarm_deliveries(s, a)]
    finally:
        store.close()


def counter(svc, name: str, target: str = "webhook") -> float:
    return svc.metrics.registry.get_sample_value(name, {"target": target}) or 0.0


def test_signed_events_arrive_as_documented(database_url, tmp_path, caplog):
    url = database_url
    plant_store(url)
    receiver = HookReceiver()
    cfg = notify_file(tmp_path, f'webhook_url = "{receiver.url}"\ndashboard_url = "https://cm.example.test"',
                      f'machines = ["bwm-1"]\n{ALL}\nwebhook = true')
    caplog.set_level(logging.DEBUG)
    svc = offline_service(url, config=cfg, notifications_webhook_secret=SECRET)
    try:
        events, _, _ = feed(svc, motor_readings())
        assert len(events) >= 3, events  # spikes raised, flat line raised, spikes cleared
        assert wait_for(lambda: len(receiver.received()) == len(events), 20)
        got = receiver.received()
        for req, event in zip(got, events, strict=True):  # one worker: in order
            body = json.loads(req.body)
            check_alarm_event(body)  # docs/schemas/alarm-event.json
            assert body == event  # the very event published over MQTT
            # RFC 2104 HMAC with SHA-256 (RFC 4231), computed by the standard library
            want = "sha256=" + hmac.new(SECRET.encode(), req.body, hashlib.sha256).hexdigest()
            assert hmac.compare_digest(req.headers["X-Whirlwatch-Signature"], want)
            assert req.headers["Content-Type"] == "application/json"
            assert req.path == "/hooks/alarms"
        ids = {e["id"] for e in events}
        assert wait_for(lambda: len(deliveries(url, ids)) == len(events), 10)
        assert counter(svc, "whirlwatch_notifications_delivered_total") == len(events)
        assert counter(svc, "whirlwatch_notification_failures_total") == 0
    finally:
        svc.stop()
        receiver.close()
    rows = deliveries(url, ids)
    assert {(r["target"], r["attempt"], r["outcome"], r["detail"]) for r in rows} == {("webhook", 1, "delivered", "HTTP 200")}
    assert {r["destination"] for r in rows} == {receiver.url}
    # The secret is in no log line.
    assert all(SECRET not in r.getMessage() and SECRET not in str(r.__dict__) for r in caplog.records)

    # The alarm's deliveries in the API and on its evidence page.
    store = Store.open(url)
    with store.transaction() as s:
        create_user(s, "vic", PASSWORDS["vic"], "viewer")
    store.close()
    app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
    first = events[0]["id"]
    try:
        with app.test_client() as client:
            login(client)
            alarm = client.get(f"/api/v1/alarms/{first}").get_json()
            assert [(n["target"], n["outcome"], n["transition"]) for n in alarm["notifications"]] == [
                ("webhook", "delivered", e["transition"]) for e in events if e["id"] == first]
            page = client.get(f"/alarms/{first}").get_data(as_text=True)
            table = page[page.index('id="delivery-table"'):]
            assert "delivered" in table and receiver.url in table and "HTTP 200" in table
    finally:
        app.extensions["whirlwatch_engine"].dispose()


def test_failing_target_retried_with_backoff(tmp_path):
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    receiver = HookReceiver(statuses=(500, 503, 200))
    # One transition only: the sensor fault at alert (the flat line).
    cfg = notify_file(tmp_path, f'webhook_url = "{receiver.url}"\nbackoff_s = 0.3\nmax_attempts = 5',
                      'kinds = ["sensor_fault"]\nmin_severity = "alert"\ntransitions = ["raised"]\nwebhook = true')
    svc = offline_service(url, config=cfg)
    try:
        events, _, _ = feed(svc, motor_readings())
        (sent,) = [e for e in events if e["severity"] == "alert" and e["transition"] == "raised"]
        assert wait_for(lambda: len(deliveries(url, {sent["id"]})) == 3, 20)
        got = receiver.received()
        assert len(got) == 3 and len({r.body for r in got}) == 1  # the same body each time
        assert "X-Whirlwatch-Signature" not in got[0].headers  # no secret, no signature
        gaps = [b.at - a.at for a, b in zip(got, got[1:], strict=False)]
        # Exponential back-off: 0.3 s, then 0.6 s (each gap is the wait plus one request).
        assert 0.3 <= gaps[0] < 0.6 + 0.3 and 0.6 <= gaps[1] < 1.2 + 0.3, gaps
        assert gaps[1] > gaps[0]
        assert counter(svc, "whirlwatch_notification_failures_total") == 2
        assert counter(svc, "whirlwatch_notifications_delivered_total") == 1
    finally:
        svc.stop()
        receiver.close()
    rows = deliveries(url, {sent["id"]})
    assert [(r["attempt"], r["outcome"], r["detail"][:8]) for r in rows] == [
        (1, "failed", "HTTP 500"), (2, "failed", "HTTP 503"), (3, "delivered", "HTTP 200")]


def test_dead_target_gives_up_after_the_last_attempt(tmp_path):
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    dead = f"http://127.0.0.1:{closed_port()}/hook?token=not-to-be-stored"
    cfg = notify_file(tmp_path, f'webhook_url = "{dead}"\nbackoff_s = 0.05\nmax_attempts = 3',
                      'kinds = ["sensor_fault"]\nmin_severity = "alert"\ntransitions = ["raised"]\nwebhook = true')
    svc = offline_service(url, config=cfg)
    try:
        events, _, _ = feed(svc, motor_readings())
        (sent,) = [e for e in events if e["severity"] == "alert" and e["transition"] == "raised"]
        assert wait_for(lambda: len(deliveries(url, {sent["id"]})) == 3, 20)
        assert counter(svc, "whirlwatch_notifications_given_up_total") == 1
        assert counter(svc, "whirlwatch_notification_failures_total") == 3
    finally:
        svc.stop()
    rows = deliveries(url, {sent["id"]})
    assert [(r["attempt"], r["outcome"]) for r in rows] == [(1, "failed"), (2, "failed"), (3, "gave_up")]
    assert all("refused" in r["detail"].lower() for r in rows), rows
    # The stored destination carries no query (it may hold a token).
    assert all(r["destination"] == dead.split("?")[0] and "token" not in r["detail"] for r in rows)


def test_a_hanging_target_does_not_hold_up_the_batches(tmp_path, caplog):
    readings = motor_readings()
    # Without notifications.
    plain = f"sqlite:///{tmp_path / 'plain.sqlite'}"
    plant_store(plain)
    svc = offline_service(plain)
    try:
        events, whole_plain, _ = feed(svc, readings)
    finally:
        svc.stop()
    # With a webhook that accepts connections and never answers (each attempt waits its
    # 5 s timeout), and a queue of one transition.
    (tmp_path / "hang").mkdir()
    hung = f"sqlite:///{tmp_path / 'hang' / 'store.sqlite'}"
    plant_store(hung)
    caplog.set_level(logging.WARNING, logger="whirlwatch.notify")
    with hanging_port() as port:
        cfg = notify_file(tmp_path / "hang", f'webhook_url = "http://127.0.0.1:{port}/hook"\ntimeout_s = 5\n'
                          "queue_size = 1\nmax_attempts = 2\nbackoff_s = 1", f"{ALL}\nwebhook = true")
        svc = offline_service(hung, config=cfg)
        try:
            events_hung, whole_hung, announce_hung = feed(svc, readings)
            channel = svc.notifier.channels["webhook"]
            dropped = counter(svc, "whirlwatch_notifications_dropped_total")
            pending = channel.pending()
        finally:
            svc.stop()
    assert len(events_hung) == len(events)
    # Handing transitions over never waits on the target (an attempt takes 5 s here).
    assert max(announce_hung) < 0.5, announce_hung
    # One transition is being tried, at most one waits; the others were dropped and logged.
    assert dropped >= 1 and pending <= 1 and dropped + pending + 1 >= len(events_hung)
    assert any(r.getMessage() == "notification dropped: queue full" for r in caplog.records)
    print(f"batches of {len(readings)} readings: {sum(whole_plain):.2f} s without notifications, "
          f"{sum(whole_hung):.2f} s with a hanging webhook; longest announce {max(announce_hung) * 1e3:.1f} ms")

