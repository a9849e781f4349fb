"""Service configuration: one registry of settings drives the TOML file, the
environment overrides, ``--help`` text and docs/configuration.md.

A setting is named ``section.key`` (``broker.url``): in the TOML service file it is key
``key`` of table ``[section]``; its environment variable is ``WHIRLWATCH_SECTION_KEY``
(``WHIRLWATCH_BROKER_PASSWORD``). Precedence, lowest first: default, file, environment,
command-line override. Every bad value raises :class:`ConfigError` whose one-sentence
message names the file (or variable), the key and what was expected; the service does not
start on a bad file.

Exceptions::

    ValueError
     └── ConfigError
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

ENV_PREFIX = "WHIRLWATCH_"


class ConfigError(ValueError):
    """A configuration value is bad; the message names where, the key and what was expected."""


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
    parts = urlsplit(v)
    if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
        return "an mqtt://host[:port] or mqtts://host[:port] URL"
    try:
        _ = parts.port
    except ValueError:
        return "an mqtt:// or mqtts:// URL with a numeric port"
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
    if not v or any(c in v for c in "+#") or v.startswith("/") or v.endswith("/"):
        return "a non-empty MQTT topic without '+', '#' or a leading/trailing '/'"
    return None


def _group(v: str) -> str | None:
    if v and any(c in v for c in "/+#"):
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
)

BY_NAME: dict[str, Setting] = {s.name: s for s in SETTINGS}
SECTIONS: tuple[str, ...] = tuple(dict.fromkeys(s.section for s in SETTINGS))


# ----------------------------------------------------------------------------- typed groups


def broker_default(key: str) -> Any:
    """The registry's default of setting ``broker.{key}``: the one place broker defaults
    are written (BrokerSettings and monitor.io.mqtt.MqttSettings take theirs from here)."""
    return BY_NAME[f"broker.{key}"].default


@dataclass(frozen=True)
class BrokerSettings:
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

    @property
    def tls(self) -> bool:
        return urlsplit(self.url).scheme == "mqtts"

    @property
    def host(self) -> str:
        return urlsplit(self.url).hostname or "127.0.0.1"

    @property
    def port(self) -> int:
        return urlsplit(self.url).port or (8883 if self.tls else 1883)


@dataclass(frozen=True)
class DatabaseSettings:
    url: str = field(default="", repr=False)
    busy_timeout_ms: int = 10000


@dataclass(frozen=True)
class RetentionSettings:
    enabled: bool = True
    raw_days: float = 30.0
    hourly_days: float = 365.0
    spectra_raw_days: float = 30.0
    dead_letter_days: float = 30.0
    interval_s: float = 3600.0

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
    snapshot_interval_s: float = 600.0


@dataclass(frozen=True)
class AlarmSettings:
    publish: bool = True
    publish_status: bool = True


@dataclass(frozen=True)
class ServiceSettings:
    data_dir: str = ""
    machines_file: str = ""
    metrics_address: str = ""
    log_level: str = "INFO"


_GROUPS: dict[str, type] = {
    "broker": BrokerSettings,
    "database": DatabaseSettings,
    "retention": RetentionSettings,
    "spectra": SpectraSettings,
    "alarms": AlarmSettings,
    "service": ServiceSettings,
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
    source: str | None = None

    def get(self, name: str) -> Any:
        section, key = name.split(".", 1)
        return getattr(getattr(self, section), key)


# ----------------------------------------------------------------------------- loading


def _convert(setting: Setting, value: Any, where: str) -> Any:
    """Convert and check ``value`` (from TOML or a string); ConfigError names ``where``."""

    def bad() -> ConfigError:
        shown = "***" if setting.secret else repr(value)
        return ConfigError(
            f"{where}: key '{setting.name}' must be {setting.expected()}, got {shown}."
        )

    kind = setting.kind
    from_text = isinstance(value, str)
    if kind in ("str", "path"):
        if not isinstance(value, str):
            raise bad()
        out: Any = value
    elif kind == "bool":
        if isinstance(value, bool):
            out = value
        elif from_text and value.strip().lower() in ("1", "true", "yes", "on"):
            out = True
        elif from_text and value.strip().lower() in ("0", "false", "no", "off"):
            out = False
        else:
            raise bad()
    elif kind == "int":
        if isinstance(value, bool):
            raise bad()
        if from_text:
            try:
                value_i = int(value.strip())
            except ValueError:
                raise bad() from None
        elif isinstance(value, int):
            value_i = value
        else:
            raise bad()
        out = value_i
    elif kind == "float":
        if isinstance(value, bool):
            raise bad()
        try:
            out = float(value.strip()) if from_text else float(value)
        except (ValueError, TypeError):
            raise bad() from None
        if out != out or out in (float("inf"), float("-inf")):
            raise bad()
    else:  # pragma: no cover - registry is fixed
        raise AssertionError(kind)
    if setting.choices and out not in setting.choices:
        # TOML users write protocol = 5 for "5"; accept the number form.
        if kind == "str" and str(value) in setting.choices:
            out = str(value)
        else:
            raise bad()
    if setting.minimum is not None and out < setting.minimum:
        raise bad()
    if setting.maximum is not None and out > setting.maximum:
        raise bad()
    if setting.check is not None:
        problem = setting.check(out)
        if problem:
            shown = "***" if setting.secret else repr(value)
            raise ConfigError(f"{where}: key '{setting.name}' must be {problem}, got {shown}.")
    return out


def _read_file(path: Path) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the service file ({exc.strerror}).") from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc}).") from exc
    flat: dict[str, Any] = {}
    for section, table in data.items():
        if section not in SECTIONS:
            raise ConfigError(
                f"{path}: unknown table [{section}]; expected one of {', '.join(SECTIONS)}."
            )
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: '{section}' must be a table [{section}].")
        for key, value in table.items():
            name = f"{section}.{key}"
            if name not in BY_NAME:
                known = ", ".join(s.key for s in SETTINGS if s.section == section)
                raise ConfigError(f"{path}: unknown key '{name}'; [{section}] takes {known}.")
            flat[name] = value
    return flat


def load_settings(
    path: str | Path | None = None,
    *,
    env: Mapping[str, str] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> Settings:
    """Read the service file ``path`` (optional), apply ``WHIRLWATCH_*`` variables from
    ``env`` (default ``os.environ``) and ``overrides`` (``{"broker.url": ...}``, from
    command-line flags; None values are ignored). Relative paths in the file are taken
    relative to the file's folder."""
    env = os.environ if env is None else env
    values: dict[str, Any] = {s.name: s.default for s in SETTINGS}
    base = Path.cwd()
    source = None
    if path is not None:
        p = Path(path)
        source = str(p)
        base = p.resolve().parent
        for name, raw in _read_file(p).items():
            setting = BY_NAME[name]
            value = _convert(setting, raw, str(p))
            if setting.kind == "path" and value:
                value = str((base / Path(value).expanduser()).resolve())
            values[name] = value
    for setting in SETTINGS:
        if setting.env in env:
            values[setting.name] = _convert(
                setting, env[setting.env], f"environment variable {setting.env}"
            )
    for name, raw in (overrides or {}).items():
        if raw is None:
            continue
        if name not in BY_NAME:
            raise ConfigError(f"override: unknown setting '{name}'.")
        values[name] = _convert(BY_NAME[name], raw, "command line")
    if not values["database.url"]:
        data_dir = Path(values["service.data_dir"]).expanduser()
        values["database.url"] = f"sqlite:///{data_dir / 'whirlwatch.sqlite'}"
    if values["retention.hourly_days"] < values["retention.raw_days"]:
        raise ConfigError(
            f"{source or 'settings'}: key 'retention.hourly_days' must be at least "
            f"retention.raw_days ({values['retention.raw_days']:g}), got {values['retention.hourly_days']!r}."
        )
    groups = {
        section: cls(**{s.key: values[s.name] for s in SETTINGS if s.section == section})
        for section, cls in _GROUPS.items()
    }
    return Settings(source=source, **groups)


# ----------------------------------------------------------------------------- docs


def _toml(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    return '"' + str(value).replace("\\", "\\\\").replace('"', '\\"') + '"'


def example_file() -> str:
    """A commented service file with every setting at its default."""
    out = ["# whirlwatch service file; every key is optional (defaults shown)."]
    for section in SECTIONS:
        out += ["", f"[{section}]"]
        for s in SETTINGS:
            if s.section != section:
                continue
            default = "" if s.name == "service.data_dir" else s.default
            out.append(f"# {s.help} (env {s.env})")
            out.append(f"# {s.key} = {_toml(default)}")
    return "\n".join(out) + "\n"


def settings_help() -> str:
    """Help text listing every setting and its environment variable (for ``--help``)."""
    lines = ["Settings (service file key / environment variable):"]
    for s in SETTINGS:
        lines.append(f"  {s.name:30} {s.env}")
    return "\n".join(lines)


def render_docs() -> str:
    """The text of docs/configuration.md, generated from :data:`SETTINGS`."""
    out = [
        "# Configuration",
        "",
        "<!-- Generated from monitor/config.py by `python -m monitor.config > docs/configuration.md`;",
        "     tests/test_config.py fails when this file and the settings registry differ. -->",
        "",
        "The service reads one TOML file (`whirlwatch run --config FILE`). Each setting",
        "`section.key` is key `key` of table `[section]`. Every setting can also be set by its",
        "environment variable (`WHIRLWATCH_SECTION_KEY`), which wins over the file; flags such",
        "as `--broker`, `--database` and `--machines` win over both. Keep secrets",
        "(`broker.password`, a `database.url` with a password) in the environment.",
        "",
        "A bad value stops the service with one sentence naming the file (or variable), the",
        "key and what was expected, e.g.",
        "`service.toml: key 'broker.url' must be an mqtt://host[:port] or mqtts://host[:port] URL, got 'http://x'.`",
        "Unknown tables and keys are errors too, so a typing mistake is never silently ignored.",
        "Relative paths in the file are relative to the file's folder.",
        "",
    ]
    for section in SECTIONS:
        out += [
            f"## [{section}]",
            "",
            "| key | type | default | environment variable | meaning |",
            "|---|---|---|---|---|",
        ]
        for s in SETTINGS:
            if s.section != section:
                continue
            if s.name == "service.data_dir":
                default = "`$XDG_DATA_HOME/whirlwatch` (else `~/.local/share/whirlwatch`)"
            else:
                default = f"`{_toml(s.default)}`"
            kind = s.kind + (
                " (" + " or ".join(f"`{c}`" for c in s.choices) + ")" if s.choices else ""
            )
            help_text = s.help.replace("|", "\\|") + (" Secret: never logged." if s.secret else "")
            out.append(f"| `{s.name}` | {kind} | {default} | `{s.env}` | {help_text} |")
        out.append("")
    out += ["## Example", "", "```toml", example_file().rstrip("\n"), "```", ""]
    return "\n".join(out)


if __name__ == "__main__":  # pragma: no cover
    print(render_docs(), end="")
