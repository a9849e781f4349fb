"""The published JSON Schemas (docs/schemas/: alarm, alarm event, status) as checks.

:func:`problems` lists what is wrong with a document against one schema (JSON Schema draft
2020-12, formats such as ``date-time`` checked: RFC 3339 section 5.6); the ``check_*``
functions fail the test with those problems. :class:`service_helpers.Recorder` checks every
alarm event and status message it receives; the API tests check the REST alarms.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path
from typing import Any

from jsonschema import Draft202012Validator
from referencing import Registry, Resource

SCHEMAS = Path(__file__).resolve().parent.parent / "docs" / "schemas"
NAMES = ("alarm.json", "alarm-event.json", "status.json")


def schema(name: str) -> dict[str, Any]:
    return json.loads((SCHEMAS / name).read_text(encoding="utf-8"))


@cache
def validator(name: str) -> Draft202012Validator:
    resources = [(schema(n)["$id"], Resource.from_contents(schema(n))) for n in NAMES]
    return Draft202012Validator(schema(name), registry=Registry().with_resources(resources),
                                format_checker=Draft202012Validator.FORMAT_CHECKER)


def problems(name: str, document: Any) -> list[str]:
    return [f"{'/'.join(map(str, e.absolute_path)) or '(top)'}: {e.message}"
            for e in validator(name).iter_errors(document)]


def _check(name: str, document: Any) -> None:
    found = problems(name, document)
    assert not found, f"not a document of docs/schemas/{name}: {found[:5]} in {json.dumps(document)[:400]}"


def check_alarm(document: Any) -> None:
    _check("alarm.json", document)


def check_alarm_event(document: Any) -> None:
    _check("alarm-event.json", document)


def check_status(document: Any) -> None:
    _check("status.json", document)


def check_message(topic: str, payload: bytes) -> None:
    """An outbound MQTT message of the service against its schema (docs/mqtt.md): an alarm
    event, or a retained status (an empty one removes the status: nothing to check)."""
    if topic.endswith("/alarms"):
        check_alarm_event(json.loads(payload))
    elif topic.endswith("/status") and payload:
        check_status(json.loads(payload))
