"""The alarm rules on closed-form scenarios whose right answer is known (docs/alarms.md):
zone severity next to a mode, transients told from dwelling, going down by the worst level
of the persistence window, resonance from the speed stream alone, and the time to a limit
from the fitted line.

Readings are built from closed forms (linear growth, the steady forced response of a
single-degree-of-freedom system with rotating unbalance), never from the simulator or
from our own outputs.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from monitor.analysis.orders import OrderAmplitude
from monitor.analysis.waveform import ReadingAnalysis, Spectrum, analyse_waveform
from monitor.detection.evaluator import MachineEvaluator
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point

DAY = 86400.0
HOUR = 3600.0
FS = 25600.0
_EMPTY = Spectrum(np.zeros(2), np.zeros(2), "m/s^2", "peak", 1.0, 1.5)


def api684_required_pct(af: float) -> tuple[float, float]:
    """API 684 separation margin (from memory): (mode below the excitation, mode above), %."""
    core = 17.0 * (1.0 - 1.0 / (af - 1.5))
    return min(16.0, core), min(26.0, 10.0 + core)


def sdof_unbalance_velocity_mm_s_rms(speed_hz: float, fn_hz: float, zeta: float, me_over_m_m: float) -> float:
    """Steady velocity (mm/s RMS) of a SDOF system driven by a rotating unbalance:
    X = (m e / M) r^2 / sqrt((1 - r^2)^2 + (2 zeta r)^2), v = omega X (Thomson, *Theory of
    Vibration with Applications*, rotating unbalance)."""
    r = speed_hz / fn_hz
    x = me_over_m_m * r * r / math.sqrt((1 - r * r) ** 2 + (2 * zeta * r) ** 2)
    return 2 * math.pi * speed_hz * x * 1e3 / math.sqrt(2)


def reading(machine: str, ts: float, speed: float, overall: float, point: str = "de") -> ReadingAnalysis:
    """An analysis whose overall velocity is ``overall`` (mm/s RMS) and whose 1x and 2x
    peak velocities follow it (sqrt(2) x RMS, all of it at 1x; a tenth at 2x)."""
    one_x = math.sqrt(2) * overall
    return ReadingAnalysis(
        machine=machine, point=point, ts=float(ts), speed_hz=float(speed), speed_source="measured",
        speed_uncertainty_hz=0.0, overall_velocity_mm_s_rms=float(overall),
        orders=(OrderAmplitude(1.0, speed, one_x, one_x), OrderAmplitude(2.0, 2 * speed, 0.1 * one_x, 0.1 * one_x)),
        one_x_normalised=one_x / speed**2, peaks=(), spectrum=_EMPTY, velocity_spectrum=_EMPTY,
    )


def growth_transitions(trans, subject="overall"):
    return [(t.name, t.severity, t.ts) for t in trans if t.kind == "amplitude_growth" and t.alarm["subject"] == subject]


def resonance_transitions(trans):
    return [(t.name, t.severity, t.ts, t.alarm["subject"]) for t in trans if t.kind == "resonance_proximity"]


# ----------------------------------------------------------------------------- zones next to a mode


def pump(mode_hz: float) -> Machine:
    return Machine(
        id="pump", machine_class="group2/rigid", excitation_orders=(1.0, 2.0), speed_range_rpm=(1400.0, 1600.0),
        modes=(Mode("casing", mode_hz, damping_ratio=0.05),), points=(Point("de", fs_hz=FS, unit="m/s^2"),),
    )


def test_zone_alarms_of_two_pumps_grow_alike_whether_or_not_2x_sits_next_to_a_mode():
    speed = 25.01  # 2x at 50.02 Hz
    near, far = pump(61.0), pump(150.0)
    # 2x is 18 % below the 61 Hz mode: (61 - 50.02) / 61 = 18.0 %; required for AF 10
    # (1 / (2 x 0.05), Thomson half-power) with the mode above: 25 % (API 684).
    assert (61.0 - 2 * speed) / 61.0 * 100 == pytest.approx(18.0, abs=0.01)
    assert api684_required_pct(10.0)[1] == pytest.approx(25.0)
    n = 60
    levels = [1.5 + (5.6 - 1.5) * k / (n - 1) for k in range(n)]  # linear growth, mm/s RMS
    out = {}
    for name, machine in (("near", near), ("far", far)):
        ev = MachineEvaluator(machine)
        trans = []
        for k, v in enumerate(levels):
            e = ev.evaluate(reading("pump", k * 12 * HOUR, speed, v))
            assert e.growth_ignored is None  # a steady speed: every reading is growth
            trans += e.transitions
        out[name] = trans
    assert growth_transitions(out["near"]) == growth_transitions(out["far"])
    # The near pump's resonance alarm is raised as well, once it has dwelt (12 h apart).
    assert resonance_transitions(out["near"])[0][:2] == ("raised", "alert")
    assert resonance_transitions(out["far"]) == []
    # Group 2 rigid boundaries 1.4 / 2.8 / 4.5 mm/s RMS (ISO 20816-3, Table A.2, values
    # from memory); a zone includes its upper boundary. The alarm (advisory by then, from
    # the trend) escalates to alert and severe at the persistence-th (3rd) reading past
    # B/C and C/D.
    first_c = next(k for k, v in enumerate(levels) if v > 2.8)
    first_d = next(k for k, v in enumerate(levels) if v > 4.5)
    g = growth_transitions(out["near"])
    assert [(name, sev, ts / (12 * HOUR)) for name, sev, ts in g if sev != "advisory"] == [
        ("escalated", "alert", first_c + 2), ("escalated", "severe", first_d + 2)]


# ----------------------------------------------------------------------------- transients and dwell

FAN_FN, FAN_ZETA = 20.0, 0.02


def fan() -> Machine:
    return Machine(
        id="fan", machine_class="group2/flexible", excitation_orders=(1.0,), speed_range_rpm=(300.0, 1800.0),
        modes=(Mode("lateral", FAN_FN, damping_ratio=FAN_ZETA),), points=(Point("de", fs_hz=FS, unit="m/s^2"),),
    )


#: Unbalance (m e / M, m) giving 1 mm/s RMS at 30 Hz (input, not an expected value).
FAN_ME_M = 1.0 / sdof_unbalance_velocity_mm_s_rms(30.0, FAN_FN, FAN_ZETA, 1.0)


def run_fan(speed_at, end_s: float, speed_every_s: float = 0.5, reading_every_s: float = 2.0):
    """A fan fed a tach speed every ``speed_every_s`` and a reading (closed-form SDOF
    response) every ``reading_every_s`` up to ``end_s``; returns every transition and
    the readings' evaluations."""
    ev = MachineEvaluator(fan())
    trans, evaluations = [], []
    n = int(round(end_s / speed_every_s))
    per = int(round(reading_every_s / speed_every_s))
    for i in range(n + 1):
        t = i * speed_every_s
        sp = speed_at(t)
        trans += ev.observe_speed(SpeedReading("fan", t, sp))
        if i % per == 0:
            v = sdof_unbalance_velocity_mm_s_rms(sp, FAN_FN, FAN_ZETA, FAN_ME_M)
            e = ev.evaluate(reading("fan", t, sp, v))
            evaluations.append(e)
            trans += e.transitions
    return trans, evaluations


def test_a_sweep_through_a_mode_at_half_a_hertz_per_second_raises_nothing():
    # Run-up 10 -> 30 Hz at 0.5 Hz/s through the 20 Hz mode (zeta 0.02). The required band
    # (API 684 for AF 25: 26 % above, 16 % below) is 14.8 to 23.2 Hz: 16.8 s inside, less
    # than the 60 s dwell (docs/alarms.md, "Dwell").
    below, above = api684_required_pct(1.0 / (2 * FAN_ZETA))
    lo, hi = FAN_FN * (1 - above / 100), FAN_FN * (1 + below / 100)
    assert (hi - lo) / 0.5 == pytest.approx(16.8)
    trans, evaluations = run_fan(lambda t: min(10.0 + 0.5 * t, 30.0), 120.0)
    assert trans == []
    # The readings taken inside the band were left out of growth, and said so.
    swept = [e for e in evaluations if lo < e.speed_hz < hi]
    assert swept and all(e.growth_ignored == "sweep through band: lateral@1x" for e in swept)
    # The SDOF peak was reached: H(1) = 1 / (2 zeta) = 25 times the static response.
    peak = max(e.overall_velocity_mm_s_rms for e in evaluations)
    assert peak == pytest.approx(sdof_unbalance_velocity_mm_s_rms(FAN_FN, FAN_FN, FAN_ZETA, FAN_ME_M), rel=0.02)


def test_the_same_sweep_stalled_inside_the_band_alarms_after_the_dwell():
    # The same run-up stops at 17 Hz, inside the required band (margin 15 % < 26 %).
    below, above = api684_required_pct(1.0 / (2 * FAN_ZETA))
    approach = 1.5 * above  # approach band, 1.5 x the required margin (docs/alarms.md)
    trans, evaluations = run_fan(lambda t: min(10.0 + 0.5 * t, 17.0), 150.0)
    # The first tach values inside each band (every 0.5 s on the ramp).
    t_approach = next(t / 2 for t in range(300) if (FAN_FN - (10 + 0.25 * t)) / FAN_FN * 100 < approach)
    t_required = next(t / 2 for t in range(300) if (FAN_FN - (10 + 0.25 * t)) / FAN_FN * 100 < above)
    assert (t_approach, t_required) == (4.5, 10.0)
    res = resonance_transitions(trans)
    # Dwell 60 s in a band, then 3 counted speed values (persistence) 0.5 s apart.
    assert res == [("raised", "advisory", t_approach + 60 + 1.0, "lateral@1x"),
                   ("escalated", "alert", t_required + 60 + 1.0, "lateral@1x")]
    # Readings while sweeping in (within 60 s of entering) are left out of growth; the
    # steady readings after the dwell are growth again.
    stalled = [e for e in evaluations if e.ts >= t_required]
    assert all((e.growth_ignored is not None) == (e.ts - t_required < 60) for e in stalled)


def test_dwell_setting_has_bounds():
    with pytest.raises(ValueError, match="'resonance_dwell_s' must be a number >= 0 and <= 86400"):
        MachineEvaluator(replace(fan(), settings={"resonance_dwell_s": -1}))
    ev = MachineEvaluator(replace(fan(), settings={"resonance_dwell_s": 0}))
    # No dwell: raised at the persistence-th speed inside the band, as a plain on-delay.
    trans = [t for i in range(3) for t in ev.observe_speed(SpeedReading("fan", float(i), 17.0))]
    assert resonance_transitions(trans) == [("raised", "alert", 2.0, "lateral@1x")]


# ----------------------------------------------------------------------------- going down


def test_alternating_clear_and_approach_brings_the_alarm_below_alert_then_clears():
    # The fan dwelt at 13 Hz next to its 15.5 Hz mode (zeta 0.025: AF 20, required 26 %
    # above and 16 % below, API 684), then ran at 22 Hz by day (41.9 % away, clear) and at
    # 10 Hz by night (35.5 %, inside the 39 % approach band), a reading every 12 h.
    machine = Machine(
        id="ef", machine_class="group2/flexible", excitation_orders=(1.0,), speed_range_rpm=(360.0, 1500.0),
        modes=(Mode("pedestal", 15.5, damping_ratio=0.025),), points=(Point("de", fs_hz=FS, unit="m/s^2"),),
    )
    below, above = api684_required_pct(20.0)
    margin_13, margin_10, margin_22 = (abs(speed - 15.5) / 15.5 * 100 for speed in (13.0, 10.0, 22.0))
    assert margin_13 < above  # inside: alert
    assert above * 1.1 < margin_10 < 1.5 * above  # approach, and no alert held
    assert margin_22 > 1.5 * below * 1.1  # clear (mode below 22 Hz), beyond the hysteresis
    ev = MachineEvaluator(machine)
    trans = []
    for i in range(12):  # an hour at 13 Hz, a reading every 5 min
        trans += ev.evaluate(reading("ef", i * 300.0, 13.0, 1.0)).transitions
    assert resonance_transitions(trans)[-1][:2] == ("raised", "alert")
    left = 12 * 300.0
    trans = []
    for k in range(26):  # 13 days of day and night
        trans += ev.evaluate(reading("ef", left + k * 12 * HOUR, 22.0 if k % 2 == 0 else 10.0, 1.0)).transitions
    # Rule (docs/alarms.md, "Going down"): the worst level of the last 3 readings
    # (clear, approach, clear) is advisory: below alert at the 3rd reading after leaving.
    assert resonance_transitions(trans) == [("de-escalated", "advisory", left + 2 * 12 * HOUR, "pedestal@1x")]
    trans = []
    for k in range(26, 29):  # the speed stays clear
        trans += ev.evaluate(reading("ef", left + k * 12 * HOUR, 22.0, 1.0)).transitions
    assert resonance_transitions(trans) == [("cleared", "advisory", left + 28 * 12 * HOUR, "pedestal@1x")]


# ----------------------------------------------------------------------------- speed alone


def test_dead_accelerometer_with_a_live_tach_raises_a_sensor_fault_and_a_resonance_alarm():
    machine = fan()
    ev = MachineEvaluator(machine)
    point = machine.point("de")
    trans = []
    speed_evaluations = []
    for i in range(25):  # a tach every 10 s at 17 Hz: 1x 15 % below the 20 Hz mode
        t = i * 10.0
        s = ev.evaluate_speed(SpeedReading("fan", t, 17.0))
        speed_evaluations.append(s)
        trans += s.transitions
        if i % 3 == 0:  # a waveform every 30 s from an accelerometer stuck at its bias
            w = Waveform("fan", "de", t, FS, "m/s^2", np.full(4096, 0.02))
            try:
                a = analyse_waveform(w, machine, point)
            except ValueError:
                a = None
            e = ev.evaluate(a, w)
            assert e.machine_alarms_suppressed
            trans += e.transitions
    kinds = {(t.kind, t.alarm["subject"], t.name, t.severity) for t in trans}
    assert ("sensor_fault", "flat_line", "raised", "alert") in kinds
    # Margin 15 % inside the 26 % required above the mode (API 684, AF 25): alert, after
    # the 60 s dwell and 3 speeds (10 s apart) from the first at 0 s.
    assert resonance_transitions(trans) == [("raised", "alert", 80.0, "lateral@1x")]
    # The speed message's evaluation carries the margin table at the tach's speed.
    last = speed_evaluations[-1]
    row = last.nearest_margin()
    assert row is not None and row.status == "inside" and row.margin_pct == pytest.approx(15.0)
    assert last.to_json()["margins"][0]["excitation_hz"] == pytest.approx(17.0)
    assert ev.latest_speed == (240.0, 17.0)


# ----------------------------------------------------------------------------- time to limit


@pytest.mark.parametrize(("start", "noisy", "limit"), [
    (1.0, 2.9, ("B/C", 2.8)),  # one reading above B/C while the line is at 1.975 mm/s
    (2.0, 2.7, ("C/D", 4.5)),  # one reading below B/C while the line is at 2.975 mm/s
])
def test_time_to_limit_is_from_the_fitted_line(start, noisy, limit):
    # Linear growth of 0.1 mm/s RMS a day, a reading every 6 h; the last reading noisy.
    # Closed form: the line now is start + 0.1 x 9.75 days, the next limit the first
    # boundary above it (group 2 rigid 1.4 / 2.8 / 4.5 mm/s RMS, ISO 20816-3 Table A.2,
    # from memory), the time (limit - line now) / slope. Theil-Sen ignores the one
    # outlier exactly (median of pairwise slopes; Sen 1968).
    ev = MachineEvaluator(replace(pump(150.0), settings={"trend_refit_every": 1}))
    n = 40
    e = None
    for k in range(n):
        t = k * 6 * HOUR
        v = start + 0.1 * t / DAY if k < n - 1 else noisy
        e = ev.evaluate(reading("pump", t, 25.0, v))
    line_now = start + 0.1 * (n - 1) * 0.25
    f = e.feature("overall")
    assert (f.limit_name, f.limit_value) == limit
    assert f.time_to_limit_s / DAY == pytest.approx((limit[1] - line_now) / 0.1, rel=1e-9)


def test_a_state_kept_without_stays_takes_the_next_speed_as_the_first_seen():
    # A detector state written before stays were kept: no entry into a band is known, so
    # the next speed inside a band starts its dwell and is not taken for a sweep
    # (docs/alarms.md, "Dwell").
    ev = MachineEvaluator(fan())
    for i in range(3):
        ev.observe_speed(SpeedReading("fan", float(i), 12.0 + i))
    snap = ev.snapshot()
    assert snap["stays"] == {"lateral@1x": [1.0, None, None, False]}  # approach band (39 %) from 13 Hz
    del snap["stays"]
    again = MachineEvaluator.restore(fan(), snap)
    e = again.evaluate(reading("fan", 3.0, 17.0, 1.0))
    assert e.growth_ignored is None
    assert again.snapshot()["stays"] == {"lateral@1x": [3.0, 3.0, None, False]}


def test_the_speed_normalised_1x_is_not_compared_where_a_mode_amplifies_1x():
    # Baseline learned at 22 Hz; then the fan dwells at 15 Hz, 1x inside the required band
    # of its 15.5 Hz mode (zeta 0.025). The SDOF response there (Thomson, rotating
    # unbalance) is several times what the speed squared explains, with the unbalance
    # unchanged: not growth, so 1x_norm is compared with nothing (docs/alarms.md).
    machine = Machine(
        id="ef", machine_class="group2/flexible", excitation_orders=(1.0,), speed_range_rpm=(360.0, 1500.0),
        modes=(Mode("pedestal", 15.5, damping_ratio=0.025),), points=(Point("de", fs_hz=FS, unit="m/s^2"),),
        settings={"baseline_readings": 5},
    )
    me = 1.0 / sdof_unbalance_velocity_mm_s_rms(22.0, 15.5, 0.025, 1.0)  # 1 mm/s RMS at 22 Hz
    v15 = sdof_unbalance_velocity_mm_s_rms(15.0, 15.5, 0.025, me)
    assert (v15 / 15.0**2) / (1.0 / 22.0**2) > 4  # what 1x_norm would call 4x baseline
    ev = MachineEvaluator(machine)
    trans = []
    for k in range(6):
        trans += ev.evaluate(reading("ef", k * HOUR, 22.0, 1.0)).transitions
    for k in range(6, 30):
        e = ev.evaluate(reading("ef", k * HOUR, 15.0, v15))
        trans += e.transitions
    f = e.feature("1x_norm")
    assert f.ratio is None and f.baseline_status == "not comparable: 1x inside the required band of pedestal@1x"
    assert growth_transitions(trans, "1x_norm") == []
