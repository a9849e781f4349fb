"""The container image (Dockerfile) and the compose file (compose.yaml), checked without
building or fetching anything: the compose file's structure (services, health-gated
start order, volumes, Mosquitto's persistence as deploy/mosquitto.conf has it), that
every ``WHIRLWATCH_*`` variable it sets is a setting of the registry (monitor/settings.py)
and the settings each process then gets are valid, and that every command the image and
compose run is a command of the CLI with those options (parsed by click itself).

With a working container engine on PATH, the image is also built and run; without one the
test says so in its skip reason.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import tomllib
from pathlib import Path

import click
import pytest
import yaml

from monitor.cli import COMMANDS, main
from monitor.config import load_settings
from monitor.settings import SETTINGS

ROOT = Path(__file__).resolve().parent.parent
COMPOSE = ROOT / "compose.yaml"
DOCKERFILE = ROOT / "Dockerfile"
#: The settings file the compose file mounts, and where.
SETTINGS_FILE = ROOT / "deploy" / "compose.toml"
MOUNTED_SETTINGS = "/etc/whirlwatch/whirlwatch.toml"
IMAGE_SERVICES = ("migrate", "worker-a", "worker-b", "dashboard")
WORKERS = ("worker-a", "worker-b")
#: Values for the compose file's ${VAR:?...} secrets (letters and digits, as .env asks).
SECRETS = {"DB_PASSWORD": "dbpw1234", "BROKER_PASSWORD": "mqttpw1234",
           "DASHBOARD_SECRET_KEY": "k" * 40}


def compose() -> dict:
    return yaml.safe_load(COMPOSE.read_text())


def interpolate(value: str) -> str:
    """``value`` with compose's ``${VAR}``, ``${VAR:?msg}`` and ``${VAR:-default}`` filled
    from :data:`SECRETS` (an unknown variable fails the test) and ``$$`` made ``$``."""
    def one(m: re.Match) -> str:
        name, op, rest = m.group(1), m.group(2), m.group(3)
        if name in SECRETS:
            return SECRETS[name]
        assert op == ":-", f"compose variable {name} is neither a secret of .env nor defaulted"
        return rest
    return re.sub(r"\$\{(\w+)(?:(:[?-])([^}]*))?\}", one, value).replace("$$", "$")


def dockerfile_instructions() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) of the Dockerfile, continuation lines joined."""
    text = re.sub(r"\\\n", " ", DOCKERFILE.read_text())
    out = []
    for line in text.splitlines():
        line = line.strip()
        if line and not line.startswith("#"):
            word, _, rest = line.partition(" ")
            out.append((word.upper(), rest.strip()))
    return out


def check_cli(args: list[str]) -> click.Context:
    """Parse ``whirlwatch ARGS`` with click down to the last sub-command (UsageError on an
    unknown command or option), without running it; returns the innermost context."""
    assert args and args[0] in COMMANDS, f"{args[0] if args else None!r} is not a whirlwatch command"
    ctx = main.make_context("whirlwatch", list(args), resilient_parsing=False)
    rest = [*ctx._protected_args, *ctx.args]
    cmd: click.Command = main
    while isinstance(cmd, click.Group) and rest:
        name, sub, rest = cmd.resolve_command(ctx, rest)
        assert sub is not None, f"no command {name!r} in {args}"
        cmd = sub
        ctx = sub.make_context(name or "", rest, parent=ctx)
        rest = [*getattr(ctx, "_protected_args", []), *ctx.args]
    assert not rest, f"arguments left over in {args}: {rest}"
    return ctx


def test_services_and_their_start_order():
    doc = compose()
    services = doc["services"]
    assert set(services) == {"mosquitto", "postgres", *IMAGE_SERVICES}
    gated = {"service_healthy", "service_completed_successfully"}
    for name, svc in services.items():
        for dep, how in (svc.get("depends_on") or {}).items():
            assert dep in services, (name, dep)
            assert how["condition"] in gated, (name, dep, how)
            if how["condition"] == "service_healthy":
                assert "healthcheck" in services[dep], f"{name} waits for {dep}'s health, which has no check"
    assert services["migrate"]["depends_on"] == {"postgres": {"condition": "service_healthy"}}
    for name in (*WORKERS, "dashboard"):
        assert services[name]["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
        assert "healthcheck" in services[name], name
    for name in WORKERS:
        assert services[name]["depends_on"]["mosquitto"]["condition"] == "service_healthy"
    # the one-shot schema upgrade is not restarted once done
    assert services["migrate"]["restart"] == "no"


def test_volumes_and_the_brokers_persistence():
    doc = compose()
    services = doc["services"]
    named = set(doc["volumes"])
    used = set()
    for svc in services.values():
        for mount in svc.get("volumes", []):
            source, target = mount.split(":")[:2]
            if source.startswith("./"):
                assert (ROOT / source).exists() or source.startswith("./deploy/secrets/"), source
                if source.startswith("./deploy/secrets/"):
                    assert (ROOT / "deploy/secrets/README.md").is_file()
            else:
                assert source in named, f"volume {source} is not declared"
                used.add(source)
    assert used == named
    conf = (ROOT / "deploy/mosquitto.conf").read_text()
    location = re.search(r"^persistence_location\s+(\S+)", conf, re.MULTILINE).group(1)
    assert re.search(r"^persistence\s+true", conf, re.MULTILINE)
    mounts = dict(m.split(":")[:2][::-1] for m in services["mosquitto"]["volumes"])
    assert mounts[location.rstrip("/")] == "mosquitto-data", "the broker's store is in a volume"
    assert "./deploy/mosquitto.conf" in mounts.values()
    assert "password_file /etc/mosquitto/passwd" in conf and mounts["/etc/mosquitto/passwd"].startswith("./deploy/secrets/")
    pg = {m.split(":")[1]: m.split(":")[0] for m in services["postgres"]["volumes"]}
    assert pg["/var/lib/postgresql/data"] == "postgres-data"


def test_environment_names_and_settings():
    services = compose()["services"]
    names = {s.env for s in SETTINGS}
    groups, client_ids = set(), set()
    for name in IMAGE_SERVICES:
        env = {k: interpolate(str(v)) for k, v in services[name]["environment"].items()}
        unknown = {k for k in env if k.startswith("WHIRLWATCH_")} - names
        assert not unknown, f"{name} sets variables the settings registry does not have: {unknown}"
        assert set(env) <= names, f"{name} sets other variables: {set(env) - names}"
        # the file compose mounts plus this environment: valid settings (ConfigError otherwise)
        settings = load_settings(SETTINGS_FILE, env=env)
        assert settings.database.url.startswith("postgresql+psycopg://whirlwatch:")
        assert "@postgres:5432/" in settings.database.url
        if name in WORKERS:
            groups.add(settings.broker.shared_group)
            client_ids.add(settings.broker.client_id)
            assert settings.broker.url == "mqtt://mosquitto:1883" and settings.broker.password
            port = settings.service.metrics_address.rpartition(":")[2]
            assert f"127.0.0.1:{port}/readyz" in json.dumps(services[name]["healthcheck"]["test"])
        if name == "dashboard":
            assert settings.dashboard.secret_key
            assert f"127.0.0.1:{settings.dashboard.port}/readyz" in json.dumps(services[name]["healthcheck"]["test"])
            published = services[name]["ports"][0].rsplit(":", 1)[1]
            assert int(published) == settings.dashboard.port and settings.dashboard.host == "0.0.0.0"
    # two workers, one shared subscription (docs/mqtt.md, "Shared subscriptions"), own ids
    assert len(groups) == 1 and next(iter(groups)), groups
    assert len(client_ids) == 2, client_ids


def test_the_broker_and_database_agree_with_the_service():
    services = compose()["services"]
    settings = load_settings(SETTINGS_FILE, env={})
    user = settings.broker.username
    health = " ".join(services["mosquitto"]["healthcheck"]["test"])
    assert f"-u {user}" in health and "1883" in health
    assert "mosquitto:1883" in settings.broker.url
    pg_env = services["postgres"]["environment"]
    url = interpolate(services["migrate"]["environment"]["WHIRLWATCH_DATABASE_URL"])
    assert url == (f"postgresql+psycopg://{pg_env['POSTGRES_USER']}:{SECRETS['DB_PASSWORD']}"
                   f"@postgres:5432/{pg_env['POSTGRES_DB']}")
    assert "mosquitto -c" in services["mosquitto"]["command"][-1]


def test_every_command_is_a_cli_command_with_those_options():
    services = compose()["services"]
    instructions = dockerfile_instructions()
    entry = [json.loads(a) for i, a in instructions if i == "ENTRYPOINT"]
    cmd = [json.loads(a) for i, a in instructions if i == "CMD"]
    assert entry == [["whirlwatch"]], "the entry point is the whirlwatch command (exec form)"
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert pyproject["project"]["scripts"]["whirlwatch"] == "monitor.cli:main"
    assert check_cli(cmd[-1]).info_name == "run"
    ran = {}
    for name in IMAGE_SERVICES:
        command = services[name]["command"]
        ctx = check_cli(command)
        ran[name] = ctx.command_path
        if "--config" in command:
            assert command[command.index("--config") + 1] == MOUNTED_SETTINGS
            assert ctx.params.get("config") is not None or ctx.params.get("config_file") is not None
        mounts = dict(m.split(":")[:2][::-1] for m in services[name]["volumes"])
        assert mounts[MOUNTED_SETTINGS] == "./" + str(SETTINGS_FILE.relative_to(ROOT))
    assert ran == {"migrate": "whirlwatch db upgrade", "worker-a": "whirlwatch run",
                   "worker-b": "whirlwatch run", "dashboard": "whirlwatch dashboard"}
    # the check itself refuses what the CLI would
    with pytest.raises(click.UsageError):
        check_cli(["run", "--no-such-option"])
    with pytest.raises(click.UsageError):
        check_cli(["db", "upgrad"])


def test_the_image_is_slim_and_not_root():
    instructions = dockerfile_instructions()
    base = [a for i, a in instructions if i == "FROM"]
    assert len(base) == 1 and re.fullmatch(r"python:3\.1[1-9]-slim(-\w+)?", base[0]), base
    users = [a for i, a in instructions if i == "USER"]
    assert users and users[-1].split(":")[0] not in ("root", "0")
    installs = " ".join(a for i, a in instructions if i == "RUN" and "pip install" in a)
    extras = re.search(r"\.\[([\w,]+)\]", installs).group(1).split(",")
    optional = pyproject_extras()
    assert "postgres" in extras and set(extras) <= optional
    ignored = (ROOT / ".dockerignore").read_text().split()
    assert {".git", ".venv", "tests"} <= set(ignored)
    copied = [a.split()[0] for i, a in instructions if i == "COPY"]
    assert all(not c.startswith(tuple(ignored)) for c in copied)


def pyproject_extras() -> set[str]:
    return set(tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"])


def engine_unavailable() -> str | None:
    """None when docker or podman is on PATH and its engine answers; else why not."""
    for exe in ("docker", "podman"):
        path = shutil.which(exe)
        if path is None:
            continue
        try:
            done = subprocess.run([path, "info"], capture_output=True, text=True, timeout=20, check=False)
        except subprocess.TimeoutExpired:
            return f"{exe} is on PATH but `{exe} info` did not answer within 20 s"
        if done.returncode == 0:
            return None
        first = (done.stderr.strip().splitlines() or ["no message"])[-1]
        return f"{exe} is on PATH but no container engine answers ({first})"
    return "no container engine: neither docker nor podman is on PATH"


@pytest.mark.slow
def test_build_and_run_the_image():
    reason = engine_unavailable()
    if reason:
        pytest.skip(f"the image was not built or run: {reason}")
    exe = shutil.which("docker") or shutil.which("podman")
    assert exe
    tag = "whirlwatch:test"
    subprocess.run([exe, "build", "-t", tag, str(ROOT)], check=True, timeout=1800)
    out = subprocess.run([exe, "run", "--rm", tag, "--help"], capture_output=True, text=True,
                         check=True, timeout=120).stdout
    for name in COMMANDS:
        assert name in out
    user = subprocess.run([exe, "run", "--rm", "--entrypoint", "id", tag, "-u"], capture_output=True,
                          text=True, check=True, timeout=60).stdout.strip()
    assert user != "0"
    compose_cmd = shlex.split(f"{exe} compose -f {COMPOSE} config --quiet")
    env = dict(SECRETS)
    subprocess.run(compose_cmd, check=True, timeout=60, env={**os.environ, **env})


def test_the_commands_docs_deploy_shows_are_cli_commands():
    """Every ``docker compose run ... migrate ARGS`` and ``docker run ... whirlwatch:local
    ARGS`` line of docs/deploy.md, and its ``whirlwatch db ...`` lines, parse as commands."""
    text = (ROOT / "docs" / "deploy.md").read_text()
    shown = []
    for line in text.splitlines():
        line = line.split("#", 1)[0].strip().strip("`")
        if line.startswith("docker compose run"):
            words = shlex.split(line)
            shown.append(words[words.index("migrate") + 1:])
        elif line.startswith("docker run --rm whirlwatch:local"):
            shown.append(shlex.split(line)[4:])
        elif line.startswith("whirlwatch db "):
            shown.append([w for w in shlex.split(line)[1:] if w not in ("[--database", "URL", "|", "--config", "FILE]", "[--force]")]
                         + (["--force"] if "[--force]" in line else []))
    commands = [args for args in shown if args[:1] != ["--help"]]
    assert len(commands) >= 5, shown
    for args in commands:
        check_cli(args)
