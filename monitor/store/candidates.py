"""Candidate modes: a passage of a run-up or coast-down that no stored mode claimed
(monitor/service/passages.py) waits for an engineer, who accepts it as a registry mode or
rejects it. Each write runs inside the caller's transaction (the caller commits).

Accepting goes through the registry's one mode write
(:func:`monitor.store.registry_sync.save_mode`: bounds checked, the change in the mode
history, the registry version moved on), so a running service follows the new mode at
its next batch; its ``source`` is :data:`monitor.modes.passage_tracker.PASSAGE_SOURCE`.
"""

from __future__ import annotations

from sqlalchemy.orm import Session

from monitor.model.registry import Mode
from monitor.modes.passage_tracker import PASSAGE_SOURCE
from monitor.store.models import Machine as MachineRow
from monitor.store.models import Mode as ModeRow
from monitor.store.models import PassageRow, utcnow
from monitor.store.registry_sync import save_mode


class CandidateDecided(ValueError):
    """The passage is no open candidate mode (matched a stored mode, or decided already)."""


def default_mode_name(p: PassageRow) -> str:
    """A name for the mode made from passage ``p``: point, kind and frequency."""
    return f"{p.point_id} {p.kind} {p.natural_frequency_hz:.2f} Hz"


def _open(p: PassageRow) -> None:
    if p.candidate != "open":
        what = "matched a stored mode" if p.candidate is None else f"was {p.candidate} already"
        raise CandidateDecided(f"Passage {p.id} is no open candidate mode: it {what}.")


def accept_candidate(session: Session, machine: MachineRow, p: PassageRow, name: str, user: str) -> ModeRow:
    """Make passage ``p`` a mode of ``machine`` named ``name`` (its natural frequency,
    amplification factor and damping ratio, dated the day its sweep ended) and mark the
    candidate accepted by ``user``. CandidateDecided when it is no open candidate;
    RegistryError (from the bounds) for a bad name."""
    _open(p)
    mode = save_mode(session, machine, Mode(
        name=name, frequency_hz=p.natural_frequency_hz, damping_ratio=p.damping_ratio,
        amplification_factor=p.amplification_factor, source=PASSAGE_SOURCE,
        date=p.ended_at.date()), user, None)
    p.candidate, p.decided_by, p.decided_at, p.accepted_mode = "accepted", user, utcnow(), mode.name
    session.flush()
    return mode


def reject_candidate(session: Session, p: PassageRow, user: str) -> None:
    """Mark candidate ``p`` rejected by ``user``. CandidateDecided when it is no open
    candidate."""
    _open(p)
    p.candidate, p.decided_by, p.decided_at = "rejected", user, utcnow()
    session.flush()
