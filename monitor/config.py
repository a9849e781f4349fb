"""Reading the service's settings: the TOML file, the environment overrides, command-line
overrides; and the ``--help`` text and docs/configuration.md rendered from the registry.

Every setting, its default and bounds are in :data:`monitor.settings.SETTINGS`. Precedence,
lowest first: default, file, environment, command-line override. Every bad value raises
:class:`ConfigError` whose one-sentence message names the file (or variable), the key and
what was expected; the service does not start on a bad file.

Exceptions::

    ValueError
     └── ConfigError
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

from monitor.notify.rules import Rule, RuleError, parse_rules
from monitor.redact import redact
from monitor.settings import BY_NAME, GROUPS, SECTIONS, SETTINGS, Setting, Settings


class ConfigError(ValueError):
    """A configuration value is bad; the message names where, the key and what was expected."""


#: The array of tables of the notification rules (monitor/notify/rules.py): not a single
#: value, so not in the registry; docs/notifications.md describes its keys.
RULES_KEY = "notifications.rule"


# ----------------------------------------------------------------------------- loading


def _convert(setting: Setting, value: Any, where: str) -> Any:
    """Convert and check ``value`` (from TOML or a string); ConfigError names ``where``."""

    def bad() -> ConfigError:
        shown = _shown(setting, value)
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
            shown = _shown(setting, value)
            raise ConfigError(f"{where}: key '{setting.name}' must be {problem}, got {shown}.")
    return out


def _shown(setting: Setting, value: Any) -> str:
    """A bad value as an error shows it: a secret not at all, a URL without its password."""
    if setting.secret:
        return "***"
    return repr(redact(value)) if isinstance(value, str) else repr(value)


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
            if name == RULES_KEY:  # an array of tables, read by monitor/notify/rules.py
                flat[name] = value
                continue
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
    rules: tuple[Rule, ...] = ()
    if path is not None:
        p = Path(path)
        source = str(p)
        base = p.resolve().parent
        for name, raw in _read_file(p).items():
            if name == RULES_KEY:
                try:
                    rules = parse_rules(raw, str(p))
                except RuleError as exc:
                    raise ConfigError(str(exc)) from exc
                continue
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
        for section, cls in GROUPS.items()
    }
    groups["notifications"] = replace(groups["notifications"], rules=rules)
    _check_targets(groups["notifications"], source or "settings")
    return Settings(source=source, **groups)


def _check_targets(n: Any, where: str) -> None:
    """A rule that names a target must have it configured (the file or the environment)."""
    for i, rule in enumerate(n.rules, 1):
        if rule.webhook and not n.webhook_url:
            raise ConfigError(f"{where}: notifications.rule #{i} sets webhook = true, but "
                              "'notifications.webhook_url' is empty.")
        if rule.email_to and not (n.smtp_host and n.smtp_from):
            raise ConfigError(f"{where}: notifications.rule #{i} sends e-mail, but "
                              "'notifications.smtp_host' or 'notifications.smtp_from' is empty.")


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
        if section == "notifications":
            out += ["", "# Any number of rules; each sends the transitions it matches (docs/notifications.md).",
                    "# [[notifications.rule]]", '# groups = ["Hall 2"]', '# kinds = ["resonance_proximity"]',
                    '# min_severity = "alert"', '# transitions = ["raised", "escalated", "cleared"]',
                    "# webhook = true", '# email_to = ["maintenance@example.com"]']
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
        "<!-- Generated from monitor/settings.py by `python -m monitor.config > docs/configuration.md`;",
        "     tests/test_config.py fails when this file and the settings registry differ. -->",
        "",
        "The service and the dashboard read one TOML file (`whirlwatch run --config FILE`,",
        "`whirlwatch dashboard --config FILE`). Each setting `section.key` is key `key` of table",
        "`[section]`. Every setting can also be set by its environment variable",
        "(`WHIRLWATCH_SECTION_KEY`), which wins over the file; flags such as `--broker`,",
        "`--database` and `--machines` win over both. Keep secrets (`broker.password`, a",
        "`database.url` with a password, `dashboard.secret_key`, the notification secrets) in",
        "the environment.",
        "",
        "A bad value stops the service with one sentence naming the file (or variable), the",
        "key and what was expected, e.g.",
        "`service.toml: key 'broker.url' must be an mqtt://host[:port] or mqtts://host[:port] URL, got 'http://x'.`",
        "Unknown tables and keys are errors too, so a typing mistake is never silently ignored.",
        "Relative paths in the file are relative to the file's folder.",
        "",
        "The dashboard uses `[database]`, `[dashboard]` and `service.data_dir` (for the default",
        "database, so that the dashboard opens the service's store); its options and what each",
        "security setting does are in docs/security.md, \"Dashboard settings\". The variable",
        "`WHIRLWATCH_DATABASE` of earlier versions still works for the dashboard, with a",
        "warning: use `WHIRLWATCH_DATABASE_URL`.",
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
        if section == "notifications":
            out += ["", "Which alarm transitions are sent, and to whom, is set by `[[notifications.rule]]`",
                    "tables (keys `machines`, `groups`, `kinds`, `min_severity`, `transitions`, `webhook`,",
                    "`email_to`): docs/notifications.md, with the webhook body and its signature."]
        out.append("")
    out += ["## Example", "", "```toml", example_file().rstrip("\n"), "```", ""]
    return "\n".join(out)


if __name__ == "__main__":  # pragma: no cover
    print(render_docs(), end="")
