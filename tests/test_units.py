"""Unit conversions against the SI definitions (scipy.constants as the reference)."""

import math

import numpy as np
import pytest
from scipy import constants

from monitor.model import units


class TestConvert:
    def test_g_is_standard_gravity(self):
        # 3rd CGPM (1901), SI Brochure: g_n = 9.80665 m/s^2 exactly
        assert units.convert(1.0, "g", "m/s^2") == pytest.approx(9.80665, rel=1e-15)
        assert units.convert(9.80665, "m/s^2", "g") == pytest.approx(1.0, rel=1e-15)
        assert constants.g == 9.80665

    def test_inch_is_25_4_mm(self):
        # international inch (1959): 1 in = 25.4 mm exactly; 1 mil = 0.001 in = 25.4 um
        assert units.convert(1.0, "in/s", "mm/s") == pytest.approx(25.4, rel=1e-15)
        assert units.convert(1.0, "mil", "um") == pytest.approx(25.4, rel=1e-15)
        assert units.convert(25.4, "um", "mil") == pytest.approx(1.0, rel=1e-15)

    def test_arrays_and_round_trip(self):
        v = np.array([0.1, 2.0, 7.1], dtype=np.float32)
        out = units.convert(units.convert(v, "mm/s", "in/s"), "in/s", "mm/s")
        # definition: a round trip returns the input; tolerance: float32 rounding (~6e-8)
        np.testing.assert_allclose(out, v, rtol=1e-6)

    def test_quantity_of(self):
        assert units.quantity_of("g") == "acceleration"
        assert units.quantity_of("in/s") == "velocity"
        assert units.quantity_of("mil") == "displacement"

    def test_unknown_unit_is_named(self):
        with pytest.raises(ValueError, match="from_unit 'ft/s'"):
            units.convert(1.0, "ft/s", "mm/s")
        with pytest.raises(ValueError, match="unit 'furlong'"):
            units.quantity_of("furlong")

    def test_across_quantities_refused(self):
        with pytest.raises(ValueError, match="to_unit 'um'"):
            units.convert(1.0, "mm/s", "um")


class TestAmplitudeMeasures:
    def test_sinusoid_relations(self):
        # sinusoid: peak = sqrt(2) x RMS, peak-to-peak = 2 x peak (any vibration handbook)
        t = np.linspace(0, 1, 100_000, endpoint=False)
        x = 3.0 * np.sin(2 * np.pi * 7 * t)
        rms = float(np.sqrt(np.mean(x**2)))
        assert units.peak_to_rms(3.0) == pytest.approx(rms, rel=1e-9)
        assert units.rms_to_peak(rms) == pytest.approx(3.0, rel=1e-9)
        assert units.peak_to_pp(3.0) == pytest.approx(x.max() - x.min(), rel=1e-6)
        assert units.pp_to_peak(6.0) == 3.0
        assert units.convert_amplitude(6.0, "peak-to-peak", "rms") == pytest.approx(3 / math.sqrt(2))

    def test_bad_kind_named(self):
        with pytest.raises(ValueError, match="to_kind 'average'"):
            units.convert_amplitude(1.0, "peak", "average")


class TestVelocityFrom:
    def test_one_g_at_100_hz(self):
        # V = A / (2 pi f): 1 g peak at 100 Hz = 15.608 mm/s peak = 11.036 mm/s RMS
        # (computed from the formula with standard gravity, scipy.constants.g)
        v = units.velocity_mm_s_from(1.0, "g", 100.0)
        assert v == pytest.approx(constants.g / (2 * math.pi * 100) * 1e3, rel=1e-12)
        assert v == pytest.approx(15.608, abs=5e-4)
        assert units.peak_to_rms(v) == pytest.approx(11.036, abs=5e-4)

    def test_displacement(self):
        # V = 2 pi f D: 100 um peak at 50 Hz -> 31.416 mm/s peak
        assert units.velocity_mm_s_from(100.0, "um", 50.0) == pytest.approx(
            2 * math.pi * 50 * 100e-3, rel=1e-12
        )


class TestOneTable:
    def test_from_si_factor(self):
        # SI definitions (scipy.constants): 1 m/s = 1000 mm/s = 1 / 0.0254 in/s; 1 m = 1e6 um
        # = 1 / 25.4e-6 mil; 1 m/s^2 = 1 / 9.80665 g
        assert units.from_si_factor("m/s^2") == 1.0
        assert units.from_si_factor("g") == pytest.approx(1 / constants.g, rel=1e-15)
        assert units.from_si_factor("mm/s") == 1e3
        assert units.from_si_factor("in/s") == pytest.approx(1 / constants.inch, rel=1e-15)
        assert units.from_si_factor("um") == 1e6
        assert units.from_si_factor("mil") == pytest.approx(1 / (constants.inch * 1e-3), rel=1e-15)

    def test_quantities_and_base_units(self):
        # the vocabulary of docs/mqtt.md and docs/registry.md: two units per quantity, the
        # SI-derived one (m/s^2, mm/s, um) first and the base of every conversion
        assert units.UNITS_BY_QUANTITY == {
            "acceleration": ("m/s^2", "g"), "velocity": ("mm/s", "in/s"),
            "displacement": ("um", "mil")}
        assert {u: units.to_base_factor(units.BASE_UNIT[units.UNIT_QUANTITY[u]])
                for u in units.UNITS} == dict.fromkeys(units.UNITS, 1.0)
        with pytest.raises(ValueError, match="quantity must be one of .* got 'jerk'"):
            units.check_quantity("jerk")
