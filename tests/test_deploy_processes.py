"""The compose file's processes run here without a container engine: Mosquitto with
deploy/mosquitto.conf's settings and a password file, a PostgreSQL database, and each
whirlwatch service of compose.yaml (migrate, the two workers, the dashboard) started with
its own command and environment, only the addresses moved to this machine. The compose
health checks, run as compose would run them, must pass; the two workers must split the
readings of one shared subscription."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import urllib.request
from pathlib import Path

import paho.mqtt.client as paho
import pytest
from broker import PrivateBroker, wait_until
from fixtures_db import fresh_database
from paho.mqtt.enums import CallbackAPIVersion
from service_helpers import PLANT, measurement_count, traffic
from test_deploy_compose import MOUNTED_SETTINGS, SECRETS, SETTINGS_FILE, compose, interpolate
from tls_files import make_password_file

from monitor.demo import free_port

pytestmark = [pytest.mark.broker, pytest.mark.postgres, pytest.mark.slow]

ROOT = Path(__file__).resolve().parent.parent
READINGS = 24


def _command(args: list[str]) -> list[str]:
    """A compose command of the image as a local process (the settings file from the repo)."""
    return [sys.executable, "-c", "from monitor.cli import main; main()",
            *[str(SETTINGS_FILE) if a == MOUNTED_SETTINGS else a for a in args]]


def _healthcheck(test: list[str], env: dict[str, str], port_from: int, port_to: int) -> int:
    """Run a compose health check (``CMD`` or ``CMD-SHELL``) here, the port moved; its exit code."""
    kind, *rest = test
    rest = [interpolate(a).replace(f"127.0.0.1:{port_from}", f"127.0.0.1:{port_to}")
            .replace(f"-p {port_from} ", f"-p {port_to} ") for a in rest]
    if kind == "CMD-SHELL":
        rest = ["sh", "-c", rest[0]]
    if rest[0] == "python":
        rest[0] = sys.executable
    return subprocess.run(rest, env=env, capture_output=True, timeout=30, check=False).returncode


def _publish(port: int, messages: list[tuple[str, bytes]]) -> None:
    client = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
    client.username_pw_set("whirlwatch", SECRETS["BROKER_PASSWORD"])
    client.connect("127.0.0.1", port)
    client.loop_start()
    try:
        infos = [client.publish(t, p, qos=1) for t, p in messages]
        for info in infos:
            info.wait_for_publish(10)
            assert info.is_published()
    finally:
        client.disconnect()
        client.loop_stop()


def _health(port: int) -> dict:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=3) as r:
            return json.loads(r.read())
    except OSError:
        return {}


def test_compose_processes_run_and_pass_their_health_checks(tmp_path):
    services = compose()["services"]
    if shutil.which("mosquitto_sub") is None:
        pytest.skip("mosquitto_sub is not installed (Debian package mosquitto-clients): the broker's health check needs it")
    passwd = make_password_file(tmp_path / "passwd", "whirlwatch", SECRETS["BROKER_PASSWORD"])
    broker = PrivateBroker(tmp_path / "broker", config_from=ROOT / "deploy/mosquitto.conf", password_file=passwd)
    broker.start()
    procs: list[subprocess.Popen] = []
    try:
        # the broker's health check, with the service's account and a wrong password
        env = {**os.environ, **{k: interpolate(str(v)) for k, v in services["mosquitto"]["environment"].items()}}
        check = services["mosquitto"]["healthcheck"]["test"]
        assert _healthcheck(check, env, 1883, broker.port) == 0, broker.log_tail()
        assert _healthcheck(check, {**env, "BROKER_PASSWORD": "wrong"}, 1883, broker.port) != 0

        with fresh_database("postgresql", tmp_path) as db_url:
            ports = {"worker-a": free_port(), "worker-b": free_port(), "dashboard": free_port()}

            def env_of(name: str) -> dict[str, str]:
                out = {k: v for k, v in os.environ.items() if not k.startswith("WHIRLWATCH_")}
                out.update({k: interpolate(str(v)) for k, v in services[name]["environment"].items()})
                out["WHIRLWATCH_DATABASE_URL"] = db_url
                out["WHIRLWATCH_BROKER_URL"] = broker.url
                out["WHIRLWATCH_SERVICE_DATA_DIR"] = str(tmp_path / name)
                if name.startswith("worker"):
                    out["WHIRLWATCH_SERVICE_METRICS_ADDRESS"] = f"127.0.0.1:{ports[name]}"
                if name == "dashboard":
                    out["WHIRLWATCH_DASHBOARD_PORT"] = str(ports[name])
                    out["WHIRLWATCH_DASHBOARD_HOST"] = "127.0.0.1"
                return out

            done = subprocess.run(_command(services["migrate"]["command"]), env=env_of("migrate"),
                                  capture_output=True, text=True, timeout=120, check=False)
            assert done.returncode == 0, done.stderr
            done = subprocess.run(_command(["machines", "import", str(PLANT), "--config", MOUNTED_SETTINGS]),
                                  env=env_of("migrate"), capture_output=True, text=True, timeout=120, check=False)
            assert done.returncode == 0, done.stderr
            for name in ("worker-a", "worker-b", "dashboard"):
                log = open(tmp_path / f"{name}.log", "wb")  # noqa: SIM115 (the child keeps it)
                procs.append(subprocess.Popen(_command(services[name]["command"]), env=env_of(name),
                                              stdout=log, stderr=subprocess.STDOUT, cwd=tmp_path))
                log.close()
            internal = {"worker-a": 9108, "worker-b": 9108, "dashboard": 8050}
            for name in ("worker-a", "worker-b", "dashboard"):
                test = services[name]["healthcheck"]["test"]
                ok = wait_until(lambda n=name, t=test: _healthcheck(t, env_of(n), internal[n], ports[n]) == 0,
                                90.0, 0.5)
                assert ok, (tmp_path / f"{name}.log").read_text(errors="replace")[-2000:]

            # one shared subscription: both workers take readings, each stored once
            messages = traffic("bwm-1", 0, READINGS)
            _publish(broker.port, messages)
            assert wait_until(lambda: measurement_count(db_url)[0] >= READINGS // 2, 60.0, 0.5)
            assert wait_until(lambda: all(_health(ports[w]).get("acked", 0) > 0 for w in ("worker-a", "worker-b")),
                              30.0, 0.5), [_health(ports[w]) for w in ("worker-a", "worker-b")]
            rows, distinct = measurement_count(db_url)
            assert rows == distinct
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(30)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(10)
        broker.stop()
