"""Everything at once on embedded defaults: a private broker, SQLite in a folder, the
service, the dashboard and the sample plant's traffic replayed accelerated.

The broker is a private Mosquitto on a free port when the binary is installed, else (or
when ``embedded_broker`` asks for it) an embedded amqtt broker in this process (MQTT 3.1.1
only, so the service then speaks 3.1.1 and logs in with a user name: amqtt keeps offline
messages only for named clients).
"""

from __future__ import annotations

import asyncio
import math
import os
import secrets
import shlex
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.io.ingest_limits import IngestLimits
from monitor.io.replay import Message, StreamPublisher, load_streams, replay
from monitor.redact import redact

#: Where the sample streams live in a source checkout.
SAMPLES = Path(__file__).resolve().parent.parent / "sample_streams"
DEMO_USER = "demo"
DEMO_ADMIN = "demo-admin"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def find_mosquitto() -> str | None:
    """Path of the ``mosquitto`` binary, or None (Debian installs it in /usr/sbin)."""
    found = shutil.which("mosquitto")
    if found:
        return found
    return "/usr/sbin/mosquitto" if os.access("/usr/sbin/mosquitto", os.X_OK) else None


class DemoBroker:
    """A private broker for the demo; ``url``, ``protocol`` and ``username`` say how to reach it."""

    def __init__(self, workdir: Path, *, embedded: bool = False) -> None:
        self.workdir = workdir
        self.embedded = embedded
        self.port = free_port()
        self.url = f"mqtt://127.0.0.1:{self.port}"
        self.protocol = "5"
        self.username: str | None = None
        self.kind = ""
        self._proc: subprocess.Popen[bytes] | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        binary = None if self.embedded else find_mosquitto()
        if not binary:
            # Ready once its listener is bound; a bare TCP probe would only make it log an error.
            self._start_amqtt()
            return
        self._start_mosquitto(binary)
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline:
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError(f"the demo broker did not listen on port {self.port}.")

    def _start_mosquitto(self, binary: str) -> None:
        persist = self.workdir / "broker"
        persist.mkdir(parents=True, exist_ok=True)
        conf = persist / "mosquitto.conf"
        lines = [f"listener {self.port} 127.0.0.1", "allow_anonymous true", "persistence false",
                 "max_queued_messages 100000", "log_dest none"]
        if os.geteuid() == 0:
            lines.append("user root")
        conf.write_text("\n".join(lines) + "\n", encoding="utf-8")
        self._proc = subprocess.Popen([binary, "-c", str(conf)], stdout=subprocess.DEVNULL,
                                      stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL)
        self.kind = f"private Mosquitto ({binary})"

    def _start_amqtt(self) -> None:
        try:
            from amqtt.broker import Broker
        except ImportError as exc:
            raise RuntimeError(
                "no mosquitto binary and no embedded broker: install mosquitto or "
                "`pip install whirlwatch[embedded-broker]`, or pass --broker URL."
            ) from exc
        # amqtt 0.12 configures plugins in a ``plugins`` table. Its older ``auth`` and
        # ``sys_interval`` keys make it load every installed plugin instead, and then the
        # password-file plugin refuses any client that gives a user name. Only the anonymous
        # plugin, with anonymous clients refused: amqtt queues offline QoS 1 messages only
        # for a session that logged in with a user name, and with anonymous clients allowed
        # it marks every session anonymous, so the service's backlog would be dropped.
        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{self.port}"}},
            "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": False}},
        }
        self.protocol = "3.1.1"
        self.username = "whirlwatch-demo"
        ready = threading.Event()

        def run() -> None:
            loop = asyncio.new_event_loop()
            self._loop = loop
            asyncio.set_event_loop(loop)
            broker = Broker(config, loop=loop)
            loop.run_until_complete(broker.start())
            self._broker = broker
            ready.set()
            loop.run_forever()
            loop.run_until_complete(broker.shutdown())
            loop.close()

        self._thread = threading.Thread(target=run, name="amqtt", daemon=True)
        self._thread.start()
        if not ready.wait(15):
            raise RuntimeError(f"the embedded broker did not start on port {self.port}.")
        self.kind = "embedded amqtt broker (MQTT 3.1.1)"

    def stop(self) -> None:
        if self._proc is not None:
            self._proc.terminate()
            try:
                self._proc.wait(10)
            except subprocess.TimeoutExpired:
                self._proc.kill()
        if self._loop is not None:
            self._loop.call_soon_threadsafe(self._loop.stop)
            if self._thread is not None:
                self._thread.join(10)


def sample_messages() -> tuple[Path, list[Message], str]:
    """(registry file, every sample message in time order, where they came from).

    From ``sample_streams/`` in a checkout; else simulated now (installed as a wheel).
    """
    if (SAMPLES / "plant.toml").is_file():
        return SAMPLES / "plant.toml", load_streams(sorted(SAMPLES.glob("*.jsonl"))), str(SAMPLES)
    from monitor.model.registry_file import dump_registry
    from monitor.sim.scenarios import plant_messages, plant_registry

    tmp = Path(tempfile.mkdtemp(prefix="whirlwatch-plant-"))
    reg = tmp / "plant.toml"
    reg.write_text(dump_registry(plant_registry()), encoding="utf-8")
    return reg, list(plant_messages()), "the simulator (sample_streams/ not found)"


@dataclass
class DemoResult:
    data_dir: Path
    database_url: str
    broker_url: str
    dashboard_url: str | None
    user: str
    password: str
    published: int
    measurements: int
    alarms: int
    admin: str = ""
    admin_password: str = ""


#: Wall time the replay of the whole sample history takes, s.
REPLAY_S = 60.0


def reopen_command(database_url: str) -> str:
    """The command that serves the dashboard on the demo's store again, once it stopped."""
    return f"whirlwatch dashboard --database {shlex.quote(redact(database_url))}"


def run_demo(
    *,
    data_dir: Path,
    broker_url: str | None = None,
    database_url: str | None = None,
    machines: Path | None = None,
    duration_s: float | None = None,
    host: str = "127.0.0.1",
    port: int | None = 8050,
    say: Callable[[str], None] = print,
    stop: threading.Event | None = None,
    embedded_broker: bool = False,
    replay_s: float = REPLAY_S,
) -> DemoResult:
    """Run the demo until ``stop`` is set (Ctrl-C) or, when given, for ``duration_s``
    seconds; see the module. The replay takes about ``replay_s`` seconds; the service and
    the dashboard keep running after it.

    ``embedded_broker`` starts the in-process amqtt broker even when Mosquitto is installed.
    """
    from sqlalchemy import func, select

    from monitor.config import load_settings
    from monitor.model.registry_file import load_registry
    from monitor.service.service import Service
    from monitor.store import Store, create_user, import_registry, upgrade
    from monitor.store.models import Alarm, Measurement

    stop = stop or threading.Event()
    data_dir = data_dir.resolve()
    data_dir.mkdir(parents=True, exist_ok=True)
    db = database_url or f"sqlite:///{data_dir / 'whirlwatch.sqlite'}"
    registry_file, messages, origin = sample_messages()
    if machines is not None:
        registry_file = machines
    upgrade(db)
    password, admin_password = secrets.token_urlsafe(12), secrets.token_urlsafe(12)
    suffix = secrets.token_hex(2)
    user, admin = f"{DEMO_USER}-{suffix}", f"{DEMO_ADMIN}-{suffix}"
    store = Store.open(db)
    with store.transaction() as s:
        import_registry(s, load_registry(registry_file), user="demo")
        create_user(s, user, password, role="engineer")
        create_user(s, admin, admin_password, role="admin")
    store.close()

    broker = None
    protocol, username = "5", None
    if broker_url is None:
        broker = DemoBroker(data_dir, embedded=embedded_broker)
        broker.start()
        broker_url, protocol, username = broker.url, broker.protocol, broker.username
        say(f"broker: {broker.kind} at {broker_url}")
    server = None
    dashboard_url = None
    service = None
    published = 0
    try:
        settings = load_settings(None, env={}, overrides={
            "broker.url": broker_url, "database.url": db, "broker.protocol": protocol,
            "broker.username": username or "", "broker.client_id": f"whirlwatch-demo-{os.getpid()}",
            "service.data_dir": str(data_dir), "retention.enabled": False,
        })
        # The sample plant's six weeks end now; accept readings that old, and leave the
        # stale-stream check off (the replay's clock runs thousands of times faster).
        service = Service(settings, limits=IngestLimits(max_age_s=90 * 86400.0), stale_check_s=0)
        service.start()
        server, dashboard_url = _start_dashboard(db, host, port, say)
        say(f"database: {redact(db)}")
        if dashboard_url:
            say(f"dashboard: {dashboard_url}")
            say(f"  login: {user} / {password} (engineer: acknowledges alarms, edits modes)")
            say(f"  login: {admin} / {admin_password} (admin: also users, API tokens, audit)")
            say(f"  after the demo, open its data again with: {reopen_command(db)}")
        say(f"MQTT: subscribe to whirlwatch/+/alarms and whirlwatch/+/status at {redact(broker_url)}")
        say(f"replaying {len(messages)} messages from {origin}, accelerated")
        say("serving until Ctrl-C" if duration_s is None else f"stopping after {duration_s:g} s (or Ctrl-C)")
        pub = StreamPublisher(broker_url, username=username, protocol=protocol)
        counter = {"n": 0}
        t_end = math.inf if duration_s is None else time.monotonic() + duration_s

        def feed() -> None:
            from monitor.io.streams import parse_ts

            span = parse_ts(messages[-1][1]["ts"]) - parse_ts(messages[0][1]["ts"])
            counter["n"] = replay(messages, pub, speedup=max(1.0, span / replay_s), max_gap_s=1.0,
                                  stop=stop, progress=lambda i, _n: counter.__setitem__("n", i))

        feeder = threading.Thread(target=feed, name="replay", daemon=True)
        feeder.start()
        while not stop.wait(min(5.0, max(0.0, t_end - time.monotonic()))):
            if time.monotonic() >= t_end:
                break
            if feeder.is_alive():
                say(f"  published {counter['n']}/{len(messages)}, in flight {service.source.stats.in_flight if service.source else 0}")
            elif counter.get("told") is None:
                counter["told"] = 1
                say(f"replay finished: {counter['n']} messages published; the dashboard keeps serving"
                    + (" until Ctrl-C" if duration_s is None else ""))
        stop.set()
        feeder.join(30)
        published = counter["n"]
        pub.close()
    finally:
        if service is not None:
            service.stop()
        if server is not None:
            server.stop()
        if broker is not None:
            broker.stop()
    store = Store.open(db)
    with store.session() as s:
        n_meas = int(s.scalar(select(func.count()).select_from(Measurement)) or 0)
        n_alarms = int(s.scalar(select(func.count()).select_from(Alarm)) or 0)
    store.close()
    say(f"done: {published} messages published, {n_meas} measurements and {n_alarms} alarms in {redact(db)}")
    if dashboard_url:
        say(f"open the dashboard on this data again: {reopen_command(db)}")
    return DemoResult(data_dir, db, broker_url, dashboard_url, user, password, published, n_meas,
                      n_alarms, admin, admin_password)


def _start_dashboard(db: str, host: str, port: int | None, say: Callable[[str], None]) -> tuple[Any, str | None]:
    """The dashboard on the production server, as ``whirlwatch dashboard`` serves it."""
    try:
        from dashboard import create_app
        from dashboard.serving import ServerThread, make_server
    except ImportError:
        say("dashboard: not available in this installation")
        return None, None
    app = create_app({"DATABASE_URL": db})
    try:
        server = make_server(app, host, port or 0)
    except OSError:
        server = make_server(app, host, 0)
    running = ServerThread(server)
    return running, f"http://{host}:{running.port}/"


def install_stop_signals(stop: threading.Event) -> None:
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
