"""Broker settings are written once: the settings registry (monitor/settings.py) holds the
defaults, MqttSettings and BrokerSettings take theirs from it, and every document that states
one (docs/mqtt.md, docs/configuration.md, deploy/whirlwatch.toml, deploy/mosquitto.conf)
states the same value. A drift here once left the docs promising a 7-day session while the
service asked for one day."""

from __future__ import annotations

import dataclasses
import re
import tomllib
from pathlib import Path

import pytest
from broker import read_mosquitto_conf

from monitor.io.mqtt_settings import MqttSettings
from monitor.settings import BY_NAME, BrokerSettings, broker_default

ROOT = Path(__file__).resolve().parent.parent
MQTT_DOC = (ROOT / "docs" / "mqtt.md").read_text(encoding="utf-8")
CONFIG_DOC = (ROOT / "docs" / "configuration.md").read_text(encoding="utf-8")
SERVICE_FILE = tomllib.loads((ROOT / "deploy" / "whirlwatch.toml").read_text(encoding="utf-8"))
BROKER_CONF = dict(read_mosquitto_conf(ROOT / "deploy" / "mosquitto.conf"))

SESSION_EXPIRY_S = broker_default("session_expiry_s")
RECEIVE_MAXIMUM = broker_default("receive_maximum")

# Units of Mosquitto's persistent_client_expiration (mosquitto.conf(5)): hour, day, week,
# month, year; a month and a year taken at their shortest (30 and 365 days).
_EXPIRATION_UNIT_S = {"h": 3600, "d": 86400, "w": 7 * 86400, "m": 30 * 86400, "y": 365 * 86400}


def stated(pattern: str, text: str, where: str) -> re.Match[str]:
    found = re.search(pattern, text)
    assert found, f"{where} no longer states {pattern!r}; say it again or change this test with it."
    return found


def expiration_s(value: str) -> int:
    """Seconds of a persistent_client_expiration value such as ``14d``."""
    found = re.fullmatch(r"(\d+)([hdwmy])", value)
    assert found, f"persistent_client_expiration {value!r} is not a number with h, d, w, m or y."
    return int(found.group(1)) * _EXPIRATION_UNIT_S[found.group(2)]


def test_transport_settings_take_their_defaults_from_the_registry() -> None:
    registry_key = {"prefix": "topic_prefix"}
    own = {"username", "password", "ca_file", "cert_file", "key_file", "client_id", "share_group",
           "reconnect_min_s"}  # None rather than "", or no setting of the service file
    for f in dataclasses.fields(MqttSettings):
        if f.name in own:
            continue
        assert f.default == broker_default(registry_key.get(f.name, f.name)), f.name
    for f in dataclasses.fields(BrokerSettings):
        assert f.default == BY_NAME[f"broker.{f.name}"].default, f.name


def test_session_expiry_is_seven_days_everywhere() -> None:
    assert SESSION_EXPIRY_S == 7 * 86400
    days = stated(r"session expiry interval \(default (\d+) days\)", MQTT_DOC, "docs/mqtt.md")
    assert int(days.group(1)) * 86400 == SESSION_EXPIRY_S
    both = stated(r"`broker\.session_expiry_s` \(default (\d+) s, (\d+) days\)", MQTT_DOC, "docs/mqtt.md")
    assert int(both.group(1)) == SESSION_EXPIRY_S == int(both.group(2)) * 86400
    row = stated(r"\| `broker\.session_expiry_s` \| int \| `(\d+)` \|", CONFIG_DOC, "docs/configuration.md")
    assert int(row.group(1)) == SESSION_EXPIRY_S
    assert SERVICE_FILE["broker"]["session_expiry_s"] == SESSION_EXPIRY_S


def test_receive_maximum_is_the_same_everywhere() -> None:
    window = stated(r"`receive_maximum` \(default (\d+)\)", MQTT_DOC, "docs/mqtt.md")
    assert int(window.group(1)) == RECEIVE_MAXIMUM
    row = stated(r"\| `broker\.receive_maximum` \| int \| `(\d+)` \|", CONFIG_DOC, "docs/configuration.md")
    assert int(row.group(1)) == RECEIVE_MAXIMUM
    assert SERVICE_FILE["broker"]["receive_maximum"] == RECEIVE_MAXIMUM


def test_broker_file_agrees_with_the_service_and_the_docs() -> None:
    # MQTT 3.1.1 clients get the broker's in-flight limit: never more than the service holds.
    inflight = stated(r"`max_inflight_messages`, (\d+) in `deploy/mosquitto\.conf`", MQTT_DOC, "docs/mqtt.md")
    assert int(BROKER_CONF["max_inflight_messages"]) == int(inflight.group(1)) <= RECEIVE_MAXIMUM
    # Mosquitto ends a session after the shorter of its own expiration and the client's.
    kept = stated(r"`persistent_client_expiration` when that is shorter \(`(\w+)` in `deploy/mosquitto\.conf`",
                  MQTT_DOC, "docs/mqtt.md")
    assert BROKER_CONF["persistent_client_expiration"] == kept.group(1)
    assert expiration_s(BROKER_CONF["persistent_client_expiration"]) >= SESSION_EXPIRY_S
    saves = stated(r"`autosave_on_changes (\w+)` with `autosave_interval (\d+)` in `deploy/mosquitto\.conf`",
                   MQTT_DOC, "docs/mqtt.md")
    assert BROKER_CONF["persistence"] == "true"
    assert (BROKER_CONF["autosave_on_changes"], BROKER_CONF["autosave_interval"]) == saves.groups()
    for limit in ("max_queued_messages", "max_queued_bytes"):
        doc = stated(rf"`{limit} (\d+)`", MQTT_DOC, "docs/mqtt.md")
        assert BROKER_CONF[limit] == doc.group(1), limit


@pytest.mark.parametrize(("value", "seconds"), [("14d", 14 * 86400), ("2w", 14 * 86400), ("36h", 36 * 3600)])
def test_expiration_units(value: str, seconds: int) -> None:
    # mosquitto.conf(5), persistent_client_expiration: "an integer followed by one of h d w m y"
    assert expiration_s(value) == seconds


def test_the_deploy_service_file_is_valid_and_its_defaults_are_the_registrys() -> None:
    from monitor.config import load_settings

    path = ROOT / "deploy" / "whirlwatch.toml"
    settings = load_settings(path, env={})  # every key known, every value within its bounds
    # A value the file says is the default is the registry's default.
    for line in path.read_text(encoding="utf-8").splitlines():
        section = re.match(r"^\[(\w+)\]", line)
        if section:
            table = section.group(1)
        key = re.match(r"^(\w+)\s*=.*#.*\bthe default\b", line)
        if key:
            name = f"{table}.{key.group(1)}"
            assert settings.get(name) == BY_NAME[name].default, name
