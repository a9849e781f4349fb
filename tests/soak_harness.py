"""Machinery of the soak (tests/test_soak.py).

- :class:`PacedPublisher`: publishes readings at QoS 1 in order, paced, through broker
  crashes, and stops at given readings until told to go on.
- :class:`HealthPoller`: samples the service's ``/healthz`` in the background.
- :class:`Engineer`: the real dashboard (Flask test client) signed in as an engineer, to
  acknowledge alarms on the alarms page and add a mode through the JSON API.
- What the store holds (:func:`stored_keys`, :func:`alarm_transitions`, ...), read
  with the project's own models.
- :func:`retry_loops`: the database retry loops in a service's JSON log lines, and
  :func:`longest_retry_in_health` the longest /healthz reported.

Every wait is bounded in time; every thread is a daemon.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import http.client
import json
import re
import threading
import time
import urllib.error
import urllib.request
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
from broker import PrivateBroker
from paho.mqtt.enums import CallbackAPIVersion
from soak_month import Reading
from sqlalchemy import func, select

from monitor.store import Store
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    DeadLetter,
    Measurement,
    Mode,
    ModeHistory,
    PassageRow,
    SpeedReadingRow,
)

# ----------------------------------------------------------------------------- publisher


def _acknowledged(info: Any) -> bool:
    """The broker acknowledged this copy (paho raises for a copy it could not send)."""
    try:
        return bool(info.is_published())
    except (RuntimeError, ValueError):
        return False


class PacedPublisher(threading.Thread):
    """Publish ``readings`` at QoS 1, in order, one at a time: the next goes out once the
    broker acknowledged the previous (PUBACK), so a reading counts as published exactly
    when the broker took responsibility for it.

    ``rate_per_s`` paces the sending (0: as fast as the broker acknowledges); after a
    wait (a pause, a broker outage) the pace starts afresh instead of catching up. A
    message the broker has not acknowledged within 2 s is sent again once the client is
    connected (paho reconnects on its own), for at most ``give_up_s``. After each index
    in ``pause_after`` the publisher stops until :meth:`resume`; the indices in ``skip``
    are not sent.
    """

    def __init__(self, broker: PrivateBroker, readings: Sequence[Reading], *,
                 rate_per_s: float = 0.0, pause_after: Iterable[int] = (),
                 skip: Iterable[int] = (), give_up_s: float = 60.0,
                 pause_limit_s: float = 300.0) -> None:
        super().__init__(daemon=True, name="soak-publisher")
        self.readings = readings
        self.skip = frozenset(skip)
        self.rate_per_s = rate_per_s
        self.pause_after = frozenset(pause_after)
        self.give_up_s = give_up_s
        self.pause_limit_s = pause_limit_s
        self.progress = 0  # readings handled (acknowledged or given up), in order
        self.sends: list[list[Any]] = [[] for _ in readings]  # paho infos of each copy
        self.given_up: list[int] = []
        self.paused_at: int | None = None
        self._paused = threading.Event()
        self._resume = threading.Event()
        self._halt = threading.Event()
        self._connected = threading.Event()
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=paho.MQTTv5)
        self.client.max_inflight_messages_set(20)
        self.client.max_queued_messages_set(0)
        self.client.reconnect_delay_set(0.1, 0.5)
        self.client.on_connect = lambda *_a: self._connected.set()
        self.client.on_disconnect = lambda *_a: self._connected.clear()
        self.client.connect(broker.host, broker.port)
        self.client.loop_start()
        if not self._connected.wait(10):
            self.close()
            raise RuntimeError(f"the soak publisher could not connect to {broker.url}.")

    # -- control (from the test's thread)

    def wait_paused(self, index: int, timeout_s: float) -> bool:
        """Until the publisher stopped after reading ``index``; False on timeout."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self._paused.wait(0.1) and self.paused_at == index:
                return True
            if not self.is_alive():
                return False
        return False

    def resume(self) -> None:
        self._paused.clear()
        self._resume.set()

    def wait_progress(self, count: int, timeout_s: float) -> bool:
        """Until ``count`` readings are handled; False on timeout."""
        deadline = time.monotonic() + timeout_s
        while self.progress < count and time.monotonic() < deadline and self.is_alive():
            time.sleep(0.02)
        return self.progress >= count

    def stop(self) -> None:
        self._halt.set()
        self._resume.set()

    def close(self) -> None:
        self.stop()
        self.client.disconnect()
        self.client.loop_stop()

    # -- results

    def published(self) -> list[int]:
        """Indices of the readings the broker acknowledged (any copy)."""
        return [i for i, infos in enumerate(self.sends) if any(map(_acknowledged, infos))]

    def attempted(self) -> list[int]:
        return [i for i, infos in enumerate(self.sends) if infos]

    def copies(self) -> int:
        """Copies sent beyond one per reading (resends after a missing PUBACK)."""
        return sum(max(0, len(x) - 1) for x in self.sends)

    # -- the thread

    def run(self) -> None:
        base, first = time.monotonic(), 0
        for i, r in enumerate(self.readings):
            if self._halt.is_set():
                return
            if self.rate_per_s > 0:
                due = base + (i - first) / self.rate_per_s
                now = time.monotonic()
                if now > due + 0.5:  # held up: start the pace afresh, no burst
                    base, first = now, i
                elif due > now and self._halt.wait(due - now):
                    return
            if i not in self.skip:
                self._send(i, r)
            self.progress = i + 1
            if i in self.pause_after:
                self.paused_at = i
                self._resume.clear()
                self._paused.set()
                self._resume.wait(self.pause_limit_s)
                base, first = time.monotonic(), i + 1

    def _send(self, i: int, r: Reading) -> None:
        deadline = time.monotonic() + self.give_up_s
        while not self._halt.is_set():
            info = self.client.publish(r.topic, r.payload, qos=1)
            self.sends[i].append(info)
            # Not connected: paho raises; the reading is sent again once it reconnected.
            with contextlib.suppress(RuntimeError, ValueError):
                info.wait_for_publish(2.0)
            if any(map(_acknowledged, self.sends[i])):
                return
            if time.monotonic() > deadline:
                self.given_up.append(i)
                return
            self._connected.wait(1.0)


# ----------------------------------------------------------------------------- health


@dataclass
class HealthSample:
    t: float  # time.monotonic()
    state: str  # "healthy", "unhealthy" or "down" (no answer)
    status: int | None
    body: dict[str, Any] | None


class HealthPoller(threading.Thread):
    """GET ``url`` (the service's /healthz) every ``period_s``; a sample is healthy on
    HTTP 200 with ``"ok": true``, unhealthy on any other answer, down without one."""

    def __init__(self, url: str, period_s: float = 0.25) -> None:
        super().__init__(daemon=True, name="soak-health")
        self.url = url
        self.period_s = period_s
        self.samples: list[HealthSample] = []
        self._halt = threading.Event()

    def stop(self) -> None:
        self._halt.set()
        self.join(5)

    def sample(self) -> HealthSample:
        t = time.monotonic()
        try:
            with urllib.request.urlopen(self.url, timeout=2.0) as resp:
                status, raw = resp.status, resp.read()
        except urllib.error.HTTPError as exc:
            status, raw = exc.code, exc.read()
        except (OSError, http.client.HTTPException):  # no answer (URLError is an OSError)
            return HealthSample(t, "down", None, None)
        try:
            body = json.loads(raw)
        except ValueError:
            body = None
        ok = status == 200 and isinstance(body, dict) and body.get("ok") is True
        return HealthSample(t, "healthy" if ok else "unhealthy", status, body)

    def between(self, t0: float, t1: float) -> list[HealthSample]:
        return [s for s in list(self.samples) if t0 <= s.t <= t1]

    def run(self) -> None:
        while not self._halt.is_set():
            self.samples.append(self.sample())
            self._halt.wait(self.period_s)


# ----------------------------------------------------------------------------- dashboard


class Engineer:
    """The dashboard app on ``db_url`` through Flask's test client, signed in as an
    engineer made for the purpose."""

    def __init__(self, db_url: str, name: str = "soak-eng", password: str = "soak-engineer-pass") -> None:
        from dashboard import create_app
        from monitor.store.auth import create_user

        store = Store.open(db_url)
        try:
            with store.transaction() as s:
                create_user(s, name, password, "engineer")
        finally:
            store.close()
        self.app = create_app({"DATABASE_URL": db_url, "SECRET_KEY": "soak", "TESTING": True})
        self.client = self.app.test_client()
        self.csrf = self._csrf("/login")
        r = self.client.post("/login", data={"username": name, "password": password,
                                             "csrf_token": self.csrf})
        if r.status_code != 302:
            raise RuntimeError(f"the soak engineer could not sign in: {r.status_code}")
        self.csrf = self._csrf("/")

    def _csrf(self, path: str) -> str:
        html = self.client.get(path).get_data(as_text=True)
        m = re.search(r'name="csrf-token" content="([^"]+)"', html)
        if m is None:
            raise RuntimeError(f"no CSRF token on the dashboard page {path}")
        return m.group(1)

    def acknowledge_active(self, comment: str) -> list[int]:
        """Acknowledge every active alarm on the alarms page, oldest first; their ids."""
        r = self.client.get("/api/v1/alarms?state=active&limit=500")
        if r.status_code != 200:
            raise RuntimeError(f"GET /api/v1/alarms answered {r.status_code}")
        ids = sorted(a["id"] for a in r.get_json()["items"])
        for alarm_id in ids:
            r = self.client.post(f"/alarms/{alarm_id}/acknowledge",
                                 data={"comment": comment, "csrf_token": self.csrf})
            if r.status_code != 302:
                raise RuntimeError(f"acknowledging alarm {alarm_id} answered {r.status_code}: "
                                   f"{r.get_data(as_text=True)[:300]}")
        return ids

    def add_mode(self, machine: str, body: dict[str, Any]) -> tuple[int, Any]:
        """``POST /api/v1/machines/{machine}/modes``: (status, JSON answer)."""
        r = self.client.post(f"/api/v1/machines/{machine}/modes", json=body,
                             headers={"X-CSRFToken": self.csrf})
        return r.status_code, r.get_json(silent=True)

    def close(self) -> None:
        self.app.extensions["whirlwatch_engine"].dispose()


# ----------------------------------------------------------------------------- the store


def _ms(ts: dt.datetime) -> int:
    return round(ts.timestamp() * 1000)


def stored_row_count(url: str) -> int:
    """Measurement rows plus speed-reading rows."""
    store = Store.open(url)
    try:
        with store.session() as s:
            return int(s.scalar(select(func.count()).select_from(Measurement)) or 0) + int(
                s.scalar(select(func.count()).select_from(SpeedReadingRow)) or 0)
    finally:
        store.close()


def stored_keys(url: str) -> Counter[tuple[str, str | None, int]]:
    """Rows per reading key (:attr:`soak_month.Reading.key`): measurements and speeds."""
    store = Store.open(url)
    try:
        with store.session() as s:
            out: Counter[tuple[str, str | None, int]] = Counter(
                (m, p, _ms(ts)) for m, p, ts in s.execute(
                    select(Measurement.machine_id, Measurement.point_id, Measurement.ts)))
            out.update((m, None, _ms(ts)) for m, ts in s.execute(
                select(SpeedReadingRow.machine_id, SpeedReadingRow.ts)))
        return out
    finally:
        store.close()


#: One alarm transition as the comparison sees it: point, kind, subject, transition,
#: severity, state after it, and the instant (epoch ms) for a reading's transition, the
#: user for an acknowledgement (made at wall-clock time, so no instant).
TransitionKey = tuple[str | None, str, str, str, str, str, int | str | None]


def alarm_transitions(url: str) -> dict[str, list[TransitionKey]]:
    """Every stored alarm transition per machine, in the order the store recorded them."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(
                select(Alarm.machine_id, Alarm.point_id, Alarm.kind, Alarm.subject,
                       AlarmTransitionRow.transition, AlarmTransitionRow.severity,
                       AlarmTransitionRow.state, AlarmTransitionRow.at, AlarmTransitionRow.user)
                .join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id)
                .order_by(AlarmTransitionRow.id)).all()
    finally:
        store.close()
    out: dict[str, list[TransitionKey]] = {}
    for machine, point, kind, subject, name, severity, state, at, user in rows:
        when: int | str | None = user if name == "acknowledged" else _ms(at)
        out.setdefault(machine, []).append((point, kind, subject, name, severity, state, when))
    return out


def stored_passages(url: str) -> list[tuple[Any, ...]]:
    """Every stored passage by machine, point, start and place in its sweep: machine,
    point, kind, start and end (epoch ms), its place in the sweep, natural frequency,
    damping ratio, the mode it matched and whether it is a candidate (values exact: two
    runs of the same readings compute the same)."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(
                select(PassageRow.machine_id, PassageRow.point_id, PassageRow.kind, PassageRow.started_at,
                       PassageRow.ended_at, PassageRow.seq, PassageRow.natural_frequency_hz,
                       PassageRow.damping_ratio, PassageRow.mode, PassageRow.candidate)
                .order_by(PassageRow.machine_id, PassageRow.point_id, PassageRow.started_at,
                          PassageRow.seq)).all()
    finally:
        store.close()
    return [(m, p, k, _ms(t0), _ms(t1), seq, fn, zeta, mode, cand)
            for m, p, k, t0, t1, seq, fn, zeta, mode, cand in rows]


def dead_letter_reasons(url: str) -> Counter[str]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return Counter(dict(s.execute(
                select(DeadLetter.reason, func.count()).group_by(DeadLetter.reason)).all()))
    finally:
        store.close()


def mode_names(url: str, machine: str) -> list[str]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return list(s.scalars(select(Mode.name).where(Mode.machine_id == machine).order_by(Mode.id)))
    finally:
        store.close()


def mode_history(url: str, machine: str, name: str) -> list[tuple[str, str]]:
    """(change, changed by) of every recorded change of one mode, oldest first."""
    store = Store.open(url)
    try:
        with store.session() as s:
            return [tuple(x) for x in s.execute(
                select(ModeHistory.change, ModeHistory.changed_by)
                .where(ModeHistory.machine_id == machine, ModeHistory.mode_name == name)
                .order_by(ModeHistory.id))]
    finally:
        store.close()


# ----------------------------------------------------------------------------- the log


@dataclass
class RetryLoop:
    """One database retry loop of one worker thread of one process (docs/service.md,
    "Database errors"): from its first failure to its recovery, or to the end of the
    process when it never recovered."""

    worker: str
    first: dt.datetime
    last: dt.datetime
    warnings: int
    errors: list[str] = field(default_factory=list)
    recovered: dt.datetime | None = None  # 'database work succeeded again'
    end: dt.datetime | None = None  # when the process ended, if it did

    @property
    def age_s(self) -> float:
        """Seconds the loop lasted (to the test's end for one still under way)."""
        stop = self.recovered or self.end or dt.datetime.now(dt.UTC)
        return (stop - self.first).total_seconds()


def log_records(path: Path) -> list[dict[str, Any]]:
    """The JSON objects of a service log (lines that are not JSON are skipped)."""
    out = []
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        try:
            obj = json.loads(line)
        except ValueError:
            continue
        if isinstance(obj, dict) and "ts" in obj:
            out.append(obj)
    return out


def retry_loops(records: Sequence[dict[str, Any]],
                lives: Sequence[tuple[float, float | None]]) -> list[RetryLoop]:
    """Database retry loops in a service log holding every process life in order.

    The service logs a loop's first failure, each change of error and a reminder every
    30 s ("database work failed; retrying", with ``worker`` and ``failing_for_s``), and its
    recovery ("database work succeeded again", with ``failed_for_s``). ``lives`` are the
    processes' (start, end), epoch seconds (end None: still running); a loop a process
    did not recover from ends with the process.
    """
    def life_of(ts: float) -> int:
        return max((k for k, (start, _) in enumerate(lives) if start <= ts), default=0)

    def life_end(life: int) -> dt.datetime | None:
        end = lives[life][1] if life < len(lives) else None
        return None if end is None else dt.datetime.fromtimestamp(end, dt.UTC)

    loops: list[RetryLoop] = []
    under_way: dict[tuple[int, str], RetryLoop] = {}
    for r in records:
        failed = "retry_in_s" in r
        recovered = r.get("msg") == "database work succeeded again"
        if not (failed or recovered):
            continue
        ts = dt.datetime.fromisoformat(str(r["ts"]))
        life = life_of(ts.timestamp())
        key = (life, str(r.get("worker", "")))
        loop = under_way.get(key)
        if loop is None:
            for_s = float(r.get("failing_for_s", r.get("failed_for_s", 0.0)) or 0.0)
            loop = under_way[key] = RetryLoop(
                worker=key[1], first=ts - dt.timedelta(seconds=for_s), last=ts, warnings=0,
                end=life_end(life))
            loops.append(loop)
        if recovered:
            loop.recovered = ts
            del under_way[key]
            continue
        loop.last = ts
        loop.warnings += 1
        err = str(r.get("error", ""))[:160]
        if err and err not in loop.errors and len(loop.errors) < 3:
            loop.errors.append(err)
    return loops


def longest_retry_in_health(samples: Sequence[HealthSample]) -> float:
    """The longest retry loop /healthz reported (``retrying[].for_s``), s; 0 without any."""
    return max((float(x.get("for_s") or 0.0) for smp in samples if isinstance(smp.body, dict)
                for x in smp.body.get("retrying") or () if isinstance(x, dict)), default=0.0)
