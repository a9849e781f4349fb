"""The alarm engine: one state machine per (machine, point, kind, subject).

Each evaluation hands the engine, per alarm key, two severities computed by the detectors:

- ``raise_level``: the highest severity whose (strict) raise condition holds now, or None;
- ``hold_level``: the highest severity whose relaxed, hysteresis condition holds now
  (always >= ``raise_level``), or None when even the relaxed condition fails.

Lifecycle (every arrow is a :class:`Transition` carrying time, severity and evidence)::

    (none) --raise_level for N readings--> active --ack(user, comment)--> acknowledged
    active/acknowledged --raise_level above severity for N readings--> escalated (needs a new ack)
    active/acknowledged --hold_level below severity for N readings--> de-escalated to the
                         worst hold_level of those N readings, or cleared when that is None
    cleared --raise_level for N readings--> raised again (a new alarm id)

N is the persistence count. Raise and clear use different levels (hysteresis), so a value
hovering on a limit with noise raises once and does not chatter. Going down is judged by
the worst level of the last N readings, whatever their order: readings that alternate
between two lower levels (none and advisory, say) bring an alert down to the worse of the
two, so an alarm never stays above every level its last N readings support. Acknowledging
never clears. The engine is deterministic: no clock, ids from a counter; ``snapshot()`` gives a
JSON-able dict (exact: non-finite floats as tagged strings, :mod:`monitor.detection.state_json`) and
``AlarmEngine.restore`` rebuilds the same state after a restart.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from monitor.detection.state_json import float_in, float_out, number_in, value_in, value_out
from monitor.model.timefmt import iso_utc

#: Severities, lowest first. ``alert`` is ISO 20816's ALERT; ``advisory`` and ``severe``
#: are our own words for the levels below and above it (docs/alarms.md).
Severity = Literal["advisory", "alert", "severe"]
SEVERITIES: tuple[Severity, ...] = ("advisory", "alert", "severe")
#: What an alarm watches. ``processing_fault`` is the service's own: a stream whose
#: readings cannot be processed.
AlarmKind = Literal["resonance_proximity", "amplitude_growth", "mode_shift", "sensor_fault",
                    "processing_fault"]
KINDS: tuple[AlarmKind, ...] = ("resonance_proximity", "amplitude_growth", "mode_shift", "sensor_fault",
                                "processing_fault")
#: The steps of an alarm's lifecycle (see the module docstring).
TransitionName = Literal["raised", "escalated", "de-escalated", "acknowledged", "cleared"]
TRANSITIONS: tuple[TransitionName, ...] = ("raised", "escalated", "de-escalated", "acknowledged", "cleared")
State = Literal["active", "acknowledged", "cleared"]
#: The severity of each rank (:func:`severity_rank`'s inverse): None for rank 0.
LEVELS: tuple[Severity | None, ...] = (None, *SEVERITIES)


def severity_rank(severity: str | None) -> int:
    """0 for None, 1 advisory, 2 alert, 3 severe."""
    try:
        return _RANK[severity]
    except (KeyError, TypeError):
        raise ValueError(f"severity must be one of {SEVERITIES} or None, got {severity!r}.") from None


_RANK: dict[str | None, int] = {level: rank for rank, level in enumerate(LEVELS)}


@dataclass(frozen=True)
class AlarmKey:
    """Identity of an alarm stream; ``point`` is None for machine-level alarms."""

    machine: str
    point: str | None
    kind: AlarmKind
    subject: str

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}.")
        # Keys are looked up several times per reading; hash the four fields once.
        object.__setattr__(self, "_hash", hash((self.machine, self.point, self.kind, self.subject)))

    def __hash__(self) -> int:
        return self._hash  # type: ignore[attr-defined]

    def text(self) -> str:
        return f"{self.machine}/{self.point or '-'}/{self.kind}/{self.subject}"


@dataclass
class Alarm:
    """Current state of one alarm (one raise until its clear)."""

    id: str
    key: AlarmKey
    severity: Severity
    state: State
    raised_at: float
    cleared_at: float | None = None
    acknowledged_by: str | None = None
    acknowledged_at: float | None = None
    ack_comment: str | None = None
    evidence: dict[str, Any] = field(default_factory=dict)
    # (evidence, its exact JSON data): the engine replaces an alarm's evidence and never
    # changes it in place, so the walk over it is done once per evidence, not per snapshot.
    _evidence_out: tuple[Any, Any] | None = field(default=None, repr=False, compare=False)

    def to_json(self) -> dict:
        """The alarm as the REST API gives it (docs/api.md; docs/alarms.md, "Transition and
        alarm JSON")."""
        return {
            "id": self.id,
            "machine": self.key.machine,
            "point": self.key.point,
            "kind": self.key.kind,
            "subject": self.key.subject,
            "severity": self.severity,
            "state": self.state,
            "raised_at": iso_utc(self.raised_at),
            "cleared_at": iso_utc(self.cleared_at),
            "acknowledged_by": self.acknowledged_by,
            "acknowledged_at": iso_utc(self.acknowledged_at),
            "ack_comment": self.ack_comment,
            "evidence": self.evidence,
        }

    def snapshot(self) -> dict:
        """Exact JSON data (:mod:`monitor.detection.state_json`): times and evidence with their
        non-finite floats tagged, evidence strings escaped."""
        cached = self._evidence_out
        if cached is None or cached[0] is not self.evidence:
            cached = self._evidence_out = (self.evidence, value_out(self.evidence))
        return {
            "id": self.id, "key": [self.key.machine, self.key.point, self.key.kind, self.key.subject],
            "severity": self.severity, "state": self.state, "raised_at": float_out(self.raised_at),
            "cleared_at": float_out(self.cleared_at), "acknowledged_by": self.acknowledged_by,
            "acknowledged_at": float_out(self.acknowledged_at), "ack_comment": self.ack_comment,
            "evidence": cached[1],
        }

    @classmethod
    def restore(cls, d: dict) -> Alarm:
        m, p, k, s = d["key"]
        stored = d.get("evidence") or {}
        evidence = value_in(dict(stored))
        return cls(
            id=d["id"], key=AlarmKey(m, p, k, s), severity=d["severity"], state=d["state"],
            raised_at=number_in(d["raised_at"], "raised_at"), cleared_at=float_in(d.get("cleared_at")),
            acknowledged_by=d.get("acknowledged_by"), acknowledged_at=float_in(d.get("acknowledged_at")),
            ack_comment=d.get("ack_comment"), evidence=evidence, _evidence_out=(evidence, stored),
        )


@dataclass(frozen=True)
class Transition:
    """One step of an alarm's lifecycle.

    ``name`` is one of :data:`TRANSITIONS`; ``ts`` epoch seconds UTC; ``severity`` after the
    step and ``previous_severity`` before it; ``alarm`` the alarm's state after the step;
    ``evidence`` what the detectors saw (feature values, margins, reading id ...).
    """

    name: TransitionName
    ts: float
    severity: Severity
    previous_severity: Severity | None
    alarm: dict[str, Any]
    evidence: dict[str, Any]
    reading_id: str | None = None
    user: str | None = None
    comment: str | None = None

    @property
    def alarm_id(self) -> str:
        return self.alarm["id"]

    @property
    def kind(self) -> str:
        return self.alarm["kind"]

    def to_json(self) -> dict:
        """The alarm's JSON (REST shape, current state) plus the ``transition`` (the MQTT
        alarm event, docs/mqtt.md, "Alarm events")."""
        out = dict(self.alarm)
        out["transition"] = {
            "name": self.name,
            "ts": iso_utc(self.ts),
            "severity": self.severity,
            "previous_severity": self.previous_severity,
            "reading_id": self.reading_id,
            "user": self.user,
            "comment": self.comment,
            "evidence": self.evidence,
        }
        return out


@dataclass(slots=True)
class _Stream:
    """Per-key counters: consecutive readings for a raise (``raise_count``) or an
    escalation (``up_count``); readings in a row whose hold level lies below the live
    alarm's severity (``down_count``) and the worst hold rank among them (``down_level``,
    0 when none of them held any level), which decide a de-escalation or a clear."""

    seq: int = 0
    alarm: Alarm | None = None
    raise_count: int = 0
    up_count: int = 0
    down_count: int = 0
    down_level: int = 0
    last_ts: float | None = None


class AlarmEngine:
    """Alarm state machines keyed by :class:`AlarmKey`.

    Parameters
    ----------
    persistence : int
        Readings a condition must hold before a raise, escalation, de-escalation or
        clear (N >= 1): N in a row for a raise or an escalation; N in a row below the
        alarm's severity for going down, to the worst level among them (module docstring).
    """

    def __init__(self, persistence: int = 3) -> None:
        if not isinstance(persistence, int) or isinstance(persistence, bool) or persistence < 1:
            raise ValueError(f"persistence must be an integer >= 1 reading, got {persistence!r}.")
        self.persistence = persistence
        self._streams: dict[AlarmKey, _Stream] = {}

    # ------------------------------------------------------------------ queries

    def alarm(self, key: AlarmKey) -> Alarm | None:
        """The current alarm of ``key`` (also after its clear, until the next raise)."""
        s = self._streams.get(key)
        return s.alarm if s else None

    def active(self) -> list[Alarm]:
        """Alarms not cleared, in key order."""
        return [s.alarm for k, s in sorted(self._streams.items(), key=lambda kv: kv[0].text())
                if s.alarm is not None and s.alarm.state != "cleared"]

    def find(self, alarm_id: str) -> Alarm | None:
        for s in self._streams.values():
            if s.alarm is not None and s.alarm.id == alarm_id:
                return s.alarm
        return None

    def alarm_keys(self) -> list[AlarmKey]:
        return list(self._streams)

    # ------------------------------------------------------------------ updates

    def update(
        self,
        key: AlarmKey,
        ts: float,
        raise_level: str | None,
        hold_level: str | None,
        evidence: dict[str, Any] | Callable[[], dict[str, Any]] | None = None,
        reading_id: str | None = None,
        persistence: int | None = None,
    ) -> list[Transition]:
        """Feed one evaluation of ``key``; returns the transitions it caused (often none).

        ``hold_level`` below ``raise_level`` is raised to it (the relaxed condition always
        holds when the strict one does). ``persistence`` overrides the engine's count for
        this key (1 for events that need no confirmation, e.g. a stale stream).
        ``evidence`` may be a function returning the dict; it is called only when a
        transition happens (building evidence for every reading is wasted work).
        """
        r = _RANK.get(raise_level, -1)
        h = _RANK.get(hold_level, -1)
        if r < 0 or h < 0:
            severity_rank(raise_level)  # raises the error naming the bad value
            severity_rank(hold_level)
        return self.update_ranked(key, ts, r, h, evidence, reading_id, persistence)

    def update_ranked(
        self,
        key: AlarmKey,
        ts: float,
        r: int,
        h: int,
        evidence: dict[str, Any] | Callable[[], dict[str, Any]] | None = None,
        reading_id: str | None = None,
        persistence: int | None = None,
    ) -> list[Transition]:
        """:meth:`update` with the levels given by rank (:func:`severity_rank`: 0 none,
        1 advisory, 2 alert, 3 severe), for callers that decide in ranks; ``r`` and ``h``
        must be such ranks (not checked here)."""
        s = self._streams.get(key)
        # Nothing holds: for a key with no live alarm and nothing counted this changes only
        # the time seen, the common case on every reading.
        if (r == 0 and h == 0 and s is not None and s.raise_count == 0
                and (s.alarm is None or s.alarm.state == "cleared")):
            s.last_ts = ts
            return []
        if r > h:
            h = r
        if s is not None:
            a = s.alarm
            if a is not None and a.state != "cleared" and r <= _RANK[a.severity] <= h:
                # A live alarm whose own level still holds (or a higher level's relaxed
                # condition) and nothing worse is raised: every counter restarts and no
                # transition can follow (the steady case).
                s.up_count = s.down_count = s.down_level = 0
                s.last_ts = ts
                return []
        else:
            s = self._streams[key] = _Stream()
        n = self.persistence if persistence is None else int(persistence)
        s.last_ts = ts
        a = s.alarm
        out: list[Transition] = []

        def ev() -> dict[str, Any]:
            return dict((evidence() if callable(evidence) else evidence) or {})
        if a is None or a.state == "cleared":
            s.raise_count = s.raise_count + 1 if r > 0 else 0
            if r > 0 and s.raise_count >= n:
                s.seq += 1
                s.alarm = Alarm(
                    id=f"{key.text()}#{s.seq}", key=key, severity=SEVERITIES[r - 1], state="active",
                    raised_at=ts, evidence=ev(),
                )
                self._reset(s)
                out.append(self._transition(s.alarm, "raised", ts, None, s.alarm.evidence, reading_id))
            return out
        cur = severity_rank(a.severity)
        # Escalation: the strict condition of a higher level holds for N readings.
        s.up_count = s.up_count + 1 if r > cur else 0
        # Going down: N readings in a row whose relaxed condition is below the alarm's
        # level, to the worst level they held (none of them holding any: a clear).
        if h < cur:
            s.down_level = h if s.down_count == 0 else max(s.down_level, h)
            s.down_count += 1
        else:
            s.down_count = s.down_level = 0
        if s.up_count >= n:
            prev = a.severity
            a.severity = SEVERITIES[r - 1]
            a.evidence = ev()
            if a.state == "acknowledged":
                # A worse condition needs a person to see it again.
                a.state = "active"
                a.acknowledged_by = a.acknowledged_at = a.ack_comment = None
            self._reset(s)
            out.append(self._transition(a, "escalated", ts, prev, a.evidence, reading_id))
        elif s.down_count >= n and s.down_level == 0:
            out.append(self._clear(s, a, ts, ev, reading_id))
        elif s.down_count >= n:
            prev = a.severity
            a.severity = SEVERITIES[s.down_level - 1]
            a.evidence = ev()
            self._reset(s)
            out.append(self._transition(a, "de-escalated", ts, prev, a.evidence, reading_id))
        return out

    def end(self, key: AlarmKey, ts: float, evidence: dict[str, Any]) -> list[Transition]:
        """End ``key`` for good (what it watches left the registry): its live alarm is
        cleared at once at ``ts`` (epoch s) with ``evidence`` saying why, and whatever was
        counted towards a raise, escalation or clear is dropped, so a key that comes back
        (a mode of the same name added again) starts afresh. Returns the ``cleared``
        transition, or nothing when no alarm of ``key`` was live."""
        s = self._streams.get(key)
        if s is None:
            return []
        a = s.alarm
        if a is None or a.state == "cleared":
            self._reset(s)
            s.raise_count = 0
            return []
        return [self._clear(s, a, ts, lambda: dict(evidence), None)]

    def _clear(self, s: _Stream, a: Alarm, ts: float, evidence: Callable[[], dict[str, Any]],
               reading_id: str | None) -> Transition:
        """Clear the live alarm ``a`` of stream ``s`` at ``ts``; counters restart."""
        prev = a.severity
        a.state = "cleared"
        a.cleared_at = ts
        self._reset(s)
        s.raise_count = 0
        return self._transition(a, "cleared", ts, prev, evidence(), reading_id)

    def acknowledge(self, alarm_id: str, user: str, comment: str, ts: float) -> Transition:
        """Acknowledge an active alarm by a named ``user`` with a ``comment``; does not clear."""
        if not isinstance(user, str) or not user.strip():
            raise ValueError(f"user must name the person acknowledging, got {user!r}.")
        if not isinstance(comment, str):
            raise ValueError(f"comment must be a string, got {comment!r}.")
        a = self.find(alarm_id)
        if a is None:
            prefix, _, seq = alarm_id.rpartition("#")
            for k, st in self._streams.items():
                if k.text() == prefix and seq.isdigit() and 0 < int(seq) < st.seq:
                    raise ValueError(f"alarm {alarm_id!r} is already cleared and cannot be acknowledged.")
            raise KeyError(f"no alarm {alarm_id!r}")
        if a.state == "cleared":
            raise ValueError(f"alarm {alarm_id!r} is already cleared and cannot be acknowledged.")
        a.state = "acknowledged"
        a.acknowledged_by = user.strip()
        a.acknowledged_at = ts
        a.ack_comment = comment
        return self._transition(a, "acknowledged", ts, a.severity, {}, None, user=a.acknowledged_by,
                                comment=comment)

    @staticmethod
    def _reset(s: _Stream) -> None:
        s.up_count = s.down_count = s.down_level = 0

    @staticmethod
    def _transition(a: Alarm, name: TransitionName, ts: float, prev: Severity | None, ev: dict,
                    reading_id: str | None, user: str | None = None, comment: str | None = None
                    ) -> Transition:
        return Transition(name=name, ts=ts, severity=a.severity, previous_severity=prev,
                          alarm=a.to_json(), evidence=ev, reading_id=reading_id, user=user,
                          comment=comment)

    # ------------------------------------------------------------------ persistence

    def snapshot(self) -> dict:
        """JSON-able state: counters and alarms of every key (exact, see :meth:`Alarm.snapshot`)."""
        return {
            "persistence": self.persistence,
            "streams": [
                {
                    "key": [k.machine, k.point, k.kind, k.subject], "seq": s.seq,
                    "alarm": s.alarm.snapshot() if s.alarm else None,
                    "raise_count": s.raise_count, "up_count": s.up_count,
                    "down_count": s.down_count, "down_level": s.down_level,
                    "last_ts": float_out(s.last_ts),
                }
                for k, s in self._streams.items()
            ],
        }

    @classmethod
    def restore(cls, data: dict) -> AlarmEngine:
        """Rebuild from :meth:`snapshot`. A snapshot written before going down was judged
        by the worst level (it counted readings holding nothing apart, in
        ``clear_count``) is read as the same count of readings holding nothing."""
        e = cls(int(data["persistence"]))
        for d in data.get("streams", []):
            m, p, k, subj = d["key"]
            down_count, down_level = d["down_count"], d["down_level"]
            if d.get("clear_count"):  # the older counters: a run of readings holding nothing
                down_count, down_level = d["clear_count"], 0
            e._streams[AlarmKey(m, p, k, subj)] = _Stream(
                seq=d["seq"], alarm=Alarm.restore(d["alarm"]) if d.get("alarm") else None,
                raise_count=d["raise_count"], up_count=d["up_count"], down_count=down_count,
                down_level=down_level, last_ts=float_in(d.get("last_ts")),
            )
        return e


def levels_above(value: float, thresholds: Mapping[str, float], hysteresis: float
                 ) -> tuple[Severity | None, Severity | None]:
    """``(raise_level, hold_level)`` for a feature where higher is worse.

    ``thresholds`` maps severity -> raise limit; a level holds (hysteresis) while the value
    stays above ``limit * (1 - hysteresis)``. :func:`level_ranks_above` in severities.
    """
    if not 0.0 <= hysteresis < 1.0:
        raise ValueError(f"hysteresis must lie in [0, 1), got {hysteresis!r}.")
    limits = [(rank, thresholds[sev]) for rank, sev in enumerate(SEVERITIES, 1)
              if thresholds.get(sev) is not None]
    raise_rank, hold_rank = level_ranks_above(value, limits, hysteresis)
    return LEVELS[raise_rank], LEVELS[hold_rank]


def level_ranks_above(value: float, limits: Iterable[tuple[int, float]], hysteresis: float
                      ) -> tuple[int, int]:
    """``(raise rank, hold rank)`` (:func:`severity_rank`: 0 none, 1 advisory, 2 alert,
    3 severe) of a value where higher is worse.

    ``limits`` holds ``(rank, raise limit)`` pairs in the value's unit: a rank is raised
    at or above its limit and holds (hysteresis, a fraction in [0, 1), unchecked here)
    while the value stays at or above ``limit * (1 - hysteresis)``; the highest rank of
    each wins.
    """
    raise_rank = hold_rank = 0
    hold = 1.0 - hysteresis
    for rank, limit in limits:
        if value >= limit and rank > raise_rank:
            raise_rank = rank
        if value >= limit * hold and rank > hold_rank:
            hold_rank = rank
    return raise_rank, hold_rank
