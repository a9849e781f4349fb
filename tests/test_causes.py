"""Likely-cause hints (monitor/detection/causes.py, docs/diagnosis.md) on simulated faults
with a known cause, through the service's batch path and the machine detail read the
page and the API use: each fault case names its cause first, with its published symptom;
a healthy machine gets no hint; growth alarms of the demo plant carry the hints of their
reading in their evidence; the API answer matches dashboard/openapi.json.

The fault cases (monitor/sim/fault_cases.py) are invented machines; the expected values
are the causes and the published symptom patterns, and the frequencies from physical laws
and kinematics, never numbers read off the simulator's own output.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from dashboard_signin import make_app
from jsonschema import Draft202012Validator
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT202012
from service_helpers import message, offline_service, plant_store, traffic
from sqlalchemy import select

from monitor.detection.causes import CAUTION, machine_hints
from monitor.detection.symptoms import LINE_PRESENT_DB, point_symptoms, read_line
from monitor.sim.fault_cases import (
    FAULT_CASES,
    SPEED_HZ,
    START_TS,
    case_machine,
    case_readings,
    case_registry,
)
from monitor.store import Store, import_registry, reads, upgrade
from monitor.store.auth import create_api_token, create_user
from monitor.store.models import Alarm, AlarmTransitionRow

ROOT = Path(__file__).resolve().parent.parent
OPENAPI = json.loads((ROOT / "dashboard" / "openapi.json").read_text(encoding="utf-8"))


def _detail(url: str, machine: str) -> dict:
    store = Store.open(url)
    try:
        with store.session() as s:
            m = reads.get_machine(s, machine)
            assert m is not None
            return reads.machine_detail(s, m)
    finally:
        store.close()


@pytest.fixture(scope="module")
def cases_url(tmp_path_factory) -> str:
    """Every fault case, two readings of each point, through the service's batch path."""
    url = f"sqlite:///{tmp_path_factory.mktemp('causes') / 'cases.sqlite'}"
    upgrade(url)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            import_registry(s, case_registry())
            create_user(s, "eng", "engineer-pass-1", "engineer")
    finally:
        store.close()
    msgs = [message(r) for case in FAULT_CASES for r in case_readings(case)]
    svc = offline_service(url, clock=lambda: START_TS + 86400.0)
    try:
        for i in range(0, len(msgs), 8):
            svc.handle_batch(msgs[i:i + 8])
    finally:
        svc.store.close()
    return url


def hints_of(url: str, case: str) -> list[dict]:
    return _detail(url, case_machine(case).id)["likely_causes"]["hints"]


#: The cause each fault case must name first, with the published symptom it shows.
EXPECTED = {
    # ISO 13373-3 (unbalance: 1x radial dominant, steady phase; from memory); Harris' Shock and
    # Vibration Handbook, rotating machinery (from memory)
    "unbalance": "unbalance",
    # ISO 13373-3 (misalignment: 2x high against 1x, high axial vibration; from memory)
    "misalignment": "misalignment",
    # ISO 13373-3 (mechanical looseness: harmonics of running speed and half orders; from memory)
    "looseness": "looseness",
    # Randall and Antoni 2011, section 2 (outer-race defect: envelope lines at BPFO)
    "outer_race": "bearing_bpfo",
    # API 684 separation margin; ISO 13373-3 (resonance: an excitation at a natural frequency)
    "resonance": "resonance",
    # ISO 13373-3 (electrically induced vibration at twice line frequency; from memory)
    "electrical": "electrical",
    # ISO 13373-3 (hydraulic excitation at vane pass; from memory)
    "flow": "flow",
}


@pytest.mark.parametrize("case", sorted(EXPECTED))
def test_a_fault_case_names_its_cause_first(cases_url, case):
    hints = hints_of(cases_url, case)
    assert hints, f"{case}: no hint"
    top = hints[0]
    assert top["cause"] == EXPECTED[case], [(h["cause"], h["confidence"]) for h in hints]
    assert top["confidence"] in ("medium", "high")
    # the symptom gives its measured numbers with units, the rule and a published source
    assert re.search(r"\d+(\.\d+)? (mm/s RMS|Hz|dB|%)", top["symptom"]), top["symptom"]
    assert top["confidence_rule"] and top["check_next"].startswith("Worth checking")
    assert re.search(r"ISO 13373-3|Randall and Antoni|API Standard 684", top["source"])


def test_a_healthy_machine_gets_no_hint(cases_url):
    # ISO 20816-1: a machine in zone A with no growing feature, no bearing line and no
    # excitation inside a band shows no fault pattern worth a hint (docs/diagnosis.md).
    detail = _detail(cases_url, case_machine("healthy").id)
    assert detail["likely_causes"]["hints"] == []
    assert detail["likely_causes"]["caution"] == CAUTION
    assert {r["point"] for r in detail["likely_causes"]["readings"]} == {"de-h", "de-a"}


def test_the_outer_race_hint_is_at_the_kinematic_bpfo(cases_url):
    (hint,) = [h for h in hints_of(cases_url, "outer_race") if h["cause"].startswith("bearing_")]
    hz = float(re.search(r"defect frequency at ([\d.]+) Hz", hint["symptom"]).group(1))
    # BPFO = n/2 fr (1 - d/D cos(phi)) (Randall and Antoni 2011, section 2); 9 balls of 7.94 mm
    # on a 39.04 mm pitch circle, contact angle 0
    assert hz == pytest.approx(9 / 2 * SPEED_HZ * (1 - 7.94 / 39.04), rel=1e-3)
    assert "stage" in hint["symptom"]


def test_the_electrical_hint_is_at_twice_line_frequency(cases_url):
    (hint,) = [h for h in hints_of(cases_url, "electrical") if h["cause"] == "electrical"]
    # the magnetic pull of a motor pulses at twice the supply frequency (Harris' Shock and
    # Vibration Handbook, electrical machines; from memory): 2 x 50 Hz
    assert "(100.00 Hz)" in hint["symptom"]


def test_the_resonance_hint_gives_the_api_684_margin(cases_url):
    (hint,) = [h for h in hints_of(cases_url, "resonance") if h["cause"] == "resonance"]
    margin = float(re.search(r"lies ([\d.]+) % from", hint["symptom"]).group(1))
    required = float(re.search(r"inside the required ([\d.]+) %", hint["symptom"]).group(1))
    # separation margin |f_mode - f_exc| / f_mode; 1x at 24.67 Hz, the frame mode at 25.9 Hz
    assert margin == pytest.approx(100 * abs(25.9 - SPEED_HZ) / 25.9, abs=0.06)
    # API 684: AF = 1 / (2 zeta); a mode above the speed needs 10 + 17 (1 - 1 / (AF - 1.5)) %
    af = 1 / (2 * 0.03)
    assert required == pytest.approx(10 + 17 * (1 - 1 / (af - 1.5)), abs=0.06)
    # 1x amplified by the mode it sits in is not taken for unbalance
    unbalance = [h for h in hints_of(cases_url, "resonance") if h["cause"] == "unbalance"]
    assert all(h["confidence"] == "low" for h in unbalance)


def test_misalignment_seen_radially_and_axially_is_high(cases_url):
    (hint,) = [h for h in hints_of(cases_url, "misalignment") if h["cause"] == "misalignment"]
    # ISO 13373-3 (misalignment: 2x and axial vibration together; from memory)
    assert hint["confidence"] == "high"
    assert "axial" in hint["symptom"]


def test_the_api_answer_matches_the_openapi_description(cases_url):
    store = Store.open(cases_url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "eng", "causes test")
    finally:
        store.close()
    app = make_app(cases_url)
    try:
        resp = app.test_client().get(f"/api/v1/machines/{case_machine('looseness').id}",
                                     headers={"Authorization": f"Bearer {token}"})
    finally:
        app.extensions["whirlwatch_engine"].dispose()
    assert resp.status_code == 200
    body = resp.get_json()
    registry = Registry().with_resource("urn:whirlwatch-openapi",
                                        Resource.from_contents(OPENAPI, default_specification=DRAFT202012))
    Draft202012Validator({"$ref": "urn:whirlwatch-openapi#/components/schemas/MachineDetail"},
                         registry=registry, format_checker=Draft202012Validator.FORMAT_CHECKER).validate(body)
    assert body["likely_causes"]["hints"][0]["cause"] == "looseness"


def test_twice_line_frequency_beside_a_harmonic_is_no_electrical_hint():
    """A 2-pole motor at 49.5 Hz: 2x (99 Hz) and twice the 50 Hz supply (100 Hz) lie 1.6
    bins apart at 0.625 Hz resolution, too close to tell apart, so the rule says nothing."""
    f = np.arange(4096) * 0.625
    amp = np.full(f.size, 0.01)
    for hz, v in ((49.5, 4.0), (99.0, 1.0), (100.0, 4.0)):
        amp[int(round(hz / 0.625))] = v
    ps = point_symptoms("de-h", "horizontal", speed_hz=49.5, overall_mm_s_rms=4.2,
                        zone_limits_mm_s=(1.4, 2.8, 4.5),
                        orders=[{"order": 1.0, "velocity_mm_s": 4.0}, {"order": 2.0, "velocity_mm_s": 1.0}],
                        spectrum=(f, amp), line_frequency_hz=50.0)
    assert ps is not None and ps.line_2f is not None and ps.line_2f.present
    assert "electrical" not in [h.cause for h in machine_hints([ps])]
    # Hann window: a line's main lobe spans 4 bins (Harris 1978), so separable from 4 bins on
    # a 4-pole motor at 24.0 Hz: 4x at 96 Hz lies 6.4 bins from 100 Hz
    far = point_symptoms("de-h", "horizontal", speed_hz=24.0, overall_mm_s_rms=4.2,
                         zone_limits_mm_s=(1.4, 2.8, 4.5),
                         orders=[{"order": 1.0, "velocity_mm_s": 4.0}], spectrum=(f, amp), line_frequency_hz=50.0)
    assert far is not None and [h.cause for h in machine_hints([far])] == ["electrical"]


def _parse(text: str) -> float:
    return dt.datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def _through_service(url: str, name: str) -> None:
    msgs = traffic(name)
    now = {"t": 0.0}
    svc = offline_service(url, clock=lambda: now["t"])
    try:
        for i in range(0, len(msgs), 8):
            batch = msgs[i:i + 8]
            now["t"] = max(_parse(json.loads(p)["ts"]) for _, p in batch) + 5.0
            svc.handle_batch(batch)
    finally:
        svc.store.close()


def _growth_evidence(url: str) -> list[tuple[str, dict]]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return [(a.subject, t.evidence) for t, a in s.execute(
                select(AlarmTransitionRow, Alarm).join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id)
                .where(Alarm.kind == "amplitude_growth", AlarmTransitionRow.transition != "cleared"))]
    finally:
        store.close()


@pytest.mark.parametrize(("machine", "subject", "cause"), [
    # ISO 13373-3 (unbalance: 1x radial dominant and growing; from memory): the raw water pump's
    # impeller build-up (sample_streams/README.md)
    ("rwp-1", "1x_norm", "unbalance"),
    # Randall and Antoni 2011, section 2 (outer-race defect at BPFO): the sludge pump's bearing
    ("sp-2", "bearing_bpfo", "bearing_bpfo"),
])
def test_growth_alarms_of_the_demo_plant_carry_their_hints(tmp_path, machine, subject, cause):
    url = f"sqlite:///{tmp_path / 'plant.sqlite'}"
    plant_store(url)
    _through_service(url, machine)
    evidence = [ev for subj, ev in _growth_evidence(url) if subj == subject]
    assert evidence, f"no growth alarm on {subject}"
    for ev in evidence:
        causes = [h["cause"] for h in ev["hints"]]
        assert causes and causes[0] == cause, causes
        assert ev["hints"][0]["confidence"] == "high"  # the feature grows as well
    # the machine page's summary names the same cause from the stored rows
    assert _detail(url, machine)["likely_causes"]["hints"][0]["cause"] == cause
    # and the alarm's evidence page lists the hint with its step
    store = Store.open(url)
    try:
        with store.transaction() as s:
            create_user(s, "vic", "viewer-pass-1", "viewer")
            alarm_id = s.execute(select(Alarm.id).where(Alarm.kind == "amplitude_growth",
                                                        Alarm.subject == subject)).scalars().first()
    finally:
        store.close()
    app = make_app(url)
    try:
        client = app.test_client()
        page = client.get("/login").get_data(as_text=True)
        token = re.search(r'name="csrf-token" content="([^"]+)"', page).group(1)
        client.post("/login", data={"csrf_token": token, "username": "vic", "password": "viewer-pass-1"})
        html = client.get(f"/alarms/{alarm_id}").get_data(as_text=True)
        assert f'data-cause="{cause}"' in html and "What to check next." in html
    finally:
        app.extensions["whirlwatch_engine"].dispose()


def test_the_healthy_blower_of_the_demo_plant_gets_no_hint(tmp_path):
    # ISO 20816-1 zone A, no growth, no excitation inside a band (sample_streams/README.md)
    url = f"sqlite:///{tmp_path / 'plant.sqlite'}"
    plant_store(url)
    _through_service(url, "ab-1")
    assert _detail(url, "ab-1")["likely_causes"]["hints"] == []
    assert math.isfinite(_detail(url, "ab-1")["points"][0]["latest"]["overall_mm_s_rms"])


def test_a_line_reads_as_rms_with_its_prominence():
    # a sinusoid's RMS is its peak over sqrt 2; prominence 20 log10(line / floor) dB
    f = np.arange(2048) * 0.5
    amp = np.full(f.size, 0.02)
    amp[200] = 2.0 * math.sqrt(2.0)  # 100 Hz, mm/s peak
    line = read_line(f, amp, 100.4)
    assert line is not None and line.hz == 100.0
    assert line.mm_s_rms == pytest.approx(2.0)
    assert line.prominence_db == pytest.approx(20 * math.log10(2.0 * math.sqrt(2.0) / 0.02))
    assert line.present and LINE_PRESENT_DB == 10.0
    # a random floor bin exceeds 10 dB over its median with probability 2^-10 (Rayleigh)
    rng = np.random.default_rng(1)
    noise = np.hypot(rng.normal(size=200_000), rng.normal(size=200_000))
    share = np.mean(noise > math.sqrt(10.0) * np.median(noise))
    assert share == pytest.approx(2.0 ** -10, rel=0.25)
    assert read_line(f, amp, 5000.0) is None  # above the spectrum
