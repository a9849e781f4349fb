"""The per-machine evaluator on hand-built analyses (no simulator): resonance, growth,
health, stale streams, configuration checks and state that survives a restart."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from monitor.analysis.waveform import OrderAmplitude, ReadingAnalysis, Spectrum
from monitor.detection.evaluator import MachineEvaluator, validate_machine
from monitor.detection.stored_state import evaluator_from_state, stored_state
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point

FS = 25600.0
DAY = 86400.0


def _machine(**kw) -> Machine:
    base = dict(
        id="fan-7", machine_class="group2/rigid", excitation_orders=(1.0,),
        speed_range_rpm=(300.0, 1800.0),
        # AF from zeta 0.05 = 10 -> API 684: 15 % (mode below), 25 % (mode above).
        modes=(Mode("pedestal", 20.0, damping_ratio=0.05),),
        points=(Point("de", fs_hz=FS, unit="m/s^2"), Point("nde", fs_hz=FS, unit="m/s^2")),
    )
    base.update(kw)
    return Machine(**base)


_EMPTY = Spectrum(np.zeros(2), np.zeros(2), "m/s^2", "peak", 1.0, 1.5)


def _analysis(ts, speed, overall=1.0, one_x=1.0, point="de", rid=None, machine="fan-7"):
    return ReadingAnalysis(
        machine=machine, point=point, ts=float(ts), speed_hz=float(speed), speed_source="measured",
        speed_uncertainty_hz=0.0, overall_velocity_mm_s_rms=float(overall),
        orders=(OrderAmplitude(1.0, speed, 0.0, one_x), OrderAmplitude(2.0, 2 * speed, 0.0, 0.1 * one_x)),
        one_x_normalised=one_x / speed**2, peaks=(), spectrum=_EMPTY, velocity_spectrum=_EMPTY,
        reading_id=rid,
    )


def _waveform(ts, samples=None, point="de", **kw):
    if samples is None:
        rng = np.random.default_rng(int(ts) % 1000)
        t = np.arange(4096) / FS
        samples = np.sin(2 * np.pi * 15.0 * t) + 0.1 * rng.standard_normal(t.size)
    return Waveform("fan-7", point, float(ts), kw.pop("fs_hz", FS), kw.pop("unit", "m/s^2"), samples, **kw)


def _names(trans, kind=None):
    return [t.name for t in trans if kind is None or t.kind == kind]


class TestConfiguration:
    def test_rejects_bad_mode_fields(self):
        with pytest.raises(ValueError, match="mode 'x'.*'frequency_hz'"):
            MachineEvaluator(_machine(modes=(Mode("x", -3.0),)))
        with pytest.raises(ValueError, match="'damping_ratio' must lie in \\(0, 1\\)"):
            MachineEvaluator(_machine(modes=(Mode("x", 10.0, damping_ratio=1.2),)))
        with pytest.raises(ValueError, match="'damping_ratio'"):
            MachineEvaluator(_machine(modes=(Mode("x", 10.0, damping_ratio=0.0),)))

    def test_rejects_overlapping_limits_and_unknown_class(self):
        with pytest.raises(ValueError, match="limits_mm_s.*overlap"):
            MachineEvaluator(_machine(limits_mm_s=(3.0, 2.0, 5.0)))
        with pytest.raises(ValueError, match="'class'"):
            MachineEvaluator(_machine(machine_class="group9/rigid"))

    def test_settings_from_registry_keys(self):
        s = validate_machine(_machine(settings={"persistence": 5, "growth_ratios": [1.5, 3.0]}))
        assert s.persistence == 5 and s.growth_ratios == (1.5, 3.0)
        with pytest.raises(ValueError, match="'persistence'"):
            validate_machine(_machine(settings={"persistence": 0}))
        with pytest.raises(ValueError, match="'growth_ratios'"):
            validate_machine(_machine(settings={"growth_ratios": [4, 2]}))
        with pytest.raises(ValueError, match="'hysteresis_pct'"):
            validate_machine(_machine(settings={"hysteresis_pct": -1}))


class TestResonance:
    def test_inside_band_raises_alert_then_clears(self):
        ev = MachineEvaluator(_machine())
        trans = []
        # 1x at 11 Hz: 45 % from the mode, clear of the approach band (1.5 x 25 % = 37.5 %,
        # held to 41.25 % by 10 % hysteresis); 16.5 Hz: 17.5 % < 25 % required (inside).
        speeds = [11.0] * 3 + [16.5] * 10 + [11.0] * 8
        for i, sp in enumerate(speeds):
            trans += ev.evaluate(_analysis(i * 10, sp), _waveform(i * 10)).transitions
        res = [t for t in trans if t.kind == "resonance_proximity"]
        assert [(t.name, t.severity) for t in res] == [("raised", "alert"), ("cleared", "alert")]
        # Rule (docs/alarms.md, "Dwell"): in the band from 30 s, dwelt 60 s at 90 s, and
        # the persistence of 3 readings 10 s apart: raised at 110 s.
        assert res[0].ts == 110.0 and res[0].evidence["dwell_s"] == 80.0
        assert res[0].evidence["required_dwell_s"] == 60.0
        assert res[0].alarm["point"] is None and res[0].alarm["subject"] == "pedestal@1x"
        ev0 = res[0].evidence
        # API 684 rule: AF 10 (1 / (2 x 0.05)), mode above the excitation ->
        # min(26, 10 + 17 (1 - 1/8.5)) = 25 % required; margin (20 - 16.5) / 20 = 17.5 %,
        # percent of the mode frequency (docs/alarms.md, "Separation margin")
        assert ev0["required_pct"] == pytest.approx(25.0) and ev0["margin_pct"] == pytest.approx(17.5)
        assert ev0["side"] == "above" and ev0["basis"] == "API 684 (AF from damping)"

    def test_half_power_band_is_severe(self):
        ev = MachineEvaluator(_machine())
        trans = []
        for i in range(5):  # 30 s apart: dwelt 60 s at the third, raised at the fifth
            trans += ev.evaluate(_analysis(30 * i, 20.4), _waveform(30 * i)).transitions
        assert [(t.name, t.severity, t.ts) for t in trans] == [("raised", "severe", 120.0)]
        # Textbook SDOF: H(1.02) for zeta 0.05.
        assert trans[0].evidence["amplification"] == pytest.approx(
            1 / math.sqrt((1 - 1.02**2) ** 2 + (0.1 * 1.02) ** 2))

    def test_speed_hovering_on_band_edge_does_not_chatter(self):
        # Band edge for 1x: 20 * (1 - 0.25) = 15 Hz. Speed 15 Hz +- 0.05 Hz noise.
        rng = np.random.default_rng(2)
        ev = MachineEvaluator(_machine())
        names = []
        for i, sp in enumerate(15.0 + 0.05 * rng.standard_normal(1000)):
            names += _names(ev.observe_speed(SpeedReading("fan-7", float(i), float(sp))), "resonance_proximity")
        assert names.count("raised") <= 1 and names.count("cleared") <= 1

    def test_same_instant_from_two_points_counts_once(self):
        ev = MachineEvaluator(_machine())
        trans = []
        for i in range(2):  # persistence 3: two instants are not enough
            for p in ("de", "nde"):
                trans += ev.evaluate(_analysis(i, 16.5, point=p), _waveform(i, point=p)).transitions
        assert _names(trans, "resonance_proximity") == []

    def test_ramp_forecast_raises_advisory_before_band(self):
        ev = MachineEvaluator(_machine(settings={"approach_warning_s": 120}))
        trans = []
        first = None
        for i in range(40):
            sp = 10.0 + 0.02 * i * 5  # 0.02 Hz/s, readings every 5 s
            got = ev.observe_speed(SpeedReading("fan-7", i * 5.0, sp))
            trans += got
            if first is None and got:
                first = (sp, got[0])
        assert first is not None
        sp, t = first
        assert t.name == "raised" and t.severity == "advisory"
        # Raised by the forecast: still outside the approach band (25 % x 1.5 = 37.5 %,
        # edge 12.5 Hz) is not required, but before the 15 Hz required band for sure.
        assert sp < 15.0 and "approach" in t.evidence


class TestGrowth:
    def test_zone_alarms_with_evidence(self):
        # group2/rigid: B/C 2.8, C/D 4.5 mm/s RMS (ISO 10816-3 Table A.2, from memory).
        ev = MachineEvaluator(_machine())
        trans = []
        levels = [1.0] * 3 + [3.0] * 3 + [5.0] * 3 + [1.0] * 3
        for i, v in enumerate(levels):
            trans += ev.evaluate(_analysis(i * 3600, 12.0, overall=v), _waveform(i * 3600)).transitions
        g = [(t.name, t.severity) for t in trans if t.alarm["subject"] == "overall"]
        assert g == [("raised", "alert"), ("escalated", "severe"), ("cleared", "severe")]
        assert trans[0].evidence["zone_limits_mm_s"] == [1.4, 2.8, 4.5]

    def test_zone_boundary_rule_in_alarms(self):
        # Zone C starts above B/C (a zone includes its upper limit): 2.8 exactly is zone B.
        ev = MachineEvaluator(_machine())
        out = [ev.evaluate(_analysis(i, 12.0, overall=2.8)) for i in range(5)]
        assert out[-1].zone == "B"
        assert not any(t.kind == "amplitude_growth" for e in out for t in e.transitions)
        above = [ev.evaluate(_analysis(10 + i, 12.0, overall=2.8001)) for i in range(3)]
        assert [t.severity for e in above for t in e.transitions] == ["alert"]

    def test_baseline_ratio_alarms_and_restart(self):
        ev = MachineEvaluator(_machine(settings={"baseline_readings": 10}))
        rng = np.random.default_rng(0)
        trans = []
        t = 0.0
        for _ in range(10):
            t += 3600
            trans += ev.evaluate(_analysis(t, 12.0, one_x=1.0 + 0.02 * rng.standard_normal())).transitions
        assert trans == []
        for _ in range(3):
            t += 3600
            trans += ev.evaluate(_analysis(t, 12.0, one_x=2.5)).transitions
        one = [x for x in trans if x.alarm["subject"] == "1x"]
        assert [(x.name, x.severity) for x in one] == [("raised", "advisory")]
        # raised: 2x = +6 dB, common practice. analytic: 1x of 2.5 over a baseline of 1.0;
        # tolerance: 5 % covers the baseline median of 10 readings with 2 % noise
        assert one[0].evidence["ratio"] == pytest.approx(2.5, rel=0.05)
        for _ in range(3):
            t += 3600
            trans += ev.evaluate(_analysis(t, 12.0, one_x=4.5)).transitions
        assert [x.severity for x in trans if x.alarm["subject"] == "1x"][-1] == "alert"
        ev.restart_baseline("de", t)
        e = ev.evaluate(_analysis(t + 3600, 12.0, one_x=4.5))
        assert e.feature("1x").baseline_status.startswith("learning 1/10")

    def test_other_speed_not_compared_but_normalised_is(self):
        ev = MachineEvaluator(_machine(settings={"baseline_readings": 5}))
        for i in range(5):
            ev.evaluate(_analysis(i * 60, 10.0, one_x=1.0))
        # At 13 Hz an unchanged unbalance gives 1.69x the 1x (force ~ speed^2, Thomson).
        e = ev.evaluate(_analysis(600, 13.0, one_x=1.69))
        assert e.feature("1x").ratio is None and "not comparable" in e.feature("1x").baseline_status
        assert e.feature("1x_norm").ratio == pytest.approx(1.0)

    def test_readings_of_a_sweep_through_a_band_leave_growth_but_keep_their_zone(self):
        # Rules (docs/alarms.md, "amplitude_growth"): the zone is judged on every reading;
        # a reading taken within resonance_dwell_s (60 s) of the speed entering a required
        # band is left out of the baseline and the trend, and said so.
        ev = MachineEvaluator(_machine())
        for i in range(3):
            assert ev.evaluate(_analysis(i, 12.0, overall=1.0)).growth_ignored is None
        trans = []
        for i in range(3, 6):  # 1x at 17 Hz: inside the required band (15 to 23 Hz)
            e = ev.evaluate(_analysis(i, 17.0, overall=6.0))
            assert e.growth_ignored == "sweep through band: pedestal@1x"
            assert e.feature("1x").ratio is None and e.feature("1x").trend_per_day is None
            assert e.feature("overall").baseline_status == "not comparable: sweep through band pedestal@1x"
            trans += e.transitions
        # 6.0 mm/s is zone D for group 2 rigid (C/D 4.5 mm/s, ISO 10816-3 Table A.2, from memory).
        g = [t for t in trans if t.kind == "amplitude_growth" and t.alarm["subject"] == "overall"]
        assert [(t.name, t.severity) for t in g] == [("raised", "severe")]
        assert g[0].evidence["ignored_readings"] == {"sweep through band": 3}
        # Dwelling in the band from 3 s: from 63 s on the readings are used again.
        assert ev.evaluate(_analysis(62, 17.0, overall=6.0)).growth_ignored is not None
        assert ev.evaluate(_analysis(63, 17.0, overall=6.0)).growth_ignored is None

    def test_trend_projects_time_to_limit(self):
        # Linear growth 0.1 mm/s RMS per day from 1.0: B/C (2.8) in 18 days from start.
        ev = MachineEvaluator(_machine(settings={"trend_min_readings": 10}))
        trans = []
        e = None
        for i in range(60):
            t = i * DAY / 4
            e = ev.evaluate(_analysis(t, 12.0, overall=1.0 + 0.1 * t / DAY))
            trans += e.transitions
        # After 14.75 days at 2.475 mm/s: (2.8 - 2.475) / 0.1 = 3.25 days to B/C.
        f = e.feature("overall")
        assert f.limit_name == "B/C"
        assert f.time_to_limit_s / DAY == pytest.approx(3.25, rel=0.01)
        first = next(t for t in trans if t.alarm["subject"] == "overall")
        assert first.name == "raised" and first.severity == "advisory"
        assert "B/C in" in " ".join(first.evidence["causes"])


class TestSensorHealth:
    def test_faulty_reading_raises_sensor_fault_not_machine_alarms(self):
        ev = MachineEvaluator(_machine())
        trans = []
        for i in range(4):
            # Zone D and inside the resonance band, but the sensor is flat-lined.
            e = ev.evaluate(_analysis(i, 16.5, overall=9.0), _waveform(i, samples=np.zeros(4096)))
            trans += e.transitions
            assert e.machine_alarms_suppressed and e.growth_ignored.startswith("sensor fault")
        assert {t.kind for t in trans} == {"sensor_fault"}
        assert [(t.name, t.alarm["subject"]) for t in trans] == [("raised", "flat_line")]
        for i in range(4, 7):
            trans += ev.evaluate(_analysis(i, 12.0), _waveform(i)).transitions
        assert _names(trans, "sensor_fault") == ["raised", "cleared"]

    def test_registry_mismatch(self):
        ev = MachineEvaluator(_machine())
        trans = []
        for i in range(3):
            trans += ev.evaluate(_analysis(i, 12.0), _waveform(i, fs_hz=12800.0, unit="g")).transitions
        assert sorted(t.alarm["subject"] for t in trans) == ["sample_rate", "unit"]

    def test_stale_stream(self):
        ev = MachineEvaluator(_machine())
        for i in range(5):
            ev.evaluate(_analysis(i * 60, 12.0), _waveform(i * 60))
        assert ev.check_stale(4 * 60 + 150) == []  # 2.5 intervals: fine
        tr = ev.check_stale(4 * 60 + 200)  # 3.3 intervals of 60 s
        assert [(t.name, t.alarm["subject"], t.alarm["point"]) for t in tr] == [("raised", "stale", "de")]
        assert ev.check_stale(4 * 60 + 400) == []  # no repeat
        back = ev.evaluate(_analysis(1000, 12.0), _waveform(1000))
        assert _names(back.transitions, "sensor_fault") == ["cleared"]


def test_acknowledge_and_snapshot_restore_equivalence():
    m = _machine(settings={"baseline_readings": 5})
    rng = np.random.default_rng(9)
    readings = [(i * 600.0, float(s), float(v)) for i, (s, v) in enumerate(
        zip(14.0 + 2.5 * np.sin(np.arange(200) / 9.0), 2.6 + 0.5 * rng.standard_normal(200), strict=True))]
    a = MachineEvaluator(m)
    b = MachineEvaluator(m)
    out_a, out_b = [], []
    for i, (t, s, v) in enumerate(readings):
        out_a += [x.to_json() for x in a.evaluate(_analysis(t, s, overall=v), _waveform(t)).transitions]
        if i % 23 == 0:
            b = MachineEvaluator.restore(m, json.loads(json.dumps(b.snapshot())))
        out_b += [x.to_json() for x in b.evaluate(_analysis(t, s, overall=v), _waveform(t)).transitions]
    assert out_a == out_b and len(out_a) >= 4
    active = a.active_alarms()
    if active:
        tr = a.acknowledge(active[0]["id"], "j.berg", "noted", 1e6)
        assert tr.to_json()["acknowledged_by"] == "j.berg"


def test_evaluation_json_and_stored_state():
    m = _machine()
    ev = MachineEvaluator(m)
    e = ev.evaluate(_analysis(0.0, 16.5, overall=3.0, rid="r-1"), _waveform(0.0))
    js = json.loads(json.dumps(e.to_json()))
    # group2/rigid: 1.4 / 2.8 / 4.5 mm/s RMS (ISO 10816-3:2009 Table A.2, from memory); 3.0 is C
    assert js["zone"] == "C" and js["zone_limits_mm_s"] == [1.4, 2.8, 4.5]
    assert js["margins"][0]["status"] == "inside"
    # The tightest pair is the row the whole table gives (docs/api.md, /machines: the
    # nearest margin against its required margin, i.e. the smallest SM minus required).
    assert e.nearest_margin() == min(e.margins, key=lambda r: r.margin_pct - r.required_pct)
    # Features built on access are the same objects however they are reached.
    assert e.feature("overall") is e.features[0] and tuple(e.features) == e.features
    assert js["health"]["ok"] is True
    # Through the stored form the service keeps (detector_state.state) and back.
    ev2, version = evaluator_from_state(m, json.loads(json.dumps(stored_state(ev, 4))))
    assert version == 4 and ev2.snapshot() == ev.snapshot()
    with pytest.raises(ValueError, match="machine"):
        ev.evaluate(_analysis(0.0, 12.0, machine="other"))


def test_evaluation_has_every_field_and_equals_its_dataclass_copy():
    # evaluate builds ReadingEvaluation past its __init__: every declared field must be
    # set, and the object must equal one made through the dataclass's own constructor.
    from dataclasses import fields, replace

    from monitor.detection.results import ReadingEvaluation

    ev = MachineEvaluator(_machine())
    e = ev.evaluate(_analysis(0.0, 16.5, overall=3.0, rid="r-1"), _waveform(0.0))
    assert set(vars(e)) == {f.name for f in fields(ReadingEvaluation)}
    assert replace(e) == e and replace(e).to_json() == e.to_json()


def test_waveform_without_analysis_checks_health_only():
    # The service passes analysis=None when the analysis rejected the block.
    ev = MachineEvaluator(_machine())
    trans = []
    for i in range(3):
        e = ev.evaluate(None, _waveform(i, samples=np.zeros(4096)))
        trans += e.transitions
    assert [(t.kind, t.name) for t in trans] == [("sensor_fault", "raised")]
    assert e.machine_alarms_suppressed and e.zone is None and e.margins == ()
    json.dumps(e.to_json())
    with pytest.raises(ValueError, match="neither"):
        ev.evaluate(None, None)


def test_mode_shift_findings_raise_escalate_and_clear_at_once():
    # Shifts from monitor.modes.shift.mode_shift: (identified - stored) / stored x 100 against a
    # 5 % tolerance (common practice); beyond twice the tolerance the alarm is an alert
    # (docs/alarms.md). One test is one reading: no persistence.
    from monitor.modes.shift import compare_modes

    m = _machine()
    ev = MachineEvaluator(m)
    stored = m.modes
    first = stored[0]
    f0 = first.frequency_hz

    def test(factor: float | None, ts: float):
        found = [] if factor is None else [f0 * factor]
        return ev.observe_mode_findings(compare_modes(stored[:1], found), ts, point="de",
                                        evidence={"source": "impact test"})

    (t,) = test(0.93, 1.0)  # -7 %: beyond 5 %, within 10 %
    assert (t.name, t.severity, t.kind, t.alarm["subject"]) == ("raised", "advisory", "mode_shift", first.name)
    assert t.evidence["shift_pct"] == pytest.approx(-7.0) and t.evidence["source"] == "impact test"
    assert test(0.93, 2.0) == []  # the same again: nothing new
    (t,) = test(0.88, 3.0)  # -12 %: beyond twice the tolerance
    assert (t.name, t.severity) == ("escalated", "alert")
    assert test(None, 4.0) == []  # the mode not found: no information, the alarm stays
    (t,) = test(1.02, 5.0)  # back within the tolerance
    assert t.name == "cleared"
    with pytest.raises(ValueError, match="does not have"):
        ev.observe_mode_findings(compare_modes([Mode("other", 10.0)], [10.0]), 6.0)
    with pytest.raises(KeyError):
        ev.observe_mode_findings([], 6.0, point="nowhere")
