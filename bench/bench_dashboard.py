"""Dashboard request cost: overview and machine page with many machines and readings,
as a ratio to a trivial Flask route timed in the same run, plus SQL statements per page."""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

from sqlalchemy import event

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))


def _time(client, path: str, reps: int) -> float:
    client.get(path)
    ts = []
    for _ in range(reps):
        t = time.perf_counter()
        assert client.get(path).status_code == 200, path
        ts.append(time.perf_counter() - t)
    return statistics.median(ts)


def run(quick: bool) -> list[dict]:
    import re

    from dashboard_seed import PASSWORDS, seed

    from dashboard import create_app

    machines, per_point = (500, 1000) if not quick else (500, 40)
    with tempfile.TemporaryDirectory() as d:
        url = f"sqlite:///{d}/bench.sqlite"
        seed(url, machines=machines, readings_per_point=per_point)
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "bench"})
        app.add_url_rule("/trivial", "trivial", lambda: "ok")
        c = app.test_client()
        html = c.get("/login").get_data(as_text=True)
        tok = re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)
        c.post("/login", data={"username": "vic", "password": PASSWORDS["vic"], "csrf_token": tok})
        reps = 3 if quick else 10
        floor = _time(c, "/trivial", 50)
        eng = app.extensions["whirlwatch_engine"]
        rows = []
        n_meas = machines * 2 * per_point
        for name, path in (("overview API (/api/v1/machines)", "/api/v1/machines"),
                           ("machine API (/api/v1/machines/<id>)", "/api/v1/machines/fan-250"),
                           ("machine trends, 7 days, 500 points", "/api/v1/machines/fan-250/trends?max_points=500&from=0")):
            t = _time(c, path, reps)
            count = {"n": 0}

            def cb(*a, _c=count, **k):
                _c["n"] += 1

            event.listen(eng, "before_cursor_execute", cb)
            c.get(path)
            event.remove(eng, "before_cursor_execute", cb)
            rows.append({"name": f"{name}, {machines} machines, {n_meas} readings", "value": t * 1000, "unit": "ms",
                         "floor": floor * 1000, "ratio": t / floor})
            rows.append({"name": f"  SQL statements for {path.split('?')[0]}", "value": count["n"], "unit": "statements"})
        rows.append({"name": "trivial Flask route (floor)", "value": floor * 1000, "unit": "ms"})
        return rows


if __name__ == "__main__":
    for r in run(quick="--quick" in sys.argv):
        print(r)
