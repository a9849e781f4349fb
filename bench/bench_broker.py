"""Cost of the broker's persistence settings in deploy/mosquitto.conf, against Mosquitto saving
every 5 s (the earlier deploy setting), measured side by side on this host.

Mosquitto 2.0 saves by writing its whole in-memory state (sessions, queued messages with
their payloads) to a new file, syncing it and renaming it over the old one. The deploy
file saves after every change, so a broker crash loses nothing it acknowledged in an
earlier pass of its loop; the price is one such write per queued or acknowledged message,
which grows with the backlog queued for an offline service. The rows:

- publishing to the service's session while the service is offline (the backlog grows);
- publishing one reading at a time (each waiting for its PUBACK) while a consumer is
  online and acknowledging: the normal case, where the broker holds only what is in flight;
- draining the backlog when the consumer comes back;
- the time of one save per MB of backlog (one publish waited for at a known backlog).

Each row's floor is the same run with ``autosave_interval 5`` (time-based) instead, taken
right before it, and the ratio is deploy / floor. The payload is 22 kB, a 4,096-sample
float32 waveform in base64 as the sample plant sends it.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from broker import PrivateBroker, publish_many  # noqa: E402

PAYLOAD_BYTES = 22_000
#: The earlier deploy setting, for the floor: a save every 5 s, whatever changed.
EVERY_5_S = {"autosave_on_changes": "false", "autosave_interval": "5"}
TOPIC = "bench/m/p/waveform"


class Consumer:
    """A persistent-session QoS 1 subscriber that acknowledges on arrival (paho's automatic
    PUBACK): the broker's side of the service, without the service's own work."""

    def __init__(self, broker: PrivateBroker, client_id: str = "bench-consumer") -> None:
        self.count = 0
        self._lock = threading.Lock()
        self._ready = threading.Event()
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv5)
        self.client.on_connect = lambda c, *_: c.subscribe(TOPIC, qos=1)
        self.client.on_subscribe = lambda *_: self._ready.set()
        self.client.on_message = self._on_message
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = 3600
        self.client.connect(broker.host, broker.port, clean_start=False, properties=props)
        self.client.loop_start()
        if not self._ready.wait(10):
            raise RuntimeError("the bench consumer could not subscribe")

    def _on_message(self, *_a) -> None:
        with self._lock:
            self.count += 1

    def wait_for(self, n: int, timeout_s: float) -> bool:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with self._lock:
                if self.count >= n:
                    return True
            time.sleep(0.002)
        return False

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def _messages(n: int) -> list[tuple[str, bytes]]:
    return [(TOPIC, b"%08d" % i + b"x" * (PAYLOAD_BYTES - 8)) for i in range(n)]


def _one_run(overrides: dict[str, str] | None, n: int) -> dict[str, float]:
    """Rates (messages/s) for offline publish, drain and online publish, and the save time
    per MB of backlog (ms), on a fresh broker with the deploy settings (+ overrides)."""
    with tempfile.TemporaryDirectory(prefix="ww-bench-broker-") as tmp:
        broker = PrivateBroker.with_deploy_settings(Path(tmp), overrides=overrides)
        broker.start()
        try:
            msgs = _messages(n)
            # The normal case first, on an empty broker: the consumer keeps up, so the broker
            # holds only what is in flight. One reading at a time, each waiting for its
            # PUBACK (a plant's pace is far below the broker's; what counts is the time a
            # message costs).
            consumer = Consumer(broker)
            sender = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
            sender.connect(broker.host, broker.port)
            sender.loop_start()
            k = max(50, n // 4)
            t0 = time.perf_counter()
            for topic, payload in msgs[:k]:
                sender.publish(topic, payload, qos=1).wait_for_publish(60)
            online = k / (time.perf_counter() - t0)
            if not consumer.wait_for(k, 60):
                raise RuntimeError("the online consumer did not get every message within 60 s")
            consumer.close()  # the session stays; its backlog builds from here

            t1 = time.perf_counter()
            publish_many(broker, msgs, timeout_s=600)
            offline = n / (time.perf_counter() - t1)

            # One publish waited for on top of the backlog: the save it triggers rewrites it.
            waits = []
            for _ in range(7):
                t2 = time.perf_counter()
                sender.publish(TOPIC, b"p" * PAYLOAD_BYTES, qos=1).wait_for_publish(60)
                waits.append(time.perf_counter() - t2)
            sender.disconnect()
            sender.loop_stop()
            backlog_mb = (n + 7) * PAYLOAD_BYTES / 1e6
            per_mb_ms = statistics.median(waits) * 1000 / backlog_mb

            t3 = time.perf_counter()
            consumer = Consumer(broker)
            if not consumer.wait_for(n + 7, 600):
                raise RuntimeError("the backlog did not drain within 600 s")
            drain = (n + 7) / (time.perf_counter() - t3)
            consumer.close()
        finally:
            broker.kill()
    return {"offline": offline, "drain": drain, "online": online, "per_mb_ms": per_mb_ms}


def run(quick: bool = False) -> list[dict]:
    n = 200 if quick else 1000
    floor = _one_run(EVERY_5_S, n)
    deploy = _one_run(None, n)
    mb = n * PAYLOAD_BYTES / 1e6
    rows = []
    for key, name in (
        ("offline", f"publish to an offline session ({n} x 22 kB, backlog to {mb:.0f} MB)"),
        ("online", f"publish one by one, consumer online ({max(50, n // 4)} x 22 kB)"),
        ("drain", f"drain the {mb:.0f} MB backlog"),
    ):
        rows.append({"name": f"{name}, deploy saves", "value": round(deploy[key], 1),
                     "unit": "messages/s", "floor": round(floor[key], 1),
                     "ratio": round(deploy[key] / floor[key], 3)})
    rows.append({"name": "one save, per MB of backlog (deploy saves)", "value": round(deploy["per_mb_ms"], 2),
                 "unit": "ms/MB"})
    return rows


if __name__ == "__main__":  # pragma: no cover
    for row in run(quick="--quick" in sys.argv):
        print(row)
