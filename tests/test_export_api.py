"""Trend and spectrum exports (CSV and Parquet) against the JSON API, on a store seeded
through the service's batch path (tests/dashboard_seed.py), SQLite and PostgreSQL.

The CSV is read back with Python's csv module (RFC 4180 reader) and the Parquet with
pyarrow (the Apache Parquet reference implementation's Python binding): each holds the
values the JSON trend and spectrum routes return for the same readings.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import math

import pyarrow.parquet as pq
import pytest
from dashboard_seed import PASSWORDS, seed
from fixtures_db import fresh_database

from dashboard import create_app
from dashboard.export_api import MAX_EXPORT_ROWS
from monitor.model.timefmt import parse_iso_utc

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
READINGS = 12  # readings per point the fixture seeds (a count, not a measured value)


@pytest.fixture(scope="module", params=BACKENDS)
def client(request, tmp_path_factory):
    with fresh_database(request.param, tmp_path_factory.mktemp("export")) as url:
        seed(url, machines=1, readings_per_point=READINGS)
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
        c = app.test_client()
        tok = _csrf(c, "/login")
        r = c.post("/login", data={"username": "vic", "password": PASSWORDS["vic"], "csrf_token": tok})
        assert r.status_code == 302
        yield c
        app.extensions["whirlwatch_engine"].dispose()


def _csrf(c, path):
    import re

    html = c.get(path).get_data(as_text=True)
    return re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)


def _csv(resp) -> list[dict[str, str]]:
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.mimetype == "text/csv"
    return list(csv.DictReader(io.StringIO(resp.get_data(as_text=True))))


def _parquet(resp) -> dict[str, list]:
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.mimetype == "application/vnd.apache.parquet"
    return pq.read_table(io.BytesIO(resp.get_data())).to_pydict()


def _num(cell: str) -> float | None:
    return None if cell == "" else float(cell)


def _bad(resp, status=400) -> str:
    assert resp.status_code == status, resp.get_data(as_text=True)
    msg = resp.get_json()["error"]["message"]
    # One sentence: ends with a full stop and has no second sentence after it.
    assert msg.endswith(".") and ". " not in msg.rstrip(".").replace("e.g. ", ""), msg
    return msg


def _json_trend(client, point):
    r = client.get(f"/api/v1/machines/fan-000/trends?from=0&max_points=5000&point={point}").get_json()
    (p,) = r["points"]
    assert p["returned"] == p["readings_in_range"] == READINGS
    return p


def test_trend_csv_equals_the_json_trend(client):
    rows = _csv(client.get("/api/v1/machines/fan-000/export/trends?from=0"))
    assert list(rows[0])[:6] == ["machine", "point", "time_utc", "overall_velocity_mm_s_rms", "speed_hz", "zone"]
    for point in ("de-h", "nde-v"):
        p = _json_trend(client, point)
        mine = [r for r in rows if r["point"] == point]
        assert [parse_iso_utc(r["time_utc"]).timestamp() for r in mine] == p["ts"]
        # Floats written in their shortest round-tripping form read back to the same double.
        assert [_num(r["overall_velocity_mm_s_rms"]) for r in mine] == p["overall_mm_s_rms"]
        assert [_num(r["speed_hz"]) for r in mine] == p["speed_hz"]
        assert [r["zone"] or None for r in mine] == p["zone"]
        assert [r["health_flags"] for r in mine] == [";".join(f) for f in p["flags"]]
        assert list(p["orders"]) == ["1x", "2x", "7x"]
        for lab, values in p["orders"].items():
            assert [_num(r[f"order_{lab}_velocity_mm_s_pk"]) for r in mine] == values
            if lab in p["phase_deg"]:
                assert [_num(r[f"order_{lab}_phase_deg"]) for r in mine] == p["phase_deg"][lab]


def test_trend_parquet_equals_the_json_trend_and_features_pick_columns(client):
    t = _parquet(client.get("/api/v1/machines/fan-000/export/trends?from=0&format=parquet"
                            "&point=de-h&feature=overall&feature=1x"))
    assert list(t) == ["machine", "point", "time_utc", "overall_velocity_mm_s_rms",
                       "order_1x_velocity_mm_s_pk", "order_1x_phase_deg"]
    p = _json_trend(client, "de-h")
    assert [x.timestamp() for x in t["time_utc"]] == p["ts"]
    assert all(x.tzinfo is not None and x.utcoffset() == dt.timedelta(0) for x in t["time_utc"])
    assert t["overall_velocity_mm_s_rms"] == p["overall_mm_s_rms"]
    assert t["order_1x_velocity_mm_s_pk"] == p["orders"]["1x"]


def _json_spectrum(client):
    d = client.get("/api/v1/machines/fan-000").get_json()
    sp = next(s for s in d["latest_spectra"] if s["kind"] == "velocity")
    assert len(sp["freq_hz"]) <= 8192  # not thinned: every bin is in the JSON
    return sp


def test_spectrum_csv_and_parquet_equal_the_json_spectrum(client):
    sp = _json_spectrum(client)
    col = "amplitude_mm_s_pk" if sp["scaling"] == "peak" else "amplitude_mm_s_rms"
    base = f"/api/v1/machines/fan-000/export/spectra?from=0&point={sp['point']}&kind=velocity"
    rows = [r for r in _csv(client.get(base)) if int(r["spectrum_id"]) == sp["id"]]
    t = _parquet(client.get(base + "&format=parquet"))
    keep = [i for i, x in enumerate(t["spectrum_id"]) if x == sp["id"]]
    assert len(rows) == len(keep) == len(sp["freq_hz"])
    assert {r["time_utc"] for r in rows} == {sp["ts"]}
    assert {r["kind"] for r in rows} == {"velocity"}
    for got in ([float(r["frequency_hz"]) for r in rows], [t["frequency_hz"][i] for i in keep]):
        # The JSON rounds frequencies to 4 decimals (monitor/store/reads/spectra.py).
        assert [round(f, 4) for f in got] == sp["freq_hz"]
    for got in ([float(r[col]) for r in rows], [t[col][i] for i in keep]):
        # The JSON writes five significant digits of the stored float32 amplitude.
        assert all(math.isclose(a, float(f"{b:.5g}"), rel_tol=1e-9) or math.isclose(a, b, rel_tol=5e-5)
                   for a, b in zip(sp["amplitude"], got, strict=True))


def test_bounds_and_bad_parameters_are_refused_in_one_sentence(client):
    base = "/api/v1/machines/fan-000/export/trends?from=0"
    msg = _bad(client.get(base + "&max_rows=5"))
    assert f"{2 * READINGS} rows" in msg and "max_rows=5" in msg
    # Exactly at the limit is fine.
    assert len(_csv(client.get(base + f"&max_rows={2 * READINGS}"))) == 2 * READINGS
    _bad(client.get(base + f"&max_rows={MAX_EXPORT_ROWS + 1}"))
    _bad(client.get(base + "&max_rows=0"))
    _bad(client.get(base + "&max_rows=many"))
    assert "format" in _bad(client.get(base + "&format=xlsx"))
    assert "'zz'" in _bad(client.get(base + "&feature=zz"))
    _bad(client.get("/api/v1/machines/fan-000/export/trends?from=yesterday"))
    _bad(client.get(base + "&point=zz"), 404)
    _bad(client.get("/api/v1/machines/nope/export/spectra"), 404)
    _bad(client.get("/api/v1/machines/fan-000/export/spectra?from=0&kind=phase"))
    assert "rows" in _bad(client.get("/api/v1/machines/fan-000/export/spectra?from=0&max_rows=10"))
    # An empty range is an empty table with its header, not an error.
    assert _csv(client.get("/api/v1/machines/fan-000/export/trends?from=0&to=1")) == []
