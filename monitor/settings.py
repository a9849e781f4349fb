"""The settings of the service and the dashboard: one registry of every setting, and the
typed groups it fills.

A setting is named ``section.key`` (``broker.url``): in the TOML service file it is key
``key`` of table ``[section]``; its environment variable is ``WHIRLWATCH_SECTION_KEY``
(``WHIRLWATCH_BROKER_PASSWORD``). :data:`SETTINGS` gives each one's kind, default, bounds
and help text; the typed groups (:class:`BrokerSettings`, ...) take their defaults from it,
and so does the transport (:class:`monitor.io.mqtt_settings.MqttSettings`), so a default is
written once. Reading the file and the environment, and rendering the help and
docs/configuration.md from this registry, is :mod:`monitor.config`.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor.io.mqtt_names import MqttConfigError, is_topic_level, is_topic_prefix, parse_broker_url
from monitor.model.timefmt import time_zone

if TYPE_CHECKING:
    from monitor.notify.rules import Rule

ENV_PREFIX = "WHIRLWATCH_"


@dataclass(frozen=True)
class Setting:
    """One setting: ``name`` (``section.key``), ``kind`` (str, int, float, bool, path),
    default, help text; ``choices`` or bounds restrict it; ``secret`` hides its value when
    shown; ``check`` returns an error text (what was expected) or None."""

    name: str
    kind: str
    default: Any
    help: str
    secret: bool = False
    choices: tuple[Any, ...] | None = None
    minimum: float | None = None
    maximum: float | None = None
    check: Callable[[Any], str | None] | None = None

    @property
    def section(self) -> str:
        return self.name.split(".", 1)[0]

    @property
    def key(self) -> str:
        return self.name.split(".", 1)[1]

    @property
    def env(self) -> str:
        return ENV_PREFIX + self.name.upper().replace(".", "_")

    def expected(self) -> str:
        """What a valid value looks like, as a phrase."""
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        base = {
            "str": "a string",
            "int": "an integer",
            "float": "a number",
            "bool": "true or false",
            "path": "a file or directory path",
        }[self.kind]
        if self.minimum is not None and self.maximum is not None:
            return f"{base} from {self.minimum:g} to {self.maximum:g}"
        if self.minimum is not None:
            return f"{base} of at least {self.minimum:g}"
        return base


def _mqtt_url(v: str) -> str | None:
    try:
        parse_broker_url(v)
    except MqttConfigError:
        return "an mqtt://host[:port] or mqtts://host[:port] URL"
    return None


def _db_url(v: str) -> str | None:
    if v == "":
        return None
    if not v.startswith(("sqlite:", "postgresql:", "postgresql+psycopg:", "postgres:")):
        return (
            "a sqlite:///FILE or postgresql+psycopg://USER@HOST/DB URL (or empty for the default)"
        )
    return None


def _topic_part(v: str) -> str | None:
    if not is_topic_prefix(v):
        return "a non-empty MQTT topic without '+', '#' or a leading/trailing '/'"
    return None


def _group(v: str) -> str | None:
    if v and not is_topic_level(v):
        return "a shared-subscription group name without '/', '+' or '#' (or empty for none)"
    return None


def _log_level(v: str) -> str | None:
    return (
        None
        if v.upper() in ("DEBUG", "INFO", "WARNING", "ERROR")
        else "one of DEBUG, INFO, WARNING, ERROR"
    )


def _address(v: str) -> str | None:
    if v == "":
        return None
    host, _, port = v.rpartition(":")
    if not host or not port.isdigit() or not 0 < int(port) < 65536:
        return "HOST:PORT (or empty to turn it off)"
    return None


def _http_url(v: str) -> str | None:
    if v == "" or v.startswith(("http://", "https://")) and len(v.split("://", 1)[1]) > 0:
        return None
    return "an http:// or https:// URL (or empty for none)"


def _time_zone(v: str) -> str | None:
    try:
        time_zone(v)
    except ValueError:
        return "an IANA time zone name such as 'UTC' or 'Europe/Berlin'"
    return None


def _default_data_dir() -> str:
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return str(Path(base) / "whirlwatch")


SETTINGS: tuple[Setting, ...] = (
    # broker
    Setting(
        "broker.url",
        "str",
        "mqtt://127.0.0.1:1883",
        "MQTT broker, mqtt://host:port or mqtts://host:port (TLS).",
        check=_mqtt_url,
    ),
    Setting("broker.username", "str", "", "MQTT user name; empty for an anonymous connection."),
    Setting(
        "broker.password", "str", "", "MQTT password; prefer the environment variable.", secret=True
    ),
    Setting(
        "broker.ca_file",
        "path",
        "",
        "CA certificate file (PEM) to verify the broker; empty uses the system store.",
    ),
    Setting(
        "broker.cert_file",
        "path",
        "",
        "Client certificate file (PEM) for mutual TLS; empty for none.",
    ),
    Setting(
        "broker.key_file", "path", "", "Client private key file (PEM) for mutual TLS.", secret=False
    ),
    Setting(
        "broker.topic_prefix",
        "str",
        "whirlwatch",
        "First level(s) of every topic: {prefix}/{machine}/{point}/waveform.",
        check=_topic_part,
    ),
    Setting(
        "broker.shared_group",
        "str",
        "",
        "Shared-subscription group ($share/{group}/...) so several service processes split the stream (MQTT 5); empty subscribes alone.",
        check=_group,
    ),
    Setting(
        "broker.client_id",
        "str",
        "",
        "MQTT client id; it keys the persistent session, so keep it stable per process; empty derives one from host name and group.",
    ),
    Setting("broker.protocol", "str", "5", "MQTT protocol version.", choices=("5", "3.1.1")),
    Setting(
        "broker.receive_maximum",
        "int",
        # A batch of the service (monitor.service.service.MAX_BATCH, 32) fills it; 16 drained a
        # backlog about 10 % slower, 64 no faster (docs/mqtt.md, "Back-pressure").
        32,
        "Most received, unacknowledged messages the service holds at once (the back-pressure window; MQTT 5 Receive Maximum).",
        minimum=1,
        maximum=65535,
    ),
    Setting(
        "broker.session_expiry_s",
        "int",
        7 * 86400,
        "How long the broker keeps the session and queued messages while the service is away, s (MQTT 5; the broker may cut it, docs/mqtt.md).",
        minimum=0,
        maximum=4294967295,
    ),
    Setting(
        "broker.keepalive_s", "int", 30, "MQTT keep-alive interval, s.", minimum=5, maximum=65535
    ),
    Setting(
        "broker.reconnect_max_s",
        "float",
        30.0,
        "Longest wait between reconnect attempts (exponential back-off up to this), s.",
        minimum=0.1,
    ),
    # database
    Setting(
        "database.url",
        "str",
        "",
        "SQLAlchemy URL of the store; empty means SQLite file whirlwatch.sqlite in service.data_dir.",
        secret=True,
        check=_db_url,
    ),
    Setting(
        "database.busy_timeout_ms",
        "int",
        10000,
        "SQLite: how long a writer waits for a lock, ms.",
        minimum=0,
    ),
    # retention
    Setting(
        "retention.enabled",
        "bool",
        True,
        "Thin old data periodically (alarm history is never deleted).",
    ),
    Setting(
        "retention.raw_days",
        "float",
        30.0,
        "Keep every measurement and speed reading this many days.",
        minimum=0.01,
    ),
    Setting(
        "retention.hourly_days",
        "float",
        365.0,
        "Then keep one per point per hour up to this age (days); older: one per day.",
        minimum=0.01,
    ),
    Setting(
        "retention.spectra_raw_days",
        "float",
        30.0,
        "Keep every cadence spectrum this many days, then one per point per day; evidence spectra are kept forever.",
        minimum=0.01,
    ),
    Setting(
        "retention.dead_letter_days",
        "float",
        30.0,
        "Delete dead letters (rejected messages) older than this, days.",
        minimum=0.01,
    ),
    Setting(
        "retention.interval_s", "float", 3600.0, "How often the service thins, s.", minimum=1.0
    ),
    # spectra
    Setting(
        "spectra.snapshot_interval_s",
        "float",
        600.0,
        "Keep one spectrum per point at least this often, s; 0 keeps only alarm evidence.",
        minimum=0.0,
    ),
    Setting(
        "spectra.waveform_interval_s",
        "float",
        3600.0,
        "Keep one raw time waveform per point at least this often, s (besides those of alarm"
        " transitions, always kept); 0 keeps only those.",
        minimum=0.0,
    ),
    # alarms
    Setting(
        "alarms.publish",
        "bool",
        True,
        "Publish every alarm transition on {prefix}/{machine}/alarms (QoS 1).",
    ),
    Setting(
        "alarms.publish_status",
        "bool",
        True,
        "Publish the retained machine status on {prefix}/{machine}/status.",
    ),
    # notifications (docs/notifications.md; the rules are [[notifications.rule]] tables)
    Setting("notifications.dashboard_url", "str", "",
            "Base URL of the dashboard as the receivers reach it (https://cm.example.com); e-mails link to {dashboard_url}/alarms/{id}.",
            check=_http_url),
    Setting("notifications.webhook_url", "str", "",
            "URL the rules with webhook = true POST each alarm event to; empty turns the webhook off.",
            check=_http_url),
    Setting("notifications.webhook_secret", "str", "",
            "Key of the HMAC-SHA256 signature of each webhook body (header X-Whirlwatch-Signature); keep it in the environment.",
            secret=True),
    Setting("notifications.smtp_host", "str", "", "SMTP server for e-mail; empty turns e-mail off."),
    Setting("notifications.smtp_port", "int", 587, "SMTP submission port (STARTTLS is always used).",
            minimum=1, maximum=65535),
    Setting("notifications.smtp_username", "str", "", "SMTP login name; empty sends without login."),
    Setting("notifications.smtp_password", "str", "", "SMTP login password; keep it in the environment.",
            secret=True),
    Setting("notifications.smtp_from", "str", "", "Sender address of the e-mails."),
    Setting("notifications.smtp_ca_file", "path", "",
            "CA certificate file (PEM) to verify the SMTP server; empty uses the system store."),
    Setting("notifications.queue_size", "int", 1000,
            "Most transitions waiting per target; more are dropped, counted and logged.",
            minimum=1, maximum=1000000),
    Setting("notifications.max_attempts", "int", 5, "Most delivery attempts per transition and target.",
            minimum=1, maximum=100),
    Setting("notifications.backoff_s", "float", 2.0,
            "Wait before the second attempt, s; each further wait doubles (exponential back-off).",
            minimum=0.0),
    Setting("notifications.backoff_max_s", "float", 300.0, "Longest wait between two attempts, s.",
            minimum=0.0),
    Setting("notifications.timeout_s", "float", 10.0, "Network timeout of one delivery attempt, s.",
            minimum=0.1, maximum=600.0),
    Setting(
        "alarms.max_shelve_hours",
        "int",
        168,
        "Longest an engineer may shelve an alarm for, hours (ISA-18.2 shelving is time-limited; 7 days is common practice).",
        minimum=1,
        maximum=8760,
    ),
    # service
    Setting(
        "service.data_dir",
        "path",
        _default_data_dir(),
        "Folder for the default SQLite database and other service files.",
    ),
    Setting(
        "service.machines_file",
        "path",
        "",
        "Machine registry TOML applied at start: machines whose entry changed since their last import are added or updated; nothing is deleted (`whirlwatch machines import --replace` does that). Empty uses the registry already in the database.",
    ),
    Setting(
        "service.metrics_address",
        "str",
        "",
        "HOST:PORT for the health view and Prometheus metrics; empty turns them off.",
        check=_address,
    ),
    Setting("service.log_level", "str", "INFO", "Log level.", check=_log_level),
    # dashboard (`whirlwatch dashboard`; docs/security.md, "Dashboard settings")
    Setting("dashboard.host", "str", "127.0.0.1", "Address the dashboard listens on."),
    Setting("dashboard.port", "int", 8050, "TCP port of the dashboard.", minimum=1, maximum=65535),
    Setting(
        "dashboard.threads",
        "int",
        8,
        "Requests the dashboard's HTTP server (waitress) works on at once.",
        minimum=1,
        maximum=256,
    ),
    Setting(
        "dashboard.time_zone",
        "str",
        "UTC",
        "The plant's IANA time zone (Europe/Berlin): the dashboard shows every time in it, 24-hour, with its UTC offset.",
        check=_time_zone,
    ),
    Setting(
        "dashboard.behind_tls_proxy",
        "bool",
        False,
        "Reached through one HTTPS reverse proxy: trust its X-Forwarded-For/-Proto/-Host, mark the session cookie Secure, send HSTS.",
    ),
    Setting(
        "dashboard.limiter_storage",
        "str",
        "memory://",
        "Where failed sign-ins are counted: memory:// (this process) or redis://HOST:6379/0 shared by several dashboard processes.",
    ),
    Setting(
        "dashboard.secret_key",
        "str",
        "",
        "Key that signs session cookies, the same for every dashboard process of a site; empty makes one per process (sessions end when it restarts). Keep it in the environment.",
        secret=True,
    ),
)

BY_NAME: dict[str, Setting] = {s.name: s for s in SETTINGS}
SECTIONS: tuple[str, ...] = tuple(dict.fromkeys(s.section for s in SETTINGS))


# ----------------------------------------------------------------------------- typed groups


def default(name: str) -> Any:
    """The registry's default of setting ``name`` (``section.key``): the one place each
    default is written (the typed groups below and the transport's settings take theirs
    from here)."""
    return BY_NAME[name].default


def broker_default(key: str) -> Any:
    """The registry's default of setting ``broker.{key}``."""
    return default(f"broker.{key}")


@dataclass(frozen=True)
class BrokerSettings:
    """The ``[broker]`` table; :meth:`monitor.io.mqtt_settings.MqttSettings.from_settings`
    turns it into the transport's settings."""

    url: str = broker_default("url")
    username: str = broker_default("username")
    password: str = field(default=broker_default("password"), repr=False)
    ca_file: str = broker_default("ca_file")
    cert_file: str = broker_default("cert_file")
    key_file: str = broker_default("key_file")
    topic_prefix: str = broker_default("topic_prefix")
    shared_group: str = broker_default("shared_group")
    client_id: str = broker_default("client_id")
    protocol: str = broker_default("protocol")
    receive_maximum: int = broker_default("receive_maximum")
    session_expiry_s: int = broker_default("session_expiry_s")
    keepalive_s: int = broker_default("keepalive_s")
    reconnect_max_s: float = broker_default("reconnect_max_s")


@dataclass(frozen=True)
class DatabaseSettings:
    url: str = field(default=default("database.url"), repr=False)
    busy_timeout_ms: int = default("database.busy_timeout_ms")


@dataclass(frozen=True)
class RetentionSettings:
    enabled: bool = default("retention.enabled")
    raw_days: float = default("retention.raw_days")
    hourly_days: float = default("retention.hourly_days")
    spectra_raw_days: float = default("retention.spectra_raw_days")
    dead_letter_days: float = default("retention.dead_letter_days")
    interval_s: float = default("retention.interval_s")

    def policy(self) -> Any:
        """The store's :class:`~monitor.store.retention.RetentionPolicy`."""
        from monitor.store.retention import RetentionPolicy

        return RetentionPolicy(
            raw_days=self.raw_days,
            hourly_days=self.hourly_days,
            spectra_raw_days=self.spectra_raw_days,
            dead_letter_days=self.dead_letter_days,
        )


@dataclass(frozen=True)
class SpectraSettings:
    snapshot_interval_s: float = default("spectra.snapshot_interval_s")
    waveform_interval_s: float = default("spectra.waveform_interval_s")


@dataclass(frozen=True)
class AlarmSettings:
    publish: bool = default("alarms.publish")
    publish_status: bool = default("alarms.publish_status")
    max_shelve_hours: int = default("alarms.max_shelve_hours")


@dataclass(frozen=True)
class NotificationSettings:
    """The ``[notifications]`` table; ``rules`` are its ``[[notifications.rule]]`` tables
    (:class:`monitor.notify.rules.Rule`), read by :func:`monitor.config.load_settings`."""

    dashboard_url: str = default("notifications.dashboard_url")
    webhook_url: str = default("notifications.webhook_url")
    webhook_secret: str = field(default=default("notifications.webhook_secret"), repr=False)
    smtp_host: str = default("notifications.smtp_host")
    smtp_port: int = default("notifications.smtp_port")
    smtp_username: str = default("notifications.smtp_username")
    smtp_password: str = field(default=default("notifications.smtp_password"), repr=False)
    smtp_from: str = default("notifications.smtp_from")
    smtp_ca_file: str = default("notifications.smtp_ca_file")
    queue_size: int = default("notifications.queue_size")
    max_attempts: int = default("notifications.max_attempts")
    backoff_s: float = default("notifications.backoff_s")
    backoff_max_s: float = default("notifications.backoff_max_s")
    timeout_s: float = default("notifications.timeout_s")
    rules: tuple[Rule, ...] = ()


@dataclass(frozen=True)
class ServiceSettings:
    data_dir: str = default("service.data_dir")
    machines_file: str = default("service.machines_file")
    metrics_address: str = default("service.metrics_address")
    log_level: str = default("service.log_level")


@dataclass(frozen=True)
class DashboardSettings:
    host: str = default("dashboard.host")
    port: int = default("dashboard.port")
    threads: int = default("dashboard.threads")
    time_zone: str = default("dashboard.time_zone")
    behind_tls_proxy: bool = default("dashboard.behind_tls_proxy")
    limiter_storage: str = default("dashboard.limiter_storage")
    secret_key: str = field(default=default("dashboard.secret_key"), repr=False)


GROUPS: dict[str, type] = {
    "broker": BrokerSettings,
    "database": DatabaseSettings,
    "retention": RetentionSettings,
    "spectra": SpectraSettings,
    "alarms": AlarmSettings,
    "notifications": NotificationSettings,
    "service": ServiceSettings,
    "dashboard": DashboardSettings,
}


@dataclass(frozen=True)
class Settings:
    """All settings, by group; ``source`` is the file read (or None)."""

    broker: BrokerSettings
    database: DatabaseSettings
    retention: RetentionSettings
    spectra: SpectraSettings
    alarms: AlarmSettings
    service: ServiceSettings
    dashboard: DashboardSettings
    notifications: NotificationSettings = NotificationSettings()
    source: str | None = None

    def get(self, name: str) -> Any:
        section, key = name.split(".", 1)
        return getattr(getattr(self, section), key)
