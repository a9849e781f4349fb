"""Notification rules: which alarm transitions are sent, and to which targets.

A rule is one ``[[notifications.rule]]`` table of the service file (docs/notifications.md).
Every condition it names must hold for a transition to match; a condition left out
matches everything. Several rules may match one transition: the webhook is called once
if any of them asks for it, and one e-mail goes to every recipient they name together.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from monitor.detection.alarms import KINDS, SEVERITIES, TRANSITIONS, severity_rank

#: Transitions a rule sends when it does not list its own: a new alarm, a worse one, and
#: its end (acknowledgements and de-escalations are news to the dashboard, not a pager).
DEFAULT_TRANSITIONS: tuple[str, ...] = ("raised", "escalated", "cleared")

# A pragmatic address check (one "@", no spaces, a dot in the domain): the SMTP server
# is the judge; this only catches a typing mistake when the service starts.
_ADDRESS = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")

_KEYS = ("machines", "groups", "kinds", "min_severity", "transitions", "webhook", "email_to")


class RuleError(ValueError):
    """A rule of the service file is bad; the message names the rule and the key."""


@dataclass(frozen=True)
class Rule:
    """One notification rule. Empty ``machines``/``groups``/``kinds`` match any; a
    transition of a machine matches when the machine is listed or its registry
    ``location`` is one of ``groups`` (either, when both are given)."""

    machines: tuple[str, ...] = ()
    groups: tuple[str, ...] = ()
    kinds: tuple[str, ...] = ()
    min_severity: str = "advisory"
    transitions: tuple[str, ...] = DEFAULT_TRANSITIONS
    webhook: bool = False
    email_to: tuple[str, ...] = ()

    def matches(self, event: Mapping[str, Any], location: str | None) -> bool:
        """Whether alarm event ``event`` (docs/schemas/alarm-event.json) of a machine at
        ``location`` (its registry location; None if unknown) is one this rule sends."""
        if self.machines or self.groups:
            by_machine = event.get("machine") in self.machines
            by_group = location is not None and location in self.groups
            if not (by_machine or by_group):
                return False
        if self.kinds and event.get("kind") not in self.kinds:
            return False
        if event.get("transition") not in self.transitions:
            return False
        try:
            return severity_rank(event.get("severity")) >= severity_rank(self.min_severity)
        except ValueError:
            return False


@dataclass(frozen=True)
class Targets:
    """Where one transition goes: the webhook or not, and the e-mail recipients."""

    webhook: bool
    email_to: tuple[str, ...]

    def __bool__(self) -> bool:
        return self.webhook or bool(self.email_to)


def targets_for(rules: Iterable[Rule], event: Mapping[str, Any], location: str | None) -> Targets:
    """The targets of every rule that matches ``event`` together (recipients in the
    order first named, each once)."""
    webhook = False
    to: dict[str, None] = {}
    for rule in rules:
        if rule.matches(event, location):
            webhook = webhook or rule.webhook
            to.update(dict.fromkeys(rule.email_to))
    return Targets(webhook, tuple(to))


def not_shelved(event: Mapping[str, Any]) -> bool:
    """The hook that keeps shelved alarms from being notified: True while ``event``'s
    alarm may be sent. The service builds each event with the alarm's shelving as it was at
    the transition's time (monitor/service/payloads.py; the one rule is
    monitor/store/shelving.py ``is_suppressed``), so a shelved alarm's event carries
    ``shelved`` true. Asked by :class:`monitor.notify.dispatch.Notifier` before any rule."""
    return not event.get("shelved", False)


def _strings(value: Any, where: str, key: str, allowed: tuple[str, ...] | None = None) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        raise RuleError(f"{where}: key '{key}' must be a list of non-empty strings, got {value!r}.")
    if allowed is not None:
        for v in value:
            if v not in allowed:
                raise RuleError(f"{where}: key '{key}' takes {', '.join(allowed)}; got {v!r}.")
    return tuple(value)


def parse_rule(table: Any, where: str) -> Rule:
    """One rule from its TOML table; RuleError names ``where`` and the key."""
    if not isinstance(table, dict):
        raise RuleError(f"{where}: a rule must be a table [[notifications.rule]], got {table!r}.")
    unknown = sorted(set(table) - set(_KEYS))
    if unknown:
        raise RuleError(f"{where}: unknown key '{unknown[0]}'; a rule takes {', '.join(_KEYS)}.")
    fields: dict[str, Any] = {}
    for key in ("machines", "groups"):
        if key in table:
            fields[key] = _strings(table[key], where, key)
    if "kinds" in table:
        fields["kinds"] = _strings(table["kinds"], where, "kinds", KINDS)
    if "transitions" in table:
        fields["transitions"] = _strings(table["transitions"], where, "transitions", TRANSITIONS)
    if "min_severity" in table:
        sev = table["min_severity"]
        if sev not in SEVERITIES:
            raise RuleError(f"{where}: key 'min_severity' takes {', '.join(SEVERITIES)}; got {sev!r}.")
        fields["min_severity"] = sev
    if "webhook" in table:
        if not isinstance(table["webhook"], bool):
            raise RuleError(f"{where}: key 'webhook' must be true or false, got {table['webhook']!r}.")
        fields["webhook"] = table["webhook"]
    if "email_to" in table:
        to = _strings(table["email_to"], where, "email_to")
        for address in to:
            if not _ADDRESS.match(address):
                raise RuleError(f"{where}: key 'email_to' holds {address!r}, not an e-mail address.")
        fields["email_to"] = to
    rule = Rule(**fields)
    if not rule.webhook and not rule.email_to:
        raise RuleError(f"{where}: the rule sends nowhere; set webhook = true or email_to = [...].")
    return rule


def parse_rules(tables: Any, where: str) -> tuple[Rule, ...]:
    """The rules of ``[[notifications.rule]]`` (a list of tables); RuleError names the
    file ``where`` and the rule by its position (1 = first)."""
    if not isinstance(tables, list):
        raise RuleError(f"{where}: 'notifications.rule' must be an array of tables [[notifications.rule]].")
    return tuple(parse_rule(t, f"{where}: notifications.rule #{i}") for i, t in enumerate(tables, 1))


#: The shape of the eligibility predicate the notifier asks (see :func:`not_shelved`).
Eligible = Callable[[Mapping[str, Any]], bool]
