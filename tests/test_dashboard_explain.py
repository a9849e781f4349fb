"""The dashboard explains in words and draws what the margin rule judges (issue 15), through
the Flask test client on a store the service's batch path seeded (tests/dashboard_seed.py):

- each mode's shaded band has the margin table's own below and above margins (API 684
  separation margin), so an excitation the table calls clear is outside it;
- an alarm's evidence page is a table of values rounded with their units and words for
  kinds and subjects, no internal key or long float; every alarm row links to it.
"""

from __future__ import annotations

import html as html_lib
import re

import pytest
from dashboard_seed import PASSWORDS, seed
from fixtures_db import fresh_database

from dashboard import create_app
from monitor.wording import evidence_rows, subject_words

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
#: The seeded fans' pedestal mode: damping ratio 0.04 (tests/dashboard_seed.py), so
#: AF = 1 / (2 zeta) = 12.5 (half-power bandwidth; Thomson, Theory of Vibration).
PEDESTAL_ZETA = 0.04


def api684_margins_pct(af: float) -> tuple[float, float]:
    """API 684 separation margins, % of the mode frequency, with the mode below and above
    the excitation: min(16, 17 (1 - 1/(AF - 1.5))) and min(26, 10 + 17 (1 - 1/(AF - 1.5)))
    (API Standard 684, separation margin clause, as quoted by API 617), for AF >= 2.5."""
    core = 17.0 * (1.0 - 1.0 / (af - 1.5))
    return min(16.0, core), min(26.0, 10.0 + core)


@pytest.fixture(scope="module", params=BACKENDS)
def db_url(request, tmp_path_factory):
    with fresh_database(request.param, tmp_path_factory.mktemp("explain")) as url:
        seed(url, machines=3, readings_per_point=60)
        yield url


@pytest.fixture()
def client(db_url):
    app = create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test", "TESTING": True})
    c = app.test_client()
    page = c.get("/login").get_data(as_text=True)
    tok = re.search(r'name="csrf-token" content="([^"]+)"', page).group(1)
    assert c.post("/login", data={"username": "eng", "password": PASSWORDS["eng"], "csrf_token": tok}).status_code == 302
    c.csrf = re.search(r'name="csrf-token" content="([^"]+)"', c.get("/").get_data(as_text=True)).group(1)
    yield c
    app.extensions["whirlwatch_engine"].dispose()


def visible_text(page: str) -> str:
    """What a person reads on a page: no scripts, no tags, entities decoded."""
    page = re.sub(r"<(script|style)[^>]*>.*?</\1>", " ", page, flags=re.S)
    return html_lib.unescape(re.sub(r"<[^>]+>", " ", page))


def numbers(text: str) -> list[str]:
    """The decimal numbers in a text, as written."""
    return re.findall(r"\d[\d,]*\.\d+", text)


def significant_digits(text: str) -> list[int]:
    """The significant digits of each decimal number in a text (leading zeros left out)."""
    return [len(re.sub(r"[.,]", "", n).lstrip("0")) for n in numbers(text)]


def test_bands_are_the_margin_tables(client):
    m = client.get("/api/v1/machines/fan-002").get_json()
    bands = {b["mode"]: b for b in m["mode_bands"]}
    assert set(bands) == {r["mode"] for r in m["margins"]} == {"pedestal rocking", "base plate"}
    # API 684 for the pedestal mode: 15.45 % with the mode below the excitation, 25.45 %
    # above it; the band is asymmetric.
    below, above = api684_margins_pct(1.0 / (2.0 * PEDESTAL_ZETA))
    ped = bands["pedestal rocking"]
    assert ped["below_pct"] == pytest.approx(below, rel=1e-12) and ped["above_pct"] == pytest.approx(above, rel=1e-12)
    assert ped["low_hz"] == pytest.approx(ped["mode_hz"] * (1 - above / 100), rel=1e-12)
    assert ped["high_hz"] == pytest.approx(ped["mode_hz"] * (1 + below / 100), rel=1e-12)
    for r in m["margins"]:
        b = bands[r["mode"]]
        # The edge on the row's side is the table's own required margin.
        if r["side"] == "below":
            assert b["high_hz"] == pytest.approx(r["mode_hz"] * (1 + r["required_pct"] / 100), rel=1e-12)
        else:
            assert b["low_hz"] == pytest.approx(r["mode_hz"] * (1 - r["required_pct"] / 100), rel=1e-12)
        inside_band = b["low_hz"] < r["excitation_hz"] < b["high_hz"]
        assert inside_band == (r["status"] == "inside"), r


def test_an_excitation_the_table_calls_clear_is_outside_the_band(client):
    # The pump: 2x 19.9 % above a mode that needs 15.5 % below it and 25.5 % above
    # it (API 684 at AF 12.5) is clear of the required band, though a symmetric band of
    # 25.5 % would hold it.
    two_x = next(r for r in client.get("/api/v1/machines/fan-001").get_json()["margins"] if r["excitation"] == "2x")
    mode_hz = two_x["excitation_hz"] / 1.199
    r = client.post("/api/v1/machines/fan-001/modes", headers={"X-CSRFToken": client.csrf},
                    json={"name": "pump-like lateral", "frequency_hz": mode_hz, "damping_ratio": PEDESTAL_ZETA})
    assert r.status_code == 201, r.get_data(as_text=True)
    m = client.get("/api/v1/machines/fan-001").get_json()
    row = next(x for x in m["margins"] if x["mode"] == "pump-like lateral" and x["excitation"] == "2x")
    below, above = api684_margins_pct(1.0 / (2.0 * PEDESTAL_ZETA))
    assert row["side"] == "below" and row["margin_pct"] == pytest.approx(19.9, abs=0.05)
    # Not inside the required band (within the approach band, 1.5 times it: a warning only).
    assert row["required_pct"] == pytest.approx(below, rel=1e-12) and row["status"] == "approach"
    band = next(b for b in m["mode_bands"] if b["mode"] == "pump-like lateral")
    assert not band["low_hz"] <= row["excitation_hz"] <= band["high_hz"]
    # The old drawing (mode +- the larger margin) would have put it inside.
    assert row["excitation_hz"] < mode_hz * (1 + above / 100)


def test_evidence_pages_read_as_words(client):
    alarms = client.get("/api/v1/alarms?limit=500").get_json()["items"]
    kinds = {a["kind"] for a in alarms}
    assert {"amplitude_growth", "resonance_proximity"} <= kinds
    for a in alarms:
        r = client.get(f"/alarms/{a['id']}")
        assert r.status_code == 200
        page = r.get_data(as_text=True)
        text = visible_text(page)
        # No long floats (the stored values have up to 17 significant digits; a frequency
        # to 0.01 Hz has up to 6).
        assert max(significant_digits(text), default=0) <= 6, [n for n in numbers(text) if len(n) > 7]
        # No internal keys: snake_case words, 'mode@excitation' subjects.
        keys = re.findall(r"\b[a-z0-9]+_[a-z0-9_]+\b", text)
        assert not keys, keys[:5]
        assert "@" not in text
        assert "<table class=\"grid evidence-table\">" in page
        # Raw JSON stays one click away; the caution stays on the page.
        assert f'href="/api/v1/alarms/{a["id"]}"' in page
        assert "judgement of qualified people" in text and "manufacturer's limits" in text
    growth = next(a for a in alarms if a["kind"] == "amplitude_growth" and a["subject"] == "overall")
    text = visible_text(client.get(f"/alarms/{growth['id']}").get_data(as_text=True))
    assert "vibration growing" in text and "overall velocity" in text
    # mm/s RMS to two decimals, days to one (the evidence's own figures, rounded).
    assert f"{growth['evidence']['value']:.2f} mm/s RMS" in text
    assert f"{growth['evidence']['time_to_limit_days']:.1f} days" in text
    resonance = next(a for a in alarms if a["kind"] == "resonance_proximity")
    text = visible_text(client.get(f"/alarms/{resonance['id']}").get_data(as_text=True))
    mode, _, exc = resonance["subject"].rpartition("@")
    assert f"near mode “{mode}”" in text and f"{resonance['evidence']['margin_pct']:.1f} %" in text


def test_every_alarm_row_links_to_its_evidence(client):
    for path in ("/alarms/?limit=500", "/machines/fan-002"):
        page = client.get(path).get_data(as_text=True)
        rows = re.findall(r'<tr data-alarm="(\d+)"[^>]*>(.*?)</tr>', page, re.S)
        assert rows, path
        for alarm_id, row in rows:
            assert f'href="/alarms/{alarm_id}"' in row, (path, alarm_id)
        text = visible_text(page)
        assert not re.findall(r"\b(?:1x_norm|flat_line|bearing_[a-z]+)\b", text)
    lines = client.get("/alarms/export.csv").get_data(as_text=True).splitlines()
    assert lines[0].endswith(",summary")
    assert any(line.endswith(",vibration growing: overall velocity (10–1000 Hz)") for line in lines[1:])


@pytest.mark.parametrize(("kind", "subject", "expected"), [
    ("amplitude_growth", "1x_norm", "1x amplitude per speed squared (speed-normalised 1x)"),
    ("amplitude_growth", "bearing_bpfo", "bearing outer-race defect frequency (BPFO) in the envelope spectrum"),
    ("amplitude_growth", "7x", "7x (7 times running speed) amplitude"),
    ("sensor_fault", "flat_line", "signal flat (sensor, cable or input dead)"),
    ("resonance_proximity", "pedestal lateral@2x", "2x (2 times running speed) near mode “pedestal lateral”"),
    ("resonance_proximity", "motor frame@2xLF", "twice line frequency near mode “motor frame”"),
    ("processing_fault", "speed", "speed messages"),
])
def test_subjects_in_words(kind, subject, expected):
    # The examples of internal codes on the pages, each with its words.
    assert subject_words(kind, subject) == expected


def test_evidence_of_faults_in_words():
    # Keys the seeded plant does not raise (sensor and processing faults): still words.
    rows = evidence_rows({"check": "flat_line", "message": "the signal does not vary at all",
                          "last_reading_ts": 1773144000.0, "dead_letter_id": 7, "failures": 3,
                          "approach": {"seconds": 5400.0, "edge_hz": 17.123456789, "speed_slope_hz_per_s": 0.000123}},
                         when=lambda v: "a time")
    text = " ".join(f"{r.label} {r.value}" for r in rows)
    assert "signal flat" in text and "Last reading a time" in text and "Dead letter id 7" in text
    assert "17.12 Hz" in text and "1 h 30 min" in text and "0.00738 Hz per minute" in text
    assert not re.search(r"\b[a-z0-9]+_[a-z0-9_]+\b", text) and max(significant_digits(text)) <= 6
