"""End to end: readings per second through a private Mosquitto into the store, against
the bare analysis rate of the same readings (no I/O) and the bare paho receive rate.

One service process, then two in a shared subscription (the broker's queue is filled
first while the services are down, with persistent sessions, so the publisher does not
compete for the CPU); publish-to-commit latency at half the one-process rate.
Waveforms: 16,384 float32 samples at 25.6 kHz with a measured speed.
"""

from __future__ import annotations

import json
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from broker import PrivateBroker, publish_many  # noqa: E402
from sqlalchemy import func, select  # noqa: E402

from monitor.analysis import analyse_waveform  # noqa: E402
from monitor.ingest import decode_message  # noqa: E402
from monitor.registry import parse_registry  # noqa: E402
from monitor.store import Store, import_registry, upgrade  # noqa: E402
from monitor.store.models import Measurement  # noqa: E402
from monitor.streams import encode_f32, iso_utc  # noqa: E402

N, FS = 16_384, 25_600.0
REG = {"machines": [{
    "id": f"m{i}", "class": "group2/rigid", "speed_range_rpm": [600, 3600], "excitation_orders": [1, 2, 7],
    "points": [{"id": "de-h", "quantity": "acceleration", "unit": "m/s^2", "fs_hz": FS}],
    "modes": [{"name": "frame", "frequency_hz": 31.0, "damping_ratio": 0.03}],
} for i in range(4)]}


def _messages(count: int, t_end: float) -> list[tuple[str, bytes]]:
    rng = np.random.default_rng(1)
    t = np.arange(N) / FS
    out = []
    for k in range(count):
        m = f"m{k % 4}"
        x = 2.0 * np.sin(2 * np.pi * 24.75 * t) + 0.5 * np.sin(2 * np.pi * 173.25 * t) + rng.normal(0, 0.2, N)
        body = {"ts": iso_utc(t_end - (count - k) * 1.0), "fs": FS, "unit": "m/s^2",
                "samples_f32": encode_f32(x), "speed_hz": 24.75}
        out.append((f"whirlwatch/{m}/de-h/waveform", json.dumps(body).encode()))
    return out


def _bare_analysis(msgs, registry) -> float:
    t0 = time.perf_counter()
    for topic, payload in msgs:
        w = decode_message(topic, payload, registry)
        m = registry.machine(w.machine)
        analyse_waveform(w, m, m.point(w.point))
    return len(msgs) / (time.perf_counter() - t0)


def _bare_receive(broker: PrivateBroker, msgs) -> float:
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion

    got = threading.Event()
    n = {"k": 0, "t0": 0.0}

    def on_msg(*_a):
        if n["k"] == 0:
            n["t0"] = time.perf_counter()
        n["k"] += 1
        if n["k"] == len(msgs):
            got.set()

    c = paho.Client(CallbackAPIVersion.VERSION2, client_id="bare", protocol=paho.MQTTv5)
    c.on_message = on_msg
    c.connect(broker.host, broker.port)
    c.subscribe("bare/#", qos=1)
    c.loop_start()
    time.sleep(0.3)
    publish_many(broker, [("bare/" + t, p) for t, p in msgs])
    got.wait(60)
    rate = (n["k"] - 1) / max(1e-9, time.perf_counter() - n["t0"])
    c.disconnect()
    c.loop_stop()
    return rate


def _count(url: str) -> int:
    s = Store.open(url)
    try:
        with s.session() as ses:
            return int(ses.scalar(select(func.count()).select_from(Measurement)) or 0)
    finally:
        s.close()


def _spawn(broker, url, workdir, cid, group):
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "run", "--broker", broker.url,
           "--database", url, "--client-id", cid, "--shared-group", group]
    log = open(workdir / f"{cid}.log", "ab")  # noqa: SIM115
    return subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, cwd=ROOT)


def _wait_log(path: Path, text: str, count: int = 1, timeout: float = 30) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if path.exists() and path.read_text(errors="replace").count(text) >= count:
            return
        time.sleep(0.05)
    raise RuntimeError(f"{path}: no {text!r}")


def _end_to_end(broker, url, workdir, msgs, procs: int, tag: str) -> float:
    """Fill the queue while the services are down, then time the drain."""
    cids = [f"{tag}-{i}" for i in range(procs)]
    ps = [_spawn(broker, url, workdir, c, tag) for c in cids]  # creates the sessions
    for c in cids:
        _wait_log(workdir / f"{c}.log", '"service started"')
    for p in ps:
        p.send_signal(signal.SIGTERM)
        p.wait(30)
    base = _count(url)
    publish_many(broker, msgs, timeout_s=120)
    ps = [_spawn(broker, url, workdir, c, tag) for c in cids]
    for c in cids:
        _wait_log(workdir / f"{c}.log", '"service started"', 2)
    t0 = time.perf_counter()
    while _count(url) < base + len(msgs) and time.perf_counter() - t0 < 300:
        time.sleep(0.1)
    rate = len(msgs) / (time.perf_counter() - t0)
    for p in ps:
        p.send_signal(signal.SIGTERM)
        p.wait(30)
    return rate


def _latency(broker, url, workdir, msgs, rate_hz: float) -> list[float]:
    """Publish at ``rate_hz``; latency = commit time (stored_at) - publish time, s."""
    p = _spawn(broker, url, workdir, "lat", "lat")
    _wait_log(workdir / "lat.log", '"service started"')
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion

    c = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
    c.connect(broker.host, broker.port)
    c.loop_start()
    sent: dict[str, float] = {}
    t0 = time.monotonic()
    for k, (topic, payload) in enumerate(msgs):
        wait = t0 + k / rate_hz - time.monotonic()
        if wait > 0:
            time.sleep(wait)
        sent[json.loads(payload)["ts"]] = time.time()
        c.publish(topic, payload, qos=1)
    base_n = len(msgs)
    end = time.monotonic() + 60
    s = Store.open(url)
    lat: list[float] = []
    while time.monotonic() < end:
        with s.session() as ses:
            rows = ses.execute(select(Measurement.ts, Measurement.stored_at)).all()
        lat = [r.stored_at.timestamp() - sent[iso_utc(r.ts.timestamp())] for r in rows
               if iso_utc(r.ts.timestamp()) in sent]
        if len(lat) >= base_n:
            break
        time.sleep(0.2)
    s.close()
    c.disconnect()
    c.loop_stop()
    p.send_signal(signal.SIGTERM)
    p.wait(30)
    return lat


def _fresh_db(workdir: Path, name: str) -> str:
    url = f"sqlite:///{workdir / name}"
    upgrade(url)
    s = Store.open(url)
    with s.transaction() as ses:
        import_registry(ses, parse_registry(REG))
    s.close()
    return url


def run(quick: bool = False) -> list[dict]:
    count = 80 if quick else 300
    registry = parse_registry(REG)
    rows: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="ww-bench-") as tmp:
        work = Path(tmp)
        broker = PrivateBroker(work / "broker")
        broker.start()
        try:
            msgs = _messages(count, time.time())
            bare = _bare_analysis(msgs, registry)
            recv = _bare_receive(broker, msgs)
            one = _end_to_end(broker, _fresh_db(work, "one.sqlite"), work, _messages(count, time.time()), 1, "one")
            two = _end_to_end(broker, _fresh_db(work, "two.sqlite"), work, _messages(count, time.time()), 2, "two")
            lat_n = 40 if quick else 120
            lat = sorted(_latency(broker, _fresh_db(work, "lat.sqlite"), work,
                                  _messages(lat_n, time.time()), one / 2))
        finally:
            broker.kill()
    per_reading_s = 1.0 / bare
    p50 = statistics.median(lat) if lat else float("nan")
    p99 = lat[min(len(lat) - 1, int(0.99 * len(lat)))] if lat else float("nan")
    rows += [
        {"name": "bare analysis (16384 f32 samples)", "value": round(bare, 1), "unit": "readings/s"},
        {"name": "bare paho receive (ingest ceiling)", "value": round(recv, 1), "unit": "messages/s"},
        {"name": "end to end, 1 process (SQLite)", "value": round(one, 1), "unit": "readings/s",
         "floor": round(bare, 1), "ratio": round(one / bare, 2), "target": ">= 0.7"},
        {"name": "end to end, 2 processes shared (SQLite)", "value": round(two, 1), "unit": "readings/s",
         "floor": round(one, 1), "ratio": round(two / one, 2), "target": ">= 1.5"},
        {"name": "publish-to-commit p50 at half rate", "value": round(p50 * 1000, 1), "unit": "ms",
         "floor": round(per_reading_s * 1000, 1), "ratio": round(p50 / per_reading_s, 1)},
        {"name": "publish-to-commit p99 at half rate", "value": round(p99 * 1000, 1), "unit": "ms",
         "floor": round(per_reading_s * 1000, 1), "ratio": round(p99 / per_reading_s, 1), "target": "<= 20"},
    ]
    return rows


if __name__ == "__main__":
    for r in run(quick="--quick" in sys.argv):
        print(r)
