"""A private Mosquitto for the tests: started on a free loopback port, stoppable and restartable.

Tests need a broker they can stop, kill and restart (same port, same persistence directory)
without touching anything else on the machine, so each :class:`PrivateBroker` runs its own
``mosquitto`` process from a temporary configuration.

Fixtures (registered from ``tests/conftest.py`` through ``pytest_plugins``):

``mosquitto``
    Session-scoped running broker shared by tests that only publish and subscribe.
``fresh_mosquitto``
    Function-scoped broker of its own, for tests that stop, kill or restart it.
``deploy_mosquitto``
    Function-scoped broker started with the persistence, queue and in-flight settings of
    ``deploy/mosquitto.conf`` (see :meth:`PrivateBroker.with_deploy_settings`), for tests
    that must observe what a site broker would keep or lose.

All skip, with the reason, when the ``mosquitto`` binary is not installed.

A test that needs the deploy settings on a broker of its own (the soak test, a kill -9
test) writes::

    broker = PrivateBroker.with_deploy_settings(tmp_path / "broker")
    broker.start()
    ...
    broker.kill()       # SIGKILL: only what the deploy persistence settings saved survives
    broker.start()      # same port, same persistence directory

The broker then runs every directive of ``deploy/mosquitto.conf`` as written (autosave,
queue limits, in-flight limit, session expiration, packet size, ...) except the
site-specific ones listed in :data:`SITE_DIRECTIVES` (listeners, TLS files, passwords,
ACLs, paths, log destination, user), which are replaced by a private loopback listener,
anonymous access, a private persistence directory and a log file. Nothing is copied: a
change to the deploy file is what the tests run.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from monitor.demo import find_mosquitto, free_port

ROOT = Path(__file__).resolve().parent.parent
DEPLOY_MOSQUITTO_CONF = ROOT / "deploy" / "mosquitto.conf"

#: Directives of a site's broker file that name its network, files, accounts or log
#: destination; a private test broker replaces them with its own.
SITE_DIRECTIVES = frozenset({
    "listener", "port", "bind_address", "bind_interface", "socket_domain", "protocol",
    "certfile", "keyfile", "cafile", "capath", "crlfile", "require_certificate",
    "use_identity_as_username", "use_subject_as_username", "tls_version", "ciphers",
    "ciphers_tls1.3", "psk_file", "psk_hint", "password_file", "acl_file",
    "allow_anonymous", "per_listener_settings", "plugin", "plugin_opt", "auth_plugin",
    "persistence_location", "persistence_file", "pid_file", "user", "include_dir",
    "log_dest", "log_type", "log_timestamp", "log_timestamp_format", "connection_messages",
})


def read_mosquitto_conf(path: Path) -> list[tuple[str, str]]:
    """The directives of a Mosquitto configuration file, in order, as ``(name, value)``.

    Comments (``#`` at the start of a line, as mosquitto.conf(5) defines them) and blank
    lines are skipped; the value is the rest of the line, stripped.
    """
    out: list[tuple[str, str]] = []
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        name, _, value = text.partition(" ")
        out.append((name, value.strip()))
    return out


def deploy_broker_settings(path: Path = DEPLOY_MOSQUITTO_CONF) -> dict[str, str]:
    """The broker-wide directives of ``path`` that a private broker runs as written
    (everything but :data:`SITE_DIRECTIVES`), by name; the last occurrence wins, as in
    Mosquitto."""
    return {name: value for name, value in read_mosquitto_conf(path) if name not in SITE_DIRECTIVES}


class PrivateBroker:
    """One ``mosquitto`` process on 127.0.0.1 with persistence in a private directory.

    By default (the tests' own settings): ``max_queued_messages`` is raised from
    Mosquitto's default of 1000 on purpose: beyond it an offline session's backlog is
    silently dropped, which would hide lost messages in the delivery tests.
    ``autosave_interval`` is 1 s because Mosquitto writes its persistence file only on that
    interval and at a clean shutdown.

    With ``config_from`` (a Mosquitto configuration file, normally
    ``deploy/mosquitto.conf``; :meth:`with_deploy_settings`), the broker-wide directives of
    that file are used as written instead of the three keyword settings, and only its
    site-specific directives (:data:`SITE_DIRECTIVES`) are replaced. ``overrides``
    (directive name to value) change single directives on top, for a comparison run.
    ``settings`` holds the broker-wide directives in force. ``tls`` (certificate and key
    files) makes the listener TLS only; ``password_file`` (mosquitto_passwd's format)
    turns anonymous access off.
    """

    def __init__(
        self,
        workdir: Path,
        *,
        port: int | None = None,
        max_queued_messages: int = 100_000,
        max_inflight_messages: int = 20,
        autosave_interval_s: int = 1,
        config_from: Path | None = None,
        overrides: dict[str, str] | None = None,
        tls: tuple[Path, Path] | None = None,
        password_file: Path | None = None,
    ) -> None:
        binary = find_mosquitto()
        if binary is None:
            raise FileNotFoundError("the mosquitto binary is not installed.")
        self.binary = binary
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        self.host = "127.0.0.1"
        self.persistence_dir = self.workdir / "persist"
        self.persistence_dir.mkdir(exist_ok=True)
        self.config_path = self.workdir / "mosquitto.conf"
        self.log_path = self.workdir / "mosquitto.log"
        if config_from is None:
            self.settings: dict[str, str] = {
                "persistence": "true",
                "autosave_interval": str(autosave_interval_s),
                "max_queued_messages": str(max_queued_messages),
                "max_inflight_messages": str(max_inflight_messages),
            }
        else:
            self.settings = deploy_broker_settings(Path(config_from))
        self.settings.update(overrides or {})
        self.config_from = None if config_from is None else Path(config_from)
        lines = [f"listener {self.port} 127.0.0.1"]
        if tls is not None:  # (certificate, key) in PEM: this listener speaks TLS only
            lines += [f"certfile {tls[0]}", f"keyfile {tls[1]}"]
        lines += [
            "allow_anonymous true" if password_file is None else "allow_anonymous false",
            f"persistence_location {self.persistence_dir}/",
            "log_dest stderr",
            "log_type error",
            "log_type warning",
        ]
        if password_file is not None:  # made with mosquitto_passwd
            lines.append(f"password_file {password_file}")
        lines += [f"{name} {value}" for name, value in self.settings.items()]
        if os.geteuid() == 0:
            # Started as root, Mosquitto switches to the 'mosquitto' user, which cannot write
            # the private persistence directory; stay the user that created it.
            lines.append("user root")
        self.config_path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        self.proc: subprocess.Popen[bytes] | None = None

    @classmethod
    def with_deploy_settings(
        cls, workdir: Path, *, port: int | None = None, config: Path = DEPLOY_MOSQUITTO_CONF,
        overrides: dict[str, str] | None = None,
    ) -> PrivateBroker:
        """A private broker (not started) that runs the persistence, autosave, queue,
        in-flight and session settings of ``deploy/mosquitto.conf`` as written there
        (with ``overrides``, if given, changing single directives on top)."""
        return cls(workdir, port=port, config_from=config, overrides=overrides)

    @property
    def url(self) -> str:
        return f"mqtt://{self.host}:{self.port}"

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def start(self, timeout_s: float = 10.0) -> None:
        """Start the broker and return once it accepts TCP connections."""
        if self.running:
            return
        log = open(self.log_path, "ab")  # noqa: SIM115 (the child keeps it open)
        try:
            self.proc = subprocess.Popen(
                [self.binary, "-c", str(self.config_path)],
                stdout=log,
                stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL,
            )
        finally:
            log.close()
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(
                    f"mosquitto exited with {self.proc.returncode}: {self.log_tail()}"
                )
            try:
                with socket.create_connection((self.host, self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.02)
        self.kill()
        raise RuntimeError(f"mosquitto did not listen on port {self.port}: {self.log_tail()}")

    def stop(self, timeout_s: float = 10.0) -> None:
        """SIGTERM: Mosquitto writes its persistence file and exits."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def kill(self) -> None:
        """SIGKILL: no shutdown save; only what the last save wrote survives."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        self.proc = None

    def restart(self, *, hard: bool = False) -> None:
        """Stop (or kill, with ``hard``) and start again on the same port and persistence."""
        if hard:
            self.kill()
        else:
            self.stop()
        self.start()

    def log_tail(self, n: int = 20) -> str:
        try:
            lines = self.log_path.read_text(encoding="utf-8", errors="replace").splitlines()
        except OSError:
            return "(no log)"
        return " | ".join(lines[-n:])


def publish_many(
    broker: PrivateBroker, messages: list[tuple[str, bytes]], *, timeout_s: float = 30.0
) -> None:
    """Publish ``(topic, payload)`` pairs at QoS 1 as a sensor would, and wait for every PUBACK.

    Uses paho directly (not ``monitor.io``'s MQTT modules) so the tests' sender is independent of the
    code under test.
    """
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion

    client = paho.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=paho.MQTTv5)
    client.max_inflight_messages_set(500)
    client.max_queued_messages_set(0)
    client.connect(broker.host, broker.port)
    client.loop_start()
    try:
        infos = [client.publish(topic, payload, qos=1) for topic, payload in messages]
        deadline = time.monotonic() + timeout_s
        for info in infos:
            info.wait_for_publish(max(0.0, deadline - time.monotonic()))
            if not info.is_published():
                raise RuntimeError("the private broker did not acknowledge a test message in time.")
    finally:
        client.disconnect()
        client.loop_stop()


def wait_until(predicate: Callable[[], bool], timeout_s: float, poll_s: float = 0.01) -> bool:
    """Poll ``predicate`` until it is true or ``timeout_s`` seconds pass; return its last value."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(poll_s)
    return bool(predicate())


def _make_broker(tmp: Path, *, deploy: bool = False) -> PrivateBroker:
    if find_mosquitto() is None:
        pytest.skip("the mosquitto binary is not installed (apt-get install mosquitto)")
    broker = PrivateBroker.with_deploy_settings(tmp) if deploy else PrivateBroker(tmp)
    broker.start()
    return broker


@pytest.fixture(scope="session")
def mosquitto() -> Iterator[PrivateBroker]:
    """A private broker shared by the whole session; do not stop or restart it."""
    with tempfile.TemporaryDirectory(prefix="ww-mosquitto-") as tmp:
        broker = _make_broker(Path(tmp))
        try:
            yield broker
        finally:
            broker.kill()


@pytest.fixture()
def fresh_mosquitto(tmp_path: Path) -> Iterator[PrivateBroker]:
    """A private broker for one test, free to be stopped, killed and restarted."""
    broker = _make_broker(tmp_path / "broker")
    try:
        yield broker
    finally:
        broker.kill()


@pytest.fixture()
def deploy_mosquitto(tmp_path: Path) -> Iterator[PrivateBroker]:
    """A private broker for one test with deploy/mosquitto.conf's broker-wide settings."""
    broker = _make_broker(tmp_path / "broker", deploy=True)
    try:
        yield broker
    finally:
        broker.kill()
