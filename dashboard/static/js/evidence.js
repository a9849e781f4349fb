/* Machine page, evidence views: growth features, a spectrum against its baseline, a
   point's waterfall, a stored waveform and its envelope spectrum with the bearing defect
   frequencies, the sweep plots of a passage. Data from the API (dashboard/evidence_api.py);
   the machine itself from machine.js (event "ww:machine"). */
"use strict";
(function () {
  const root = document.getElementById("evidence-root");
  if (!root) return;
  const el = WW.el;
  const charts = {};
  let machine = null;

  function width(target) { return Math.max(300, target.clientWidth - 4); }

  // Draw a uPlot chart into #id; the container records what it drew (series labels and
  // marker labels) for people's tools and the browser tests.
  function draw(id, opts, data, markers) {
    const target = document.getElementById(id);
    if (charts[id]) charts[id].destroy();
    target.replaceChildren();
    opts.width = opts.width || width(target);
    charts[id] = new uPlot(opts, data, target);
    target.dataset.series = opts.series.slice(1).map(s => s.label).join("|");
    target.dataset.markers = (markers || []).map(m => m.label).join("|");
    target.dataset.points = data[0].length;
    target.dataset.drawn = "1";
  }

  function empty(id, text) {
    const t = document.getElementById(id);
    if (charts[id]) { charts[id].destroy(); delete charts[id]; }
    t.replaceChildren(el("p", { class: "empty" }, text));
    t.dataset.drawn = "0";
    t.dataset.series = ""; t.dataset.markers = "";
  }

  // Vertical lines at x values (axis "x"), or horizontal ones at y values (axis "y"), labelled.
  function lines(markers, axis, colour) {
    return u => {
      const ctx = u.ctx; const { left, top, width: w, height: h } = u.bbox;
      ctx.save(); ctx.setLineDash([5, 4]); ctx.lineWidth = 1;
      ctx.font = (11 * devicePixelRatio) + "px system-ui";
      markers.forEach((m, i) => {
        const c = m.colour || colour;
        ctx.strokeStyle = c; ctx.fillStyle = c;
        const p = u.valToPos(m.value, axis, true);
        if (axis === "x") {
          if (p < left || p > left + w) return;
          ctx.beginPath(); ctx.moveTo(p, top); ctx.lineTo(p, top + h); ctx.stroke();
          ctx.fillText(m.label, p + 3, top + (14 + 12 * (i % 3)) * devicePixelRatio);
        } else {
          if (p < top || p > top + h) return;
          ctx.beginPath(); ctx.moveTo(left, p); ctx.lineTo(left + w, p); ctx.stroke();
          ctx.fillText(m.label, left + 6, p - 4);
        }
      });
      ctx.restore();
    };
  }

  function pointOptions(select, filter) {
    const cur = select.value;
    select.replaceChildren(...machine.points.filter(filter || (() => true)).map(p => el("option", { value: p.id }, p.id + " (" + p.direction + ")")));
    if (cur) select.value = cur;
  }

  // ------------------------------------------------------------------ growth features
  const FEATURE_NAMES = { overall: "overall velocity", "1x_norm": "1x ÷ speed²", flat_line: "flat line" };
  function featureName(n) {
    if (FEATURE_NAMES[n]) return FEATURE_NAMES[n];
    if (n && n.startsWith("bearing_")) return n.slice(8).toUpperCase() + " (envelope)";
    return (n || "").replace(/_/g, " ");
  }
  function renderFeatures() {
    const tb = document.querySelector("#features-table tbody");
    const rows = [];
    for (const p of machine.points) for (const f of p.features || []) rows.push([p, f]);
    if (!rows.length) { tb.replaceChildren(el("tr", {}, el("td", { colspan: 8, class: "empty" }, "No growth features yet."))); return; }
    const unit = f => (f.unit ? " " + f.unit : "");
    tb.replaceChildren(...rows.map(([p, f]) => el("tr", { "data-feature": f.name, "data-point": p.id },
      el("td", {}, p.id), el("td", {}, featureName(f.name)),
      el("td", { class: "num" }, f.value === null ? "–" : WW.num(f.value, 3) + unit(f)),
      el("td", { class: "num" }, f.baseline_median === null ? "–" : WW.num(f.baseline_median, 3) + unit(f)),
      el("td", { class: "num" }, f.ratio === null ? "–" : WW.num(f.ratio, 2) + "×"),
      el("td", { class: "num" }, f.trend_per_day === null ? "–" : (f.trend_per_day >= 0 ? "+" : "") + WW.num(f.trend_per_day, 4) + unit(f)),
      el("td", { class: "num" }, f.time_to_limit_days === null ? "–" : WW.num(f.time_to_limit_days, 1) + " days" + (f.limit_name ? " to " + f.limit_name : "")),
      el("td", {}, f.baseline_status || "–"))));
  }

  // ------------------------------------------------------------------ against baseline
  async function drawCompare() {
    const point = document.getElementById("compare-point").value;
    const kind = document.getElementById("compare-kind").value;
    if (!point) return;
    let c;
    try { c = await WW.api(root.dataset.compare + "?point=" + encodeURIComponent(point) + "&kind=" + kind); }
    catch (e) { empty("chart-compare", "No stored spectrum for this point yet."); return; }
    const now = c.now, base = c.baseline;
    // One frequency axis: the baseline read at the newest spectrum's bins (same grid when
    // the sensor set-up did not change).
    const baseAt = base ? now.freq_hz.map(f => { const i = Math.round((f - base.freq_hz[0]) / base.df_hz); return i >= 0 && i < base.amplitude.length ? base.amplitude[i] : null; }) : null;
    const series = [{ label: "Hz", value: (u, v) => WW.num(v, 2) },
      { label: "now " + WW.when(now.ts), stroke: "#1b6ca8", width: 1.2, value: (u, v) => WW.num(v, 4) + " " + now.unit }];
    const data = [now.freq_hz, now.amplitude];
    if (baseAt) { series.push({ label: "baseline " + WW.when(base.ts), stroke: "#8d5a97", width: 1.2, dash: [3, 3], value: (u, v) => WW.num(v, 4) + " " + now.unit }); data.push(baseAt); }
    draw("chart-compare", { height: 280, scales: { x: { time: false } }, cursor: { drag: { x: true, y: false } },
      series: series, axes: [{ label: "Frequency, Hz" }, { label: now.unit + " " + now.scaling, size: 70 }] }, data);
    document.getElementById("compare-caption").textContent = base
      ? "Newest (" + WW.when(now.ts) + ") over the baseline spectrum (" + WW.when(base.ts) + (c.baseline_since ? ", first after the baseline restart of " + WW.when(c.baseline_since) : ", the point's first stored") + ")."
      : "No baseline spectrum stored for this point.";
  }

  // ------------------------------------------------------------------ waterfall
  async function drawWaterfall() {
    const point = document.getElementById("waterfall-point").value;
    if (!point) return;
    const span = Number(document.getElementById("waterfall-range").value);
    const rows = document.getElementById("waterfall-rows").value;
    const order = document.getElementById("waterfall-order").value;
    const to = machine.last_reading_at ? new Date(machine.last_reading_at).getTime() / 1000 + 1 : Date.now() / 1000;
    const wf = await WW.api(root.dataset.waterfall + "?point=" + encodeURIComponent(point) + "&kind=velocity&from=" + (to - span) + "&to=" + to + "&max_rows=" + rows + "&max_bins=2048&order=" + order);
    if (!wf.rows.length) { empty("chart-waterfall", "No stored spectra of this point in this time range."); return; }
    const top = Math.max(...wf.rows.map(r => Math.max(...r.amplitude.filter(v => v !== null))), 1e-9);
    const step = top * 0.35;  // each row raised above the one before it
    const series = [{ label: "Hz", value: (u, v) => WW.num(v, 2) }];
    const data = [wf.freq_hz];
    wf.rows.forEach((r, i) => {
      const colour = WW.palette[i % WW.palette.length];
      series.push({ label: WW.when(r.ts) + (r.speed_hz ? " · " + WW.num(r.speed_hz * 60, 0) + " r/min" : ""), stroke: colour, width: 1,
        value: (u, v) => (v === null ? "–" : WW.num(v - i * step, 4) + " " + wf.unit) });
      data.push(r.amplitude.map(v => (v === null ? null : v + i * step)));
    });
    draw("chart-waterfall", { height: 360, scales: { x: { time: false } }, legend: { show: wf.rows.length <= 12 },
      cursor: { drag: { x: true, y: false } },
      series: series, axes: [{ label: "Frequency, Hz" }, { label: wf.unit + " " + wf.scaling + ", each row raised " + WW.num(step, 3), size: 70 }] }, data);
    const ends = order === "speed" ? r => (r.speed_hz ? WW.num(r.speed_hz * 60, 0) + " r/min" : "no speed") : r => WW.when(r.ts);
    document.getElementById("waterfall-caption").textContent = wf.rows.length + " of " + wf.stored + " stored spectra, " + ends(wf.rows[0]) + " (bottom) to " + ends(wf.rows[wf.rows.length - 1]) + " (top)" + (wf.left_out ? "; " + wf.left_out + " on another frequency grid left out" : "") + ".";
  }

  // ------------------------------------------------------------------ waveform + envelope
  let envelopeOk = false;
  async function listWaveforms() {
    const point = document.getElementById("waveform-point").value;
    const pick = document.getElementById("waveform-pick");
    if (!point) return;
    const to = Date.now() / 1000 + 60;
    const data = await WW.api(root.dataset.waveforms + "?point=" + encodeURIComponent(point) + "&from=" + (to - 366 * 86400) + "&to=" + to + "&limit=200");
    pick.replaceChildren(...data.items.map(w => el("option", { value: w.id }, WW.when(w.ts) + (w.evidence ? " · alarm evidence" : ""))));
    if (!pick.value && data.items.length) pick.value = String(data.items[0].id);
    if (!data.items.length) { empty("chart-waveform", "No stored waveform for this point yet."); empty("chart-envelope", ""); document.getElementById("envelope-caption").textContent = ""; return; }
    envelopeOk = data.bearing_geometry && (machine.points.find(p => p.id === point) || {}).quantity === "acceleration";
    await drawWaveform(data.items[0].id);
  }

  async function drawWaveform(id) {
    const w = await WW.api(root.dataset.waveformBase + id);
    const t = w.samples.map((_, k) => 1000 * k / w.fs_hz);
    draw("chart-waveform", { height: 240, scales: { x: { time: false } }, cursor: { drag: { x: true, y: false } },
      series: [{ label: "ms", value: (u, v) => WW.num(v, 2) + " ms" }, { label: w.point + " " + WW.when(w.ts), stroke: "#3d405b", width: 1, value: (u, v) => WW.num(v, 4) + " " + w.unit }],
      axes: [{ label: "Time from the first sample, ms" }, { label: w.unit, size: 70 }] }, [t, w.samples]);
    await drawEnvelope(w);
  }

  const DEFECT_COLOURS = { bpfo: "#d1495b", bpfi: "#1b6ca8", bsf: "#2a9d8f", ftf: "#8d5a97" };
  async function drawEnvelope(w) {
    const caption = document.getElementById("envelope-caption");
    if (!envelopeOk) { empty("chart-envelope", "No envelope spectrum: it needs an accelerometer and the machine's bearing geometry."); caption.textContent = ""; return; }
    let env;
    try { env = await WW.api(root.dataset.waveformBase + w.id + "/envelope"); }
    catch (e) { empty("chart-envelope", "No envelope spectrum: " + e.message); caption.textContent = ""; return; }
    const markers = env.markers.map(m => ({ label: m.label, value: m.hz, colour: DEFECT_COLOURS[m.defect] }));
    draw("chart-envelope", { height: 280, scales: { x: { time: false } }, cursor: { drag: { x: true, y: false } },
      series: [{ label: "Hz", value: (u, v) => WW.num(v, 2) }, { label: "envelope", stroke: "#3d405b", width: 1, value: (u, v) => WW.num(v, 4) + " " + env.unit }],
      axes: [{ label: "Frequency, Hz" }, { label: env.unit + " peak (envelope)", size: 70 }],
      hooks: { draw: [lines(markers, "x", "#1b6ca8")] } }, [env.freq_hz, env.amplitude], markers);
    const ind = Object.entries(env.indicator_db).map(([k, v]) => k.toUpperCase() + " " + (v === null ? "–" : WW.num(v, 1) + " dB")).join(", ");
    caption.textContent = "Envelope of " + WW.num(env.band_hz[0], 0) + "–" + WW.num(env.band_hz[1], 0) + " Hz at " + WW.num(env.shaft_hz * 60, 0) + " r/min. Defect lines over the spectrum's median: " + ind + ".";
  }

  // The stored waveform of a point's reading at an instant (an alarm transition's), drawn
  // with its envelope spectrum; false when none was kept then.
  async function openWaveformAt(point, ts) {
    const q = "?point=" + encodeURIComponent(point) + "&from=" + encodeURIComponent(ts) + "&to=" + encodeURIComponent(ts) + "&limit=1";
    const data = await WW.api(root.dataset.waveforms + q);
    const panel = document.getElementById("waveform-panel");
    if (!data.items.length) { panel.dataset.opened = "none"; return false; }
    document.getElementById("waveform-point").value = point;
    await listWaveforms();
    const pick = document.getElementById("waveform-pick");
    pick.value = String(data.items[0].id);
    await drawWaveform(data.items[0].id);
    panel.dataset.opened = String(data.items[0].id);
    panel.scrollIntoView({ behavior: "smooth" });
    return true;
  }
  window.WWEvidence = { openWaveformAt };

  // ------------------------------------------------------------------ sweep plots
  let passages = [];
  async function listPassages() {
    const data = await WW.api(root.dataset.passages + "?limit=50");
    passages = data.items;
    const pick = document.getElementById("sweep-pick");
    pick.replaceChildren(...passages.map(p => el("option", { value: p.id }, p.kind + " " + p.point + " " + WW.when(p.started_at) + " · " + WW.num(p.natural_frequency_hz, 2) + " Hz")));
    if (!passages.length) { for (const id of ["chart-bode-amplitude", "chart-bode-phase", "chart-polar"]) empty(id, "No passage yet."); return; }
    await drawSweep(passages[0].id);
  }

  async function drawSweep(id) {
    const sw = await WW.api(root.dataset.passages + "/" + id + "/sweep");
    // Ascending speed for the Bode plots (a coast-down is stored in time order).
    const order = sw.speed_hz.map((_, i) => i).sort((a, b) => sw.speed_hz[a] - sw.speed_hz[b]);
    const x = order.map(i => sw.speed_hz[i]);
    // On a speed axis the mode sits at its critical speed (natural frequency / order).
    const fn = [{ label: "critical speed " + WW.num(sw.critical_speed_hz, 2) + " Hz", value: sw.critical_speed_hz }];
    draw("chart-bode-amplitude", { height: 240, scales: { x: { time: false } },
      series: [{ label: "speed", value: (u, v) => WW.num(v, 3) + " Hz" }, { label: "1x amplitude", stroke: "#1b6ca8", width: 2, value: (u, v) => WW.num(v, 4) + " " + sw.unit }],
      axes: [{ label: "Running speed, Hz" }, { label: "1x, " + sw.unit + " peak", size: 70 }],
      hooks: { draw: [lines(fn, "x", "#b5651d")] } }, [x, order.map(i => sw.amplitude[i])], fn);
    if (sw.phase_deg) {
      const marks = [{ label: "90°", value: 90 }];
      draw("chart-bode-phase", { height: 220, scales: { x: { time: false } },
        series: [{ label: "speed", value: (u, v) => WW.num(v, 3) + " Hz" }, { label: "phase change from the slowest point", stroke: "#d1495b", width: 2, value: (u, v) => WW.num(v, 1) + "°" }],
        axes: [{ label: "Running speed, Hz" }, { label: "phase lag change, °", size: 70 }],
        hooks: { draw: [lines(marks, "y", "#5c6b73"), lines(fn, "x", "#b5651d")] } }, [x, order.map(i => sw.phase_from_slowest_deg[i])], marks.concat(fn));
      const r = Math.max(...sw.amplitude) * 1.1 || 1;
      const box = document.getElementById("chart-polar");
      const side = Math.min(440, width(box));
      draw("chart-polar", { width: side, height: side, scales: { x: { time: false, auto: false, range: [-r, r] }, y: { auto: false, range: [-r, r] } },
        cursor: { show: false }, legend: { show: true },
        series: [{ label: "x" }, { label: "1x (amplitude, -phase)", stroke: "#2a9d8f", width: 2, points: { show: false } }],
        axes: [{ label: sw.unit + " peak" }, { size: 60 }] }, [sw.polar_x, sw.polar_y]);
    } else {
      empty("chart-bode-phase", "No phase: the sweep's waveforms carried no once-per-revolution pulses.");
      empty("chart-polar", "No polar plot without phase.");
    }
    document.getElementById("sweep-caption").textContent = sw.kind + " at " + sw.point + ": natural frequency " + WW.num(sw.natural_frequency_hz, 2) + " Hz, amplification factor " + WW.num(sw.amplification_factor, 1) + " (damping ratio " + WW.num(sw.damping_ratio, 4) + ")" + (sw.phase_90_hz ? "; the phase change reaches 90° at " + WW.num(sw.phase_90_hz, 2) + " Hz" : "") + ".";
  }

  // ------------------------------------------------------------------ wiring
  document.addEventListener("ww:machine", async ev => {
    const first = machine === null;
    machine = ev.detail;
    renderFeatures();
    if (!first) return;
    pointOptions(document.getElementById("compare-point"));
    pointOptions(document.getElementById("waterfall-point"));
    pointOptions(document.getElementById("waveform-point"));
    try {
      await Promise.all([drawCompare(), drawWaterfall(), listWaveforms(), listPassages()]);
      // An alarm's evidence page links here for the waveform of a step's reading.
      const asked = new URLSearchParams(location.search);
      if (asked.get("waveform_point") && asked.get("waveform_at")) await openWaveformAt(asked.get("waveform_point"), asked.get("waveform_at"));
    } finally {
      root.dataset.loaded = "1";
    }
  });
  document.getElementById("compare-point").addEventListener("change", drawCompare);
  document.getElementById("compare-kind").addEventListener("change", drawCompare);
  for (const id of ["waterfall-point", "waterfall-range", "waterfall-rows", "waterfall-order"]) document.getElementById(id).addEventListener("change", drawWaterfall);
  document.getElementById("waveform-point").addEventListener("change", listWaveforms);
  document.getElementById("waveform-pick").addEventListener("change", e => drawWaveform(e.target.value));
  document.getElementById("sweep-pick").addEventListener("change", e => drawSweep(e.target.value));
})();
