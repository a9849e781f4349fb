"""Service settings: file, environment, errors naming the file and key, generated docs."""

from __future__ import annotations

import socket
from pathlib import Path

import pytest

from monitor.config import ConfigError, load_settings, render_docs
from monitor.io.mqtt_settings import MqttSettings
from monitor.settings import SETTINGS

DOCS = Path(__file__).resolve().parents[1] / "docs" / "configuration.md"


def test_defaults_without_a_file(tmp_path):
    s = load_settings(None, env={"WHIRLWATCH_SERVICE_DATA_DIR": str(tmp_path)})
    assert s.broker.topic_prefix == "whirlwatch"
    assert s.broker.protocol == "5"
    assert s.database.url == f"sqlite:///{tmp_path / 'whirlwatch.sqlite'}"


def test_file_then_environment_then_override(tmp_path):
    f = tmp_path / "service.toml"
    f.write_text(
        '[broker]\nurl = "mqtts://broker.example:8883"\npassword = "from-file"\nprotocol = "3.1.1"\n'
        'ca_file = "certs/ca.pem"\nreceive_maximum = 8\n[retention]\nraw_days = 7\n'
    )
    s = load_settings(f, env={"WHIRLWATCH_BROKER_PASSWORD": "from-env"})
    assert s.broker.password == "from-env"
    broker = MqttSettings.from_settings(s.broker).address
    assert (broker.tls, broker.host, broker.port) == (True, "broker.example", 8883)
    assert s.broker.ca_file == str(tmp_path / "certs" / "ca.pem")
    assert s.broker.receive_maximum == 8 and s.retention.raw_days == 7.0
    assert "from-env" not in repr(s.broker)
    s2 = load_settings(f, env={}, overrides={"broker.url": "mqtt://localhost:1884", "database.url": None})
    assert s2.broker.url == "mqtt://localhost:1884"


@pytest.mark.parametrize(
    "text, key",
    [
        ('[broker]\nurl = "http://x"\n', "broker.url"),
        ("[broker]\nreceive_maximum = 0\n", "broker.receive_maximum"),
        ('[broker]\nprotocol = "4"\n', "broker.protocol"),
        ("[broker]\nshared_group = \"a/b\"\n", "broker.shared_group"),
        ('[broker]\nurl_typo = "mqtt://x"\n', "broker.url_typo"),
        ('[retention]\nraw_days = "many"\n', "retention.raw_days"),
        ('[database]\nurl = "mysql://x"\n', "database.url"),
        ("[alarms]\npublish = 3\n", "alarms.publish"),
    ],
)
def test_bad_value_is_one_sentence_naming_file_and_key(tmp_path, text, key):
    f = tmp_path / "service.toml"
    f.write_text(text)
    with pytest.raises(ConfigError) as exc:
        load_settings(f, env={})
    msg = str(exc.value)
    assert str(f) in msg and f"'{key}'" in msg
    assert msg.endswith(".") and msg.count("\n") == 0


def test_bad_environment_value_names_the_variable():
    with pytest.raises(ConfigError, match="WHIRLWATCH_BROKER_KEEPALIVE_S.*'broker.keepalive_s'"):
        load_settings(None, env={"WHIRLWATCH_BROKER_KEEPALIVE_S": "soon"})


def test_unknown_table_and_bad_toml(tmp_path):
    f = tmp_path / "s.toml"
    f.write_text("[brokr]\nurl = 1\n")
    with pytest.raises(ConfigError, match=r"unknown table \[brokr\]"):
        load_settings(f, env={})
    f.write_text("[broker\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_settings(f, env={})


def test_every_setting_is_documented():
    text = DOCS.read_text(encoding="utf-8")
    for s in SETTINGS:
        assert f"`{s.name}`" in text and f"`{s.env}`" in text, s.name
    # the file is generated from the registry: regenerate with `python -m monitor.config`
    assert text == render_docs()


def test_transport_settings_of_the_service_file(tmp_path):
    f = tmp_path / "service.toml"
    f.write_text(
        '[broker]\nurl = "mqtt://broker.example"\nshared_group = "svc"\nusername = "ww"\n'
        "reconnect_max_s = 0.5\n"
    )
    s = load_settings(f, env={})
    t = MqttSettings.from_settings(s.broker)
    # The client id keys the session the broker keeps (OASIS MQTT 5.0, 3.1.3.1): stable per
    # host (Python's socket.gethostname) and shared-subscription group.
    assert t.client_id == f"whirlwatch-{socket.gethostname()}-svc"
    assert (t.share_group, t.username, t.password, t.ca_file) == ("svc", "ww", None, None)
    # $share/{ShareName}/{filter} (OASIS MQTT 5.0, 4.8.2)
    assert t.subscriptions() == ("$share/svc/whirlwatch/+/+/waveform", "$share/svc/whirlwatch/+/speed")
    # the back-off starts at 1 s and never ends below it (common practice: min <= max)
    assert (t.reconnect_min_s, t.reconnect_max_s) == (1.0, 1.0)
    assert MqttSettings.from_settings(s.broker, client_id="given").client_id == "given"
    s2 = load_settings(f, env={"WHIRLWATCH_BROKER_CLIENT_ID": "from-env"})
    assert MqttSettings.from_settings(s2.broker).client_id == "from-env"


def test_broker_names_follow_the_transport_rules(tmp_path):
    # What the service file accepts, the transport accepts (one rule, monitor/io/mqtt_names.py):
    # a topic prefix with an empty level (OASIS MQTT 5.0, 4.7.1: levels are separated by '/')
    # or a broker URL with a path (RFC 3986 path component) is refused at load.
    f = tmp_path / "service.toml"
    for text, key in (('[broker]\ntopic_prefix = "a//b"\n', "broker.topic_prefix"),
                      ('[broker]\nurl = "mqtt://h:1883/topic"\n', "broker.url")):
        f.write_text(text)
        with pytest.raises(ConfigError, match=f"'{key}'"):
            load_settings(f, env={})
