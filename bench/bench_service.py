"""End to end: readings per second through a private Mosquitto into the store, against
the bare analysis rate of the same readings (no I/O) and the bare paho receive rate.

One service process, then two in a shared subscription (the broker's queue is filled
first while the services are down, with persistent sessions, so the publisher does not
compete for the CPU); publish-to-commit latency at half the one-process rate, from a paced
publisher in its own process, measured after a warm-up at that rate has been stored, in
three runs of which the median is reported (each run's figures beside it); last, the
service alone reading the same kind of backlog from a stream file (no broker).
Waveforms: 16,384 float32 samples at 25.6 kHz with a measured speed.
"""

from __future__ import annotations

import contextlib
import json
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from broker import PrivateBroker, publish_many  # noqa: E402
from sqlalchemy import func, select  # noqa: E402

from monitor.analysis.waveform import analyse_waveform  # noqa: E402
from monitor.io.ingest import decode_message  # noqa: E402
from monitor.io.mqtt_settings import no_delay  # noqa: E402
from monitor.io.streams import encode_f32  # noqa: E402
from monitor.model.registry_file import parse_registry  # noqa: E402
from monitor.model.timefmt import iso_utc  # noqa: E402
from monitor.store import Store, import_registry, upgrade  # noqa: E402
from monitor.store.models import Measurement  # noqa: E402

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
    for topic, payload in msgs[:8]:  # warm-up: FFT plans, caches
        w = decode_message(topic, payload, registry)
        m = registry.machine(w.machine)
        analyse_waveform(w, m, m.point(w.point))
    t0 = time.perf_counter()
    for topic, payload in msgs:
        w = decode_message(topic, payload, registry)
        m = registry.machine(w.machine)
        analyse_waveform(w, m, m.point(w.point))
    return len(msgs) / (time.perf_counter() - t0)


def _bare_receive(broker: PrivateBroker, msgs) -> float:
    """paho alone draining the same backlog from a persistent session (QoS 1, no work)."""
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    got = threading.Event()
    n = {"k": 0}

    def on_msg(*_a):
        n["k"] += 1
        if n["k"] == len(msgs):
            got.set()

    def client() -> paho.Client:
        c = paho.Client(CallbackAPIVersion.VERSION2, client_id="bare", protocol=paho.MQTTv5)
        c.on_socket_open = no_delay
        c.on_message = on_msg
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = 600
        props.ReceiveMaximum = 32  # the service's in-flight window
        c.connect(broker.host, broker.port, clean_start=False, properties=props)
        return c

    c = client()
    c.subscribe("bare/#", qos=1)
    c.loop_start()
    time.sleep(0.3)
    c.disconnect()
    c.loop_stop()
    publish_many(broker, [("bare/" + t, p) for t, p in msgs], timeout_s=120)
    c = client()
    t0 = time.perf_counter()
    c.loop_start()
    got.wait(120)
    rate = n["k"] / max(1e-9, time.perf_counter() - t0)
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
    shares[tag] = [_stopped(workdir / f"{c}.log") for c in cids]
    _drop_sessions(broker, cids)
    return rate


def _drop_sessions(broker: PrivateBroker, cids: list[str]) -> None:
    """End the persistent sessions of ``cids`` at the broker: otherwise it keeps queueing a
    copy of every later message for each of them (the next phases' load, not theirs)."""
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion

    for cid in cids:
        c = paho.Client(CallbackAPIVersion.VERSION2, client_id=cid, protocol=paho.MQTTv5)
        c.connect(broker.host, broker.port, clean_start=True)  # session expiry 0: dropped at disconnect
        c.loop_start()
        time.sleep(0.2)
        c.disconnect()
        c.loop_stop()


#: Per run tag, each process's counters from its "service stopped" log line.
shares: dict[str, list[dict]] = {}


def _stopped(path: Path) -> dict:
    """The counters of the last "service stopped" line of a service log."""
    for line in reversed(path.read_text(errors="replace").splitlines()):
        if '"service stopped"' in line:
            d = json.loads(line)
            return {k: d.get(k) for k in ("received", "acked", "batches", "db_retries", "batch_reruns")}
    return {}


def _paced_publisher(host: str, port: int, rate_hz: float, n_warm: int, n_meas: int, t_end: float,
                     sent_path: str, go_path: str) -> None:
    """Child process: publish ``n_warm`` messages at ``rate_hz``, wait for ``go_path`` (the
    backlog drained), publish ``n_meas`` more at ``rate_hz`` and write their send times."""
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion

    msgs = _messages(n_warm + n_meas, t_end)
    c = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
    c.on_socket_open = no_delay  # a sensor's own stack would not wait 40 ms on Nagle
    c.max_inflight_messages_set(1000)
    c.connect(host, port)
    c.loop_start()

    def paced(part: list[tuple[str, bytes]]) -> dict[str, float]:
        # Keys decoded before the clock starts: parsing a 90 kB payload per message would
        # take CPU from the service on a small host (the publisher shares its cores).
        keys = [json.loads(payload)["ts"] for _, payload in part]
        sent: dict[str, float] = {}
        t0 = time.monotonic()
        for k, (topic, payload) in enumerate(part):
            wait = t0 + k / rate_hz - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            sent[keys[k]] = time.time()
            c.publish(topic, payload, qos=1)
        return sent

    paced(msgs[:n_warm])
    while not Path(go_path).exists():
        time.sleep(0.02)
    sent = paced(msgs[n_warm:])
    Path(sent_path).write_text(json.dumps(sent))
    time.sleep(0.5)
    c.disconnect()
    c.loop_stop()


def _latency(broker, url, workdir, rate_hz: float, n_meas: int, warm_up: int, tag: str = "lat") -> list[float]:
    """Publish-to-commit latency (stored_at - publish time, s) at ``rate_hz``.

    The publisher is a separate process (its own interpreter and GIL, paced by its own
    clock). ``warm_up`` messages are published at the same rate first and the measured ones
    start only once they are all stored, so the figure is for a service in its steady
    state with no backlog left from its start."""
    p = _spawn(broker, url, workdir, tag, tag)
    _wait_log(workdir / f"{tag}.log", '"service started"')
    base = _count(url)
    sent_path, go_path = workdir / f"{tag}-sent.json", workdir / f"{tag}-go"
    pub = subprocess.Popen([sys.executable, __file__, "--paced-publisher", broker.host, str(broker.port),
                            repr(rate_hz), str(warm_up), str(n_meas), repr(time.time()),
                            str(sent_path), str(go_path)], cwd=ROOT)
    s = Store.open(url)
    lat: list[float] = []
    try:
        end = time.monotonic() + 120
        while _count(url) < base + warm_up and time.monotonic() < end:
            time.sleep(0.05)
        go_path.write_text("go")
        pub.wait(120)
        sent = json.loads(sent_path.read_text())
        end = time.monotonic() + 60
        while time.monotonic() < end:
            with s.session() as ses:
                rows = ses.execute(select(Measurement.ts, Measurement.stored_at)).all()
            lat = [r.stored_at.timestamp() - sent[iso_utc(r.ts.timestamp())] for r in rows
                   if iso_utc(r.ts.timestamp()) in sent]
            if len(lat) >= n_meas:
                break
            time.sleep(0.2)
    finally:
        s.close()
        if pub.poll() is None:
            pub.kill()
        p.send_signal(signal.SIGTERM)
        p.wait(30)
        _drop_sessions(broker, [tag])
    return lat


def _from_file(workdir: Path, msgs) -> float:
    """The service alone, in this process, reading the messages from a stream file
    (monitor/io/source.py StreamFileSource; no broker) into a fresh SQLite store, batches
    of 32: readings per second from the first batch to the last acknowledgement."""
    import gc

    from monitor.config import load_settings
    from monitor.detection.kernels import warm_up
    from monitor.io.source import StreamFileSource
    from monitor.io.streams import write_stream
    from monitor.service.service import Service

    path = workdir / "file-source.jsonl"
    write_stream(path, [(topic, json.loads(payload)) for topic, payload in msgs])
    url = _fresh_db(workdir, "file.sqlite")
    settings = load_settings(None, env={}, overrides={
        "broker.url": "mqtt://127.0.0.1:1", "database.url": url, "broker.client_id": "bench-file",
        "retention.enabled": False})
    source = StreamFileSource(path)
    svc = Service(settings, source=source, stale_check_s=0)
    warm_up()  # what the service's start does first, done before the clock starts
    gc.collect()
    gc.freeze()
    t0 = time.perf_counter()
    try:
        svc.start()
        if not source.wait_done(300):
            raise RuntimeError("the stream file was not worked through in 300 s")
        rate = source.stats.acked / (time.perf_counter() - t0)
    finally:
        svc.stop()
    return rate


def _fresh_db(workdir: Path, name: str) -> str:
    url = f"sqlite:///{workdir / name}"
    _seed(url)
    return url


def _seed(url: str) -> None:
    upgrade(url)
    s = Store.open(url)
    with s.transaction() as ses:
        import_registry(ses, parse_registry(REG))
    s.close()


PG_DSN = "host=127.0.0.1 port=5432 user=postgres dbname=test"
PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


def _pg_schema() -> str | None:
    """A fresh schema in PostgreSQL's ``test`` database, or None when it is unreachable."""
    try:
        import psycopg

        schema = f"bench_{uuid.uuid4().hex[:10]}"
        with psycopg.connect(PG_DSN, autocommit=True, connect_timeout=3) as conn:
            conn.execute(f'CREATE SCHEMA "{schema}"')
        return schema
    except Exception:
        return None


def _pg_drop(schema: str) -> None:
    import psycopg

    with psycopg.connect(PG_DSN, autocommit=True) as conn:
        conn.execute(f'DROP SCHEMA "{schema}" CASCADE')


def _fresh_pg(schema: str, name: str) -> str:
    import psycopg

    sub = f"{schema}_{name}"
    with psycopg.connect(PG_DSN, autocommit=True) as conn:
        conn.execute(f'CREATE SCHEMA "{sub}"')
    url = f"{PG_URL}?options=-csearch_path%3D{sub}"
    _seed(url)
    return url


def _pct(values: list[float], q: float) -> float:
    return values[min(len(values) - 1, int(q * len(values)))] if values else float("nan")


def run(quick: bool = False) -> list[dict]:
    """Rows for bench/run.py.

    This kind of host changes speed by up to 2x within minutes (other tenants), so every
    ratio is taken against a floor measured right next to it: the bare analysis rate just
    before the one-process run, the one-process run just before the two-process run, and a
    fresh one-process maximum just before the latency run (whose rate is half of it)."""
    count = 80 if quick else 600
    registry = parse_registry(REG)
    rows: list[dict] = []
    e2e: dict[str, float] = {}
    bare: dict[str, float] = {}
    schemas: list[str] = []
    with tempfile.TemporaryDirectory(prefix="ww-bench-") as tmp:
        work = Path(tmp)
        # Saves every 5 s, not after every change as deploy/mosquitto.conf does: this bench
        # measures the service, and per-change saves would make the broker rewrite its
        # backlog for every message (bench/bench_broker.py measures that cost).
        broker = PrivateBroker(work / "broker", autosave_interval_s=5)
        # As docs/service.md recommends for a deployment: without it Mosquitto holds the
        # tail of each delivery for the receiver's delayed ACK (~40 ms on Linux).
        with open(broker.config_path, "a", encoding="utf-8") as conf:
            conf.write("set_tcp_nodelay true\n")
        broker.start()
        try:
            msgs = _messages(count, time.time())
            recv = _bare_receive(broker, msgs)

            def timed(tag: str, url: str, procs: int) -> None:
                e2e[tag] = _end_to_end(broker, url, work, _messages(count, time.time()), procs, tag)

            bare["one"] = _bare_analysis(msgs, registry)
            timed("one", _fresh_db(work, "one.sqlite"), 1)
            timed("two", _fresh_db(work, "two.sqlite"), 2)
            pg = _pg_schema()
            if pg is not None:
                schemas.append(pg)
                bare["pgone"] = _bare_analysis(msgs, registry)
                timed("pgone", _fresh_pg(pg, "one"), 1)
                timed("pgtwo", _fresh_pg(pg, "two"), 2)
            bare["lat"] = _bare_analysis(msgs, registry)
            timed("latmax", _fresh_db(work, "latmax.sqlite"), 1)
            lat_n = 40 if quick else 240
            warm = 10 if quick else 60
            # Three runs at the same rate, each on a fresh store: a p99 over 240 readings is
            # the third-worst of them, and this host's tail moves by several times from one
            # run to the next; the median run's figures are reported, the others beside them.
            lat_runs = [sorted(_latency(broker, _fresh_db(work, f"lat{k}.sqlite"), work, e2e["latmax"] / 2,
                                        lat_n, warm, tag=f"lat{k}")) for k in range(1 if quick else 3)]
            bare["file"] = _bare_analysis(msgs, registry)
            e2e["file"] = _from_file(work, _messages(count, time.time()))
        finally:
            broker.kill()
            for schema in schemas:
                for name in (f"{schema}_one", f"{schema}_two", schema):
                    with contextlib.suppress(Exception):
                        _pg_drop(name)
    per_reading_s = 1.0 / bare["lat"]
    p50s = [statistics.median(lat) if lat else float("nan") for lat in lat_runs]
    p99s = [_pct(lat, 0.99) for lat in lat_runs]
    p50, p99 = statistics.median(p50s), statistics.median(p99s)
    one, two = e2e["one"], e2e["two"]
    rows += [
        {"name": "bare analysis (16384 f32 samples, decode + analyse, 1 core)", "value": round(bare["one"], 1),
         "unit": "readings/s", "runs": {k: round(v, 1) for k, v in bare.items()}},
        {"name": "bare paho receive (ingest ceiling)", "value": round(recv, 1), "unit": "messages/s"},
        {"name": "end to end, 1 process (SQLite)", "value": round(one, 1), "unit": "readings/s",
         "floor": round(bare["one"], 1), "ratio": round(one / bare["one"], 2), "target": ">= 0.7",
         "met": one / bare["one"] >= 0.7},
        {"name": "end to end, 2 processes shared (SQLite)", "value": round(two, 1), "unit": "readings/s",
         "floor": round(one, 1), "ratio": round(two / one, 2), "target": ">= 1.5", "met": two / one >= 1.5,
         "per_process": shares.get("two")},
    ]
    if "pgone" in e2e:
        rows += [
            {"name": "end to end, 1 process (PostgreSQL)", "value": round(e2e["pgone"], 1),
             "unit": "readings/s", "floor": round(bare["pgone"], 1), "ratio": round(e2e["pgone"] / bare["pgone"], 2)},
            {"name": "end to end, 2 processes shared (PostgreSQL)", "value": round(e2e["pgtwo"], 1),
             "unit": "readings/s", "floor": round(e2e["pgone"], 1),
             "ratio": round(e2e["pgtwo"] / e2e["pgone"], 2), "target": ">= 1.5",
             "met": e2e["pgtwo"] / e2e["pgone"] >= 1.5, "per_process": shares.get("pgtwo")},
        ]
    else:
        rows.append({"name": "end to end on PostgreSQL", "value": None,
                     "note": "PostgreSQL at 127.0.0.1:5432 (db test) unreachable: not measured"})
    half = e2e["latmax"] / 2
    rows += [
        {"name": "end to end, 1 process (SQLite), again before the latency run", "value": round(e2e["latmax"], 1),
         "unit": "readings/s", "floor": round(bare["lat"], 1), "ratio": round(e2e["latmax"] / bare["lat"], 2)},
        {"name": f"publish-to-commit p50 at half rate ({half:.0f}/s, SQLite)",
         "value": round(p50 * 1000, 1), "unit": "ms",
         "floor": round(per_reading_s * 1000, 2), "ratio": round(p50 / per_reading_s, 1),
         "runs_ms": [round(v * 1000, 1) for v in p50s]},
        {"name": f"publish-to-commit p99 at half rate ({half:.0f}/s, SQLite)",
         "value": round(p99 * 1000, 1), "unit": "ms",
         "floor": round(per_reading_s * 1000, 2), "ratio": round(p99 / per_reading_s, 1), "target": "<= 20",
         "met": p99 / per_reading_s <= 20, "runs_ms": [round(v * 1000, 1) for v in p99s]},
        {"name": "service from a stream file, 1 process (SQLite, no broker)", "value": round(e2e["file"], 1),
         "unit": "readings/s", "floor": round(bare["file"], 1), "ratio": round(e2e["file"] / bare["file"], 2)},
    ]
    return rows


if __name__ == "__main__":
    if sys.argv[1:2] == ["--paced-publisher"]:
        a = sys.argv[2:]
        _paced_publisher(a[0], int(a[1]), float(a[2]), int(a[3]), int(a[4]), float(a[5]), a[6], a[7])
        sys.exit(0)
    for r in run(quick="--quick" in sys.argv):
        print(r)
