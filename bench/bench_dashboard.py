"""Dashboard request cost: overview and machine page with many machines and readings,
as a ratio to a trivial Flask route timed in the same run, plus SQL statements per page.

The overview at plant scale (:func:`overview_rows`): the first page of ``GET
/api/v1/machines`` (and a filtered, sorted page deep in the list) on plants of 500 and
5,000 machines, timed in turns with a trivial route in the same process; each turn gives
the ratios 5,000 to 500 and 5,000 to the trivial route, and the rows report their median
and range over the turns. Targets (issue "Scale"): 5,000 machines within 2x of 500, and
under 20x the trivial route. The plants are built by tests/dashboard_seed.py
``seed_large``: three machines through the service's batch path, the rest bulk copies of
their registry rows and stored statuses.

``python bench/bench_dashboard.py overview [--quick] [--postgres]`` runs the overview part
alone (``--postgres``: on PostgreSQL at 127.0.0.1:5432, database ``test``)."""

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


#: Plant sizes of the overview benchmark, machines.
SIZES = (500, 5000)
#: The overview pages timed, and whether the targets apply: the first page as the overview
#: opens and refreshes (worst first), the first page by name (both read in index order),
#: and a text search sorted by margin, which reads every machine's name (no index serves
#: a substring) and so grows with the plant: timed to show by how much.
OVERVIEW_PATHS = (("/api/v1/machines", True), ("/api/v1/machines?sort=name", True),
                  ("/api/v1/machines?q=fan&sort=margin", False))


def _signed_in(url: str):
    import re

    from dashboard_seed import PASSWORDS

    from dashboard import create_app

    app = create_app({"DATABASE_URL": url, "SECRET_KEY": "bench"})
    app.add_url_rule("/trivial", "trivial", lambda: "ok")
    c = app.test_client()
    html = c.get("/login").get_data(as_text=True)
    tok = re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)
    assert c.post("/login", data={"username": "vic", "password": PASSWORDS["vic"], "csrf_token": tok}).status_code == 302
    return app, c


def _statements(app, client, path: str) -> int:
    count = {"n": 0}

    def cb(*a, **k):
        count["n"] += 1

    eng = app.extensions["whirlwatch_engine"]
    event.listen(eng, "before_cursor_execute", cb)
    try:
        assert client.get(path).status_code == 200, path
    finally:
        event.remove(eng, "before_cursor_execute", cb)
    return count["n"]


def overview_rows(quick: bool, backend: str = "sqlite") -> list[dict]:
    """The overview API at 500 and 5,000 machines against a trivial route, in turns."""
    import contextlib

    from dashboard_seed import seed_large
    from fixtures_db import fresh_database

    turns, reps = (3, 5) if quick else (7, 20)
    rows: list[dict] = []
    with tempfile.TemporaryDirectory() as d, contextlib.ExitStack() as stack:
        apps = {}
        for n in SIZES:
            url = stack.enter_context(fresh_database(backend, Path(d)))
            seed_large(url, n)
            apps[n] = _signed_in(url)
            stack.callback(apps[n][0].extensions["whirlwatch_engine"].dispose)
        trivial = apps[SIZES[0]][1]
        for path, targeted in OVERVIEW_PATHS:
            per_turn: dict[str, list[float]] = {"floor": [], "small": [], "large": []}
            for _ in range(turns):
                per_turn["floor"].append(_time(trivial, "/trivial", 50))
                per_turn["small"].append(_time(apps[SIZES[0]][1], path, reps))
                per_turn["large"].append(_time(apps[SIZES[1]][1], path, reps))
            growth = [b / a for a, b in zip(per_turn["small"], per_turn["large"], strict=True)]
            vs_floor = [b / f for f, b in zip(per_turn["floor"], per_turn["large"], strict=True)]
            small_floor = [a / f for f, a in zip(per_turn["floor"], per_turn["small"], strict=True)]
            label = path.removeprefix("/api/v1")
            rows.append({"name": f"overview {label}, {SIZES[0]} machines ({backend})",
                         "value": statistics.median(per_turn["small"]) * 1000, "unit": "ms",
                         "floor": statistics.median(per_turn["floor"]) * 1000,
                         "ratio": statistics.median(small_floor),
                         "range": [min(small_floor), max(small_floor)]})
            rows.append({"name": f"overview {label}, {SIZES[1]} machines ({backend})",
                         "value": statistics.median(per_turn["large"]) * 1000, "unit": "ms",
                         "floor": statistics.median(per_turn["floor"]) * 1000,
                         "ratio": statistics.median(vs_floor), "range": [min(vs_floor), max(vs_floor)],
                         **({"target": "< 20x trivial route", "met": statistics.median(vs_floor) < 20}
                            if targeted else {})})
            rows.append({"name": f"  {SIZES[1]} over {SIZES[0]} machines, median of {turns} turns",
                         "value": statistics.median(growth), "unit": "x", "range": [min(growth), max(growth)],
                         **({"target": "< 2x", "met": statistics.median(growth) < 2} if targeted else {})})
            counts = [_statements(apps[n][0], apps[n][1], path) for n in SIZES]
            rows.append({"name": f"  SQL statements per page at {SIZES[0]} / {SIZES[1]} machines",
                         "value": counts[1], "unit": f"statements ({counts[0]} at {SIZES[0]})",
                         "target": "flat", "met": counts[0] == counts[1]})
        rows.append({"name": "trivial Flask route (floor), median of turns",
                     "value": statistics.median(per_turn["floor"]) * 1000, "unit": "ms"})
    return rows


def run(quick: bool) -> list[dict]:
    return overview_rows(quick) + page_rows(quick)


def page_rows(quick: bool) -> list[dict]:
    """The overview, a machine's page and its trends on one plant of 500 machines with
    many readings."""
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
    quick = "--quick" in sys.argv
    if "overview" in sys.argv:
        result = overview_rows(quick, "postgresql" if "--postgres" in sys.argv else "sqlite")
    else:
        result = run(quick)
    for r in result:
        print(r)
