/* Spectrum markers on demand, as pure functions of numbers (no page, no chart): the
   frequencies of a harmonic series (k·f, the lines a periodic force puts in a spectrum)
   and of sidebands (fc ± k·fs, the lines a modulation at fs puts around a carrier fc),
   and the peak a click on the chart means. The machine page (machine.js) draws what
   these return and lists it in the chart's text alternative; the browser tests check
   them against the closed forms. */
"use strict";
const SpectrumMarks = (function () {
  // Most markers of one family: more would be unreadable lines.
  const MAX_COUNT = 50;

  function positiveHz(what, hz) {
    if (typeof hz !== "number" || !Number.isFinite(hz) || hz <= 0) {
      throw new Error(what + " must be a frequency above 0 Hz, got " + JSON.stringify(hz) + ".");
    }
    return hz;
  }

  function count(what, n) {
    if (!Number.isInteger(n) || n < 1 || n > MAX_COUNT) {
      throw new Error(what + " must be a whole number from 1 to " + MAX_COUNT + ", got " + JSON.stringify(n) + ".");
    }
    return n;
  }

  // "+1fs" / "−2fs": a sideband's label relative to its carrier.
  function sideLabel(k) { return (k < 0 ? "−" : "+") + Math.abs(k) + "fs"; }

  /**
   * The markers of the families asked for, in Hz, each at most ``topHz`` (the spectrum's
   * last bin; Infinity for no limit), in the order the families are given.
   *
   * choice.harmonics: a list of { family, name, hz, count, order }: the series k·hz for
   *   k = 1..count; ``order`` true labels them "kx" (harmonics of 1x), else "f", "2f"...
   * choice.sidebands: null or { family, name, carrier_hz, spacing_hz, count }: the carrier
   *   (k = 0, "fc") and fc + k·spacing for k = ±1..±count, lower ones only above 0 Hz.
   *
   * Returns [{ family, name, k, hz, label }]; throws an Error naming the input when a
   * frequency is not above 0 Hz or a count is not a whole number from 1 to MAX_COUNT.
   */
  function markerFrequencies(choice, topHz) {
    const top = topHz === undefined ? Infinity : topHz;
    const out = [];
    for (const h of choice.harmonics || []) {
      const f = positiveHz(h.name, h.hz);
      const n = count(h.name + ", how many", h.count);
      for (let k = 1; k <= n; k++) {
        const hz = k * f;
        if (hz > top) break;
        out.push({ family: h.family, name: h.name, k: k, hz: hz, label: h.order ? k + "x" : (k === 1 ? "f" : k + "f") });
      }
    }
    const sb = choice.sidebands;
    if (sb) {
      const fc = positiveHz(sb.name + ": the carrier", sb.carrier_hz);
      const fs = positiveHz(sb.name + ": the spacing", sb.spacing_hz);
      const n = count(sb.name + ", how many each side", sb.count);
      for (let k = -n; k <= n; k++) {
        const hz = fc + k * fs;
        if (hz <= 0 || hz > top) continue;
        out.push({ family: sb.family, name: sb.name, k: k, hz: hz, label: k === 0 ? "fc" : sideLabel(k) });
      }
    }
    return out;
  }

  /**
   * The frequency (Hz) of the highest bin within ``halfWidthHz`` of ``hz``: the peak a
   * click at ``hz`` on the chart points at. ``freq``, ``amp``: the spectrum's bins (Hz,
   * its unit; null amplitudes skipped). Returns null when no bin lies within reach.
   */
  function nearestPeak(freq, amp, hz, halfWidthHz) {
    let best = -1;
    for (let i = 0; i < freq.length; i++) {
      if (Math.abs(freq[i] - hz) > halfWidthHz || amp[i] === null || amp[i] === undefined) continue;
      if (best < 0 || amp[i] > amp[best]) best = i;
    }
    return best < 0 ? null : freq[best];
  }

  return { MAX_COUNT, markerFrequencies, nearestPeak };
})();
