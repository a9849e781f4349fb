"""Spectrum markers on demand on the machine page, in headless Chromium on the fault cases
of tests/test_browser_causes.py (its server and page): the pure marker function
(dashboard/static/js/spectrum_marks.js) against the closed forms, harmonics k·f of a
frequency f (a periodic force's Fourier series) and sidebands fc ± k·fs around a carrier
fc (the spectrum of a modulation at fs; Randall, Vibration-based Condition Monitoring,
2011, chapter 3; from memory); and the page: harmonics of 1x at the running speed of the
spectrum, a click on a peak choosing the frequency or the carrier, the markers drawn and
listed in the chart's text alternative. Screenshots go to test-artifacts/."""

from __future__ import annotations

import json

import pytest
from test_browser_causes import ARTIFACTS, page, server  # noqa: F401  (fixtures)

from monitor.sim.fault_cases import SPEED_HZ, case_machine

pytestmark = [pytest.mark.browser, pytest.mark.slow]

#: The marker colours the page draws (dashboard/static/js/machine.js MARK_STYLE).
GREEN, PURPLE, RED = (0x2A, 0x7D, 0x4F), (0x7B, 0x3A, 0x96), (0xB3, 0x26, 0x1E)


def _open(page, server, case):  # noqa: F811
    page.goto(server + "/machines/" + case_machine(case).id)
    page.wait_for_selector("body[data-loaded='1']")
    page.wait_for_selector("#chart-spectrum[data-drawn='1']")


def _marks(page):  # noqa: F811
    return json.loads(page.get_attribute("#chart-spectrum", "data-marks"))


def _ink(page, rgb):  # noqa: F811
    """Pixels of the spectrum's canvas within 40 of colour ``rgb`` (each channel)."""
    return page.evaluate("""([r, g, b]) => {
        const c = document.querySelector('#chart-spectrum canvas');
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
        let n = 0;
        for (let i = 0; i < d.length; i += 4)
          if (d[i + 3] > 200 && Math.abs(d[i] - r) < 40 && Math.abs(d[i + 1] - g) < 40 && Math.abs(d[i + 2] - b) < 40) n++;
        return n; }""", list(rgb))


def _click_at_hz(page, hz):  # noqa: F811
    """Click the spectrum's plot at frequency ``hz`` (the x scale runs 0 to data-x-max)."""
    over = page.locator("#chart-spectrum .u-over")
    over.scroll_into_view_if_needed()  # the mouse clicks the viewport
    box = over.bounding_box()
    x_max = float(page.get_attribute("#chart-spectrum", "data-x-max"))
    page.mouse.click(box["x"] + hz / x_max * box["width"], box["y"] + box["height"] / 2)


def test_marker_frequencies_are_the_closed_forms(server, page):  # noqa: F811
    _open(page, server, "unbalance")
    run = page.evaluate("""f => SpectrumMarks.markerFrequencies({ harmonics: [
        { family: 'run', name: 'Harmonics of 1x', hz: f, count: 10, order: true }] })""", SPEED_HZ)
    # harmonics of f: k·f, k = 1..N (Fourier series of a force periodic in 1/f)
    assert [m["hz"] for m in run] == pytest.approx([k * SPEED_HZ for k in range(1, 11)], rel=1e-12)
    assert [m["label"] for m in run] == [f"{k}x" for k in range(1, 11)]
    # cut at the spectrum's top: 7.3 Hz up to 200 Hz keeps k <= 200 / 7.3
    cut = page.evaluate("""() => SpectrumMarks.markerFrequencies({ harmonics: [
        { family: 'freq', name: 'Harmonics', hz: 7.3, count: 50, order: false }] }, 200)""")
    assert [m["hz"] for m in cut] == pytest.approx([k * 7.3 for k in range(1, 28)], rel=1e-12)
    assert [m["label"] for m in cut[:3]] == ["f", "2f", "3f"]
    # sidebands: fc + k·fs, k = -N..N, only above 0 Hz: fc 100 Hz, fs = 1x, 5 each side
    side = page.evaluate("""fs => SpectrumMarks.markerFrequencies({ sidebands:
        { family: 'side', name: 'Sidebands', carrier_hz: 100, spacing_hz: fs, count: 5 } })""", SPEED_HZ)
    expected = [(k, 100 + k * SPEED_HZ) for k in range(-5, 6) if 100 + k * SPEED_HZ > 0]
    assert [(m["k"], m["hz"]) for m in side] == [(k, pytest.approx(hz, rel=1e-12)) for k, hz in expected]
    assert [m["k"] for m in side][0] == -4  # 100 - 5 x 24.67 < 0
    # twice line frequency around a rotor bar line: 2 x 50 Hz (Harris' Shock and Vibration
    # Handbook, electrical machines; from memory)
    lf = page.evaluate("""() => SpectrumMarks.markerFrequencies({ sidebands:
        { family: 'side', name: 'Sidebands', carrier_hz: 1000, spacing_hz: 100, count: 2 } })""")
    assert [m["hz"] for m in lf] == pytest.approx([800, 900, 1000, 1100, 1200], rel=1e-12)
    # errors name the input
    for bad in ("{ harmonics: [{ family: 'freq', name: 'Harmonics of the chosen frequency', hz: -1, count: 3 }] }",
                "{ harmonics: [{ family: 'freq', name: 'Harmonics of the chosen frequency', hz: 5, count: 0 }] }",
                "{ sidebands: { family: 'side', name: 'Sidebands', carrier_hz: 100, spacing_hz: NaN, count: 2 } }"):
        msg = page.evaluate(f"() => {{ try {{ SpectrumMarks.markerFrequencies({bad}); return ''; }} catch (e) {{ return e.message; }} }}")
        assert msg.startswith(("Harmonics of the chosen frequency", "Sidebands")) and msg.endswith("."), msg
    # the peak a click means: the highest bin within reach
    peak = page.evaluate("""() => SpectrumMarks.nearestPeak([0, 1, 2, 3, 4, 5], [0, 1, 5, 2, null, 9], 2.4, 1.5)""")
    assert peak == 2
    assert page.evaluate("() => SpectrumMarks.nearestPeak([0, 1, 2], [1, 2, 3], 10, 1)") is None
    assert page.errors == []


def test_harmonics_of_1x_at_the_speed_of_the_spectrum(server, page):  # noqa: F811
    _open(page, server, "looseness")
    # the spectrum's reading ran at the case's shaft speed
    assert float(page.get_attribute("#chart-spectrum", "data-speed-hz")) == pytest.approx(SPEED_HZ, abs=0.01)
    speed = float(page.get_attribute("#chart-spectrum", "data-speed-hz"))
    before = _ink(page, GREEN)
    page.fill("#marks-run-count", "8")
    page.check("#marks-run")
    assert [m["hz"] for m in _marks(page)] == pytest.approx([k * speed for k in range(1, 9)], rel=1e-12)
    assert _ink(page, GREEN) > before + 8 * 100  # eight lines over the plot's height
    label = page.get_attribute("#chart-spectrum", "aria-label")
    assert "Harmonics of 1x" in label and f"8x {8 * speed:.2f} Hz" in label
    page.locator("#chart-spectrum + details.chart-data summary").click()
    # the table is built on the details' toggle event, which comes after the click returns
    marks = page.locator("details.chart-data[data-for='chart-spectrum'] .chart-marks li", has_text="Harmonics of 1x")
    marks.first.wait_for(timeout=10_000)
    page.locator("#chart-spectrum + details.chart-data summary").click()
    page.locator("#spectrum-panel").screenshot(path=str(ARTIFACTS / "spectrum-harmonics-of-1x.png"))
    page.uncheck("#marks-run")
    assert _marks(page) == [] and "Harmonics of 1x" not in page.get_attribute("#chart-spectrum", "aria-label")
    assert page.errors == []


def test_a_click_on_a_peak_chooses_it(server, page):  # noqa: F811
    _open(page, server, "outer_race")
    sp = page.evaluate("() => WW.api(document.getElementById('machine-root').dataset.api)")
    spectrum = next(s for s in sp["latest_spectra"] if s["point"] == page.input_value("#spectrum-point"))
    df = spectrum["freq_hz"][1] - spectrum["freq_hz"][0]
    # BPFO = n/2 fr (1 - d/D cos(phi)) (Randall and Antoni 2011, section 2): the outer-race line
    bpfo = 9 / 2 * SPEED_HZ * (1 - 7.94 / 39.04)
    page.select_option("#marks-click", "carrier")
    _click_at_hz(page, bpfo + 0.5)
    page.wait_for_function("() => document.getElementById('marks-carrier-hz').value !== ''", timeout=5000)
    carrier = float(page.input_value("#marks-carrier-hz"))
    # a line's highest bin lies within one bin of it (Hann window; Harris 1978)
    assert abs(carrier - bpfo) <= df
    assert page.is_checked("#marks-side")
    # spacing: running speed (1x) by default, 3 each side
    speed = float(page.get_attribute("#chart-spectrum", "data-speed-hz"))
    assert float(page.input_value("#marks-spacing-hz")) == pytest.approx(speed, abs=1e-4)
    got = [(m["k"], m["hz"]) for m in _marks(page)]
    assert got == [(k, pytest.approx(carrier + k * float(page.input_value("#marks-spacing-hz")), rel=1e-12))
                   for k in range(-3, 4) if carrier + k * speed > 0]
    assert _ink(page, RED) > 0
    label = page.get_attribute("#chart-spectrum", "aria-label")
    assert f"Sidebands around {carrier:.2f} Hz" in label and "+1fs" in label and "−1fs" in label
    # a typed spacing: fc ± k·10 Hz
    page.fill("#marks-spacing-hz", "10")
    page.dispatch_event("#marks-spacing-hz", "change")
    assert page.input_value("#marks-spacing") == "typed"
    assert [m["hz"] for m in _marks(page)] == pytest.approx([carrier + k * 10 for k in range(-3, 4)], rel=1e-12)
    # twice line frequency is offered only with a line frequency (none on this machine)
    assert page.locator("#marks-spacing option[value=line]").is_disabled()
    # the other family: a click at 1x chooses the harmonics' frequency
    page.select_option("#marks-click", "freq")
    _click_at_hz(page, SPEED_HZ)
    page.wait_for_function("() => document.getElementById('marks-freq-hz').value !== ''", timeout=5000)
    f = float(page.input_value("#marks-freq-hz"))
    assert abs(f - SPEED_HZ) <= df
    freq = [m["hz"] for m in _marks(page) if m["family"] == "freq"]
    assert freq == pytest.approx([k * f for k in range(1, 6)], rel=1e-12)
    assert _ink(page, PURPLE) > 0
    page.locator("#spectrum-panel").screenshot(path=str(ARTIFACTS / "spectrum-sidebands-and-harmonics.png"))
    # a wrong input is named, and no markers are drawn from it
    page.fill("#marks-carrier-hz", "-5")
    page.dispatch_event("#marks-carrier-hz", "change")
    assert page.is_visible("#marks-error")
    assert "Sidebands: the carrier must be a frequency above 0 Hz" in page.inner_text("#marks-error")
    assert _marks(page) == []
    assert page.errors == []
