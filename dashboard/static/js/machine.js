/* Machine page: resonance map, spectrum, trends, margins, modes and alarm history, all from the API. */
"use strict";
(function () {
  const root = document.getElementById("machine-root");
  const canEdit = root.dataset.canEdit === "1";
  const el = WW.el;
  let machine = null;
  let trendData = null;
  const charts = {};

  function width(target) { return Math.max(320, target.clientWidth - 4); }

  // Draw a chart into element ``id`` and give it its text alternative (chart_text.js);
  // marks: what it draws besides its series, as short text.
  function put(id, opts, data, marks) {
    const target = document.getElementById(id);
    if (charts[id]) charts[id].destroy();
    target.replaceChildren();
    opts.width = width(target);
    if (opts.scales && opts.scales.x && opts.scales.x.time) WW.timeChart(opts);
    charts[id] = new uPlot(opts, data, target);
    target.dataset.series = opts.series.slice(1).map(s => s.label).join("|");
    target.dataset.xLast = data[0].length ? data[0][data[0].length - 1] : "";
    target.dataset.drawn = "1";
    ChartText.attach(target, charts[id], marks);
    return charts[id];
  }

  // Mode bands on the given axis: each mode's band from low_hz to high_hz as the margin
  // table judges it (the API's mode_bands, monitor/detection/margins.py), so an excitation
  // the table calls clear is outside its band. The edges drawn are kept on the chart
  // element (data-bands) for the tests.
  function modeBands(axis) {
    return u => {
      const ctx = u.ctx;
      const { left, top, width: w, height: h } = u.bbox;
      ctx.save();
      ctx.beginPath(); ctx.rect(left, top, w, h); ctx.clip();
      const drawn = [];
      for (const band of machine.mode_bands || []) {
        const a = u.valToPos(band.low_hz, axis, true), b = u.valToPos(band.high_hz, axis, true), c = u.valToPos(band.mode_hz, axis, true);
        drawn.push({ mode: band.mode, low_hz: band.low_hz, high_hz: band.high_hz });
        ctx.fillStyle = "rgba(181, 101, 29, 0.14)";
        ctx.strokeStyle = "rgba(181, 101, 29, 0.9)";
        ctx.setLineDash([]);
        ctx.lineWidth = 1.5;
        ctx.beginPath();
        if (axis === "y") { ctx.fillRect(left, Math.min(a, b), w, Math.abs(a - b)); ctx.moveTo(left, c); ctx.lineTo(left + w, c); }
        else { ctx.fillRect(Math.min(a, b), top, Math.abs(a - b), h); ctx.moveTo(c, top); ctx.lineTo(c, top + h); }
        ctx.stroke();
        ctx.fillStyle = "#7a4310";
        ctx.font = (11 * devicePixelRatio) + "px system-ui";
        if (axis === "y") ctx.fillText(band.mode + " " + WW.num(band.mode_hz, 1) + " Hz", left + 6, c - 4);
        else ctx.fillText(band.mode, c + 4, top + 14 * devicePixelRatio);
      }
      ctx.restore();
      u.root.parentElement.dataset.bands = JSON.stringify(drawn);
    };
  }

  // The mode bands as text, for the charts' text alternatives.
  function modeMarks() {
    if (!machine.modes.length) return [];
    return ["shaded, each mode with its required separation margins (the separation margins table): " +
      machine.modes.map(mo => mo.name + " " + WW.num(mo.frequency_hz, 2) + " Hz").join(", ")];
  }

  function orderList() {
    return (machine.excitation_orders || []).map(Number).sort((a, b) => a - b);
  }

  // Headroom above what a chart's axis must show (a fraction of its top).
  const HEADROOM = 0.1;
  // Orders up to this one are "low orders" the resonance map's axis always spans.
  const LOW_ORDER_MAX = 2;
  // The spectrum opens up to this many times running speed (or the modes, if higher).
  const SPECTRUM_ORDERS = 10;

  function highestBandHz() {
    return Math.max(0, ...(machine.mode_bands || []).map(b => Math.max(b.high_hz, b.mode_hz)));
  }

  // The resonance map's top, Hz: a bit above the highest mode band or the highest low-order
  // line (1x, 2x) over the window, whichever is larger; higher orders run off the top
  // (they are in the legend and the margins table), so the modes and 1x are not squeezed.
  function resonanceTop(speeds, orders) {
    const low = orders.filter(o => o <= LOW_ORDER_MAX);
    const order = low.length ? Math.max(...low) : Math.min(...orders);
    const fastest = Math.max(0, ...speeds.filter(v => v !== null));
    return Math.max(highestBandHz(), Number.isFinite(order) ? order * fastest : 0, 1) * (1 + HEADROOM);
  }

  // The spectrum's opening span, Hz: what matters, the modes' bands, ten times running
  // speed and twice the line frequency, with headroom, never beyond the spectrum itself.
  function spectrumSpan(speed, lastHz) {
    const wanted = Math.max(highestBandHz(), (speed || 0) * SPECTRUM_ORDERS, 2 * (machine.line_frequency_hz || 0));
    return wanted > 0 ? Math.min(lastHz, wanted * (1 + HEADROOM)) : lastHz;
  }

  function drawResonance() {
    // The machine's running speed: its speed readings and its readings sensor health accepted.
    const sp = trendData.speed;
    if (!sp || !sp.ts.length) { noData("chart-resonance"); return; }
    const orders = orderList();
    const data = [sp.ts].concat(orders.map(o => sp.speed_hz.map(s => (s === null ? null : s * o))));
    const top = resonanceTop(sp.speed_hz, orders);
    put("chart-resonance", {
      height: 320,
      scales: { x: { time: true }, y: { range: [0, top] } },
      series: [{}].concat(orders.map((o, i) => ({ label: o + "x", stroke: WW.palette[i % WW.palette.length], width: 2, value: (u, v) => WW.num(v, 2) + " Hz" }))),
      axes: [{}, { label: "Frequency, Hz", size: 60 }],
      hooks: { drawClear: [modeBands("y")] },
    }, data, modeMarks());
    document.getElementById("chart-resonance").dataset.yMax = top;
  }

  function noData(id, text) {
    const t = document.getElementById(id);
    if (charts[id]) { charts[id].destroy(); delete charts[id]; }
    t.replaceChildren(el("p", { class: "empty" }, text || "No readings in this time range."));
    t.dataset.drawn = "0";
    ChartText.clear(t);
  }

  // Marker families on demand (SpectrumMarks, spectrum_marks.js): colour, dash and the
  // height of their labels, so overlapping families stay apart.
  const MARK_STYLE = {
    run: { colour: "#2a7d4f", dash: [], row: 3, text: "solid green" },
    freq: { colour: "#7b3a96", dash: [], row: 4, text: "solid purple" },
    side: { colour: "#b3261e", dash: [2, 3], row: 5, text: "dotted red" },
  };
  // A click this close to a peak (CSS px) picks it.
  const PICK_PX = 8;
  let shown = null;  // the spectrum on the chart: { sp, speed, u, fixed, marks }

  function fieldNumber(id) {
    const v = document.getElementById(id).value.trim();
    return v === "" ? NaN : Number(v);
  }

  // The spacing preset's frequency, Hz (null: typed, or nothing to take it from).
  function presetSpacing(speed) {
    const kind = document.getElementById("marks-spacing").value;
    if (kind === "run") return speed || null;
    if (kind === "line") return machine.line_frequency_hz ? 2 * machine.line_frequency_hz : null;
    return null;
  }

  // What the marker controls ask for, as SpectrumMarks.markerFrequencies takes it.
  function markChoice(speed) {
    const on = id => document.getElementById(id).checked;
    const harmonics = [];
    if (on("marks-run")) {
      if (!speed) throw new Error("Harmonics of 1x need the running speed of this spectrum, and it has none.");
      harmonics.push({ family: "run", name: "Harmonics of 1x", hz: speed, count: fieldNumber("marks-run-count"), order: true });
    }
    if (on("marks-freq")) harmonics.push({ family: "freq", name: "Harmonics of the chosen frequency", hz: fieldNumber("marks-freq-hz"), count: fieldNumber("marks-freq-count"), order: false });
    const sidebands = on("marks-side") ? { family: "side", name: "Sidebands", carrier_hz: fieldNumber("marks-carrier-hz"),
      spacing_hz: fieldNumber("marks-spacing-hz"), count: fieldNumber("marks-side-count") } : null;
    return { harmonics, sidebands };
  }

  // The markers as text for the chart's text alternative, one line per family.
  function markText(marks) {
    const lines = [];
    for (const family of Object.keys(MARK_STYLE)) {
      const ms = marks.filter(m => m.family === family);
      if (!ms.length) continue;
      let head = ms[0].name;
      if (family === "run") head += " (1x " + WW.num(ms[0].hz, 2) + " Hz)";
      if (family === "freq") head += " (f " + WW.num(ms[0].hz, 2) + " Hz)";
      if (family === "side") {
        const c = ms.find(m => m.k === 0), up = ms.find(m => m.k === 1) || ms.find(m => m.k === -1);
        head += " around " + (c ? WW.num(c.hz, 2) + " Hz" : "the carrier") + (up && c ? " at ± " + WW.num(Math.abs(up.hz - c.hz), 2) + " Hz" : "");
      }
      lines.push(MARK_STYLE[family].text + " lines, " + head + ": " + ms.map(m => m.label + " " + WW.num(m.hz, 2) + " Hz").join(", "));
    }
    return lines;
  }

  // Recompute the on-demand markers from the controls, redraw them and the chart's text.
  function updateMarks() {
    if (!shown) return;
    const err = document.getElementById("marks-error");
    const preset = presetSpacing(shown.speed);
    if (preset !== null) document.getElementById("marks-spacing-hz").value = Number(preset.toFixed(4));
    const lastHz = shown.sp.freq_hz.length ? shown.sp.freq_hz[shown.sp.freq_hz.length - 1] : 0;
    try {
      shown.marks = SpectrumMarks.markerFrequencies(markChoice(shown.speed), lastHz);
      err.hidden = true;
    } catch (e) {
      shown.marks = [];
      err.textContent = e.message;
      err.hidden = false;
    }
    const target = document.getElementById("chart-spectrum");
    target.dataset.marks = JSON.stringify(shown.marks.map(m => ({ family: m.family, k: m.k, hz: m.hz, label: m.label })));
    shown.u.redraw(false, false);
    ChartText.attach(target, shown.u, shown.fixed.concat(markText(shown.marks)));
  }

  // A click waits this long (ms) for a second one: a double-click zooms out, picks nothing.
  const DOUBLE_CLICK_MS = 300;

  // A click on the chart (no drag, no double-click): the highest bin within PICK_PX of it
  // becomes the chosen frequency or the carrier, and its family is switched on.
  function pickPeak(u, sp) {
    let down = null, timer = null;
    u.over.addEventListener("mousedown", e => { down = [e.clientX, e.clientY]; });
    u.over.addEventListener("dblclick", () => { clearTimeout(timer); timer = null; });
    u.over.addEventListener("click", e => {
      if (down && Math.hypot(e.clientX - down[0], e.clientY - down[1]) > 3) return;
      if (timer !== null) return;  // the second click of a double-click
      const left = e.clientX - u.over.getBoundingClientRect().left;
      timer = setTimeout(() => { timer = null; pick(left); }, DOUBLE_CLICK_MS);
    });
    function pick(left) {
      const hz = u.posToVal(left, "x");
      const reach = Math.abs(u.posToVal(left + PICK_PX, "x") - hz);
      const peak = SpectrumMarks.nearestPeak(sp.freq_hz, sp.amplitude, hz, reach);
      if (peak === null) return;
      const into = document.getElementById("marks-click").value;
      document.getElementById(into === "carrier" ? "marks-carrier-hz" : "marks-freq-hz").value = peak;
      document.getElementById(into === "carrier" ? "marks-side" : "marks-freq").checked = true;
      updateMarks();
    }
  }

  function drawSpectrum(sp, caption) {
    if (!sp) { shown = null; noData("chart-spectrum", "No stored spectrum for this point yet."); return; }
    // The speed of this spectrum's own reading; the point's latest speed if it kept none.
    const latestSpeed = (machine.points.find(p => p.id === sp.point) || {}).latest;
    const speed = sp.speed_hz ? sp.speed_hz : (latestSpeed ? latestSpeed.speed_hz : machine.speed_hz);
    const orders = orderList();
    const markers = speed ? orders.map(o => ({ label: o + "x", hz: o * speed })) : [];
    if (machine.line_frequency_hz) markers.push({ label: "2xLF", hz: 2 * machine.line_frequency_hz });
    const drawMarkers = u => {
      const ctx = u.ctx; const { top, height: h } = u.bbox;
      const line = (hz, label, colour, dash, row) => {
        const x = u.valToPos(hz, "x", true);
        if (x < u.bbox.left || x > u.bbox.left + u.bbox.width) return;
        ctx.setLineDash(dash); ctx.strokeStyle = colour; ctx.fillStyle = colour;
        ctx.beginPath(); ctx.moveTo(x, top); ctx.lineTo(x, top + h); ctx.stroke();
        ctx.fillText(label, x + 3, top + 14 * row * devicePixelRatio);
      };
      ctx.save();
      ctx.font = (11 * devicePixelRatio) + "px system-ui"; ctx.lineWidth = 1;
      for (const m of markers) line(m.hz, m.label, "#1b6ca8", [5, 4], 2);
      for (const m of (shown && shown.u === u ? shown.marks : [])) {
        const st = MARK_STYLE[m.family];
        line(m.hz, m.label, st.colour, st.dash, st.row);
      }
      ctx.restore();
    };
    const lastHz = sp.freq_hz.length ? sp.freq_hz[sp.freq_hz.length - 1] : 0;
    const span = spectrumSpan(speed, lastHz);
    const target = document.getElementById("chart-spectrum");
    const fixed = modeMarks().concat(markers.map(m => "dashed line " + m.label + " at " + WW.num(m.hz, 2) + " Hz"));
    const u = put("chart-spectrum", {
      height: 300,
      scales: { x: { time: false } },
      cursor: { drag: { x: true, y: false } },
      series: [{ label: "frequency", value: (u, v) => WW.num(v, 2) + " Hz" }, { label: sp.point + " " + sp.kind, stroke: "#3d405b", width: 1, value: (u, v) => WW.num(v, 4) + " " + sp.unit }],
      axes: [{ label: "Frequency, Hz" }, { label: sp.unit + " " + sp.scaling, size: 70 }],
      hooks: { drawClear: [modeBands("x")], draw: [drawMarkers],
        setScale: [(c, key) => { if (key === "x") target.dataset.xMax = c.scales.x.max; }] },
    }, [sp.freq_hz, sp.amplitude], fixed);
    shown = { sp, speed, u, fixed, marks: [] };
    target.dataset.speedHz = speed || "";
    pickPeak(u, sp);
    updateMarks();
    // Opens on the span of interest; the full span is one click (or a double-click) away.
    target.dataset.spanHz = span;
    target.dataset.fullHz = lastHz;
    if (span < lastHz) u.setScale("x", { min: 0, max: span });
    const toggle = document.getElementById("spectrum-span");
    toggle.hidden = !(span < lastHz);
    toggle.textContent = "Full span (0–" + WW.num(lastHz, 0) + " Hz)";
    toggle.onclick = () => {
      const full = u.scales.x.max < lastHz;
      u.setScale("x", { min: 0, max: full ? lastHz : span });
      toggle.textContent = full ? "Span of interest (0–" + WW.num(span, 0) + " Hz)" : "Full span (0–" + WW.num(lastHz, 0) + " Hz)";
    };
    document.getElementById("spectrum-caption").textContent = caption || ("latest, " + WW.when(sp.ts));
  }

  function drawTrends() {
    const pid = document.getElementById("trend-point").value;
    const p = trendData.points.find(x => x.point === pid);
    if (!p || !p.ts.length) { noData("chart-overall"); noData("chart-orders"); return; }
    const lim = p.zone_limits_mm_s || [];
    const base = p.baseline || {};
    const flat = v => p.ts.map(() => v);
    // Readings sensor health flagged are no machine levels: left out of the lines, the
    // overall level drawn apart as hollow markers.
    const flagged = (p.flags || []).map(f => f.length > 0);
    const accepted = vals => vals.map((v, i) => (flagged[i] ? null : v));
    const overall = accepted(p.overall_mm_s_rms);
    const top = Math.max(lim[2] ? lim[2] * 1.15 : 0, ...overall.filter(v => v !== null).map(v => v * 1.1)) || 1;
    const series = [{}, { label: "overall", stroke: "#1d2433", width: 2, value: (u, v) => WW.num(v, 2) + " mm/s RMS" }];
    const data = [p.ts, overall];
    if (flagged.some(Boolean)) {
      // The scale follows accepted readings; a flagged level above it sits on the top edge,
      // its own value in the legend.
      const raw = p.overall_mm_s_rms.map((v, i) => (flagged[i] ? v : null));
      series.push({ label: "flagged by sensor health", stroke: "#8a8f98", width: 0, paths: () => null,
        points: { show: true, size: 8, width: 1.5, fill: "#ffffff" },
        value: (u, v, si, i) => (i === null || raw[i] === null ? "–" : WW.num(raw[i], 2) + " mm/s RMS (" + p.flags[i].join(", ") + ")") });
      data.push(raw.map(v => (v === null ? null : Math.min(v, top * 0.98))));
    }
    // Darker than the zone tags' fills: lines on white need 3:1 (WCAG 2.1 SC 1.4.11).
    const zoneColours = ["#5f8a1f", "#a87a00", "#b3261e"];
    ["A/B", "B/C", "C/D"].forEach((name, i) => {
      if (lim[i] === undefined) return;
      series.push({ label: name, stroke: zoneColours[i], dash: [6, 4], width: 1.5, points: { show: false }, value: (u, v) => WW.num(v, 2) + " mm/s RMS" });
      data.push(flat(lim[i]));
    });
    if (base.overall) {
      // The learned baseline as the detector held it at each reading (gaps while learning).
      series.push({ label: "baseline", stroke: "#8d5a97", dash: [2, 3], width: 2, points: { show: false }, value: (u, v) => WW.num(v, 2) + " mm/s RMS" });
      data.push(base.overall);
    }
    put("chart-overall", { height: 260, scales: { x: { time: true }, y: { range: [0, top] } },
      series: series, axes: [{}, { label: "overall velocity, mm/s RMS", size: 60 }] }, data);
    const labels = Object.keys(p.orders);
    if (!labels.length) { noData("chart-orders", "No order amplitudes stored."); return; }
    const oSeries = [{}], oData = [p.ts];
    labels.forEach((l, i) => {
      const colour = WW.palette[i % WW.palette.length];
      oSeries.push({ label: l, stroke: colour, width: 1.8, value: (u, v) => WW.num(v, 3) + " mm/s peak" });
      oData.push(accepted(p.orders[l]));
      if (base[l]) {
        oSeries.push({ label: l + " baseline", stroke: colour, dash: [2, 3], width: 1.5, points: { show: false }, value: (u, v) => WW.num(v, 3) + " mm/s peak" });
        oData.push(base[l]);
      }
    });
    put("chart-orders", { height: 240, scales: { x: { time: true } },
      series: oSeries, axes: [{}, { label: "order amplitude, mm/s peak", size: 60 }] }, oData);
  }

  function renderFacts() {
    document.getElementById("fact-state").replaceChildren(WW.stateTag(machine.state));
    const speed = document.getElementById("fact-speed");
    speed.textContent = machine.speed_hz === null ? "–" : WW.num(machine.speed_rpm, 0) + " r/min (" + WW.num(machine.speed_hz, 2) + " Hz)";
    speed.title = machine.speed_at ? (machine.speed_source === "speed_topic" ? "speed topic, " : "reading, ") + WW.when(machine.speed_at) : "";
    speed.dataset.source = machine.speed_source || "";
    const run = machine.running || {};
    const running = document.getElementById("fact-running");
    running.textContent = run.state || "–";
    running.title = run.reason || "";
    running.dataset.state = run.state || "";
    document.getElementById("fact-last").textContent = WW.when(machine.last_reading_at);
    document.getElementById("fact-orders").textContent = orderList().map(o => o + "x").join(", ") || "–";
  }

  // Likely-cause hints (monitor/detection/causes.py): the machine's summary and a growth
  // alarm's evidence show them alike.
  function hintList(hints) {
    return hints.map(h => el("article", { class: "cause-item", "data-cause": h.cause },
      el("h3", {}, h.title, " ", el("span", { class: "cause-confidence" }, h.confidence + " confidence")),
      el("p", {}, h.symptom),
      el("p", {}, el("strong", {}, "What to check next. "), h.check_next),
      el("details", {}, el("summary", {}, "Rule and source"),
        el("p", {}, el("strong", {}, "Confidence: "), h.confidence_rule),
        el("p", {}, el("strong", {}, "Source: "), h.source))));
  }

  function renderCauses() {
    const lc = machine.likely_causes;
    const box = document.getElementById("causes-list");
    if (!lc.hints.length) {
      box.replaceChildren(el("p", { class: "empty" }, lc.readings.length
        ? "No likely cause: the latest readings show none of the patterns the hints look for."
        : "No readings yet."));
    } else {
      box.replaceChildren(...hintList(lc.hints));
    }
    document.getElementById("causes-caution").textContent = lc.caution;
  }

  function renderMargins() {
    const tb = document.querySelector("#margins-table tbody");
    if (!machine.margins.length) { tb.replaceChildren(el("tr", {}, el("td", { colspan: 5, class: "empty" }, "No running speed or no modes yet."))); return; }
    tb.replaceChildren(...machine.margins.map(r => el("tr", { class: "margin-" + r.status },
      el("td", {}, r.mode, el("small", { class: "sub" }, WW.num(r.mode_hz, 2) + " Hz")),
      el("td", {}, r.excitation, el("small", { class: "sub" }, WW.num(r.excitation_hz, 2) + " Hz")),
      el("td", { class: "num " + (r.status === "inside" ? "short" : "") }, WW.num(r.margin_pct, 1)),
      el("td", { class: "num", title: r.basis }, WW.num(r.required_pct, 1), el("small", { class: "sub" }, r.basis)),
      el("td", { class: "num" }, r.amplification === null ? "–" : WW.num(r.amplification, 2)))));
  }

  async function renderModes() {
    const data = await WW.api(root.dataset.modes);
    const tb = document.querySelector("#modes-table tbody");
    tb.replaceChildren(...data.items.map(mo => el("tr", { "data-mode": mo.id },
      el("td", {}, mo.name, mo.valid === false ? el("small", { class: "sub notice-error" }, "not used: " + mo.problem) : null),
      el("td", { class: "num" }, WW.num(mo.frequency_hz, 2)),
      el("td", { class: "num" }, mo.damping_ratio === null ? "–" : WW.num(mo.damping_ratio, 3)),
      el("td", { class: "num" }, mo.amplification_factor === null ? "–" : WW.num(mo.amplification_factor, 1)),
      el("td", { class: "num" }, mo.required_margin_pct === null ? "rule" : WW.num(mo.required_margin_pct, 1)),
      el("td", {}, mo.source || ""), el("td", {}, mo.date || ""),
      el("td", {}, canEdit ? el("button", { type: "button", onclick: () => openForm(mo) }, "Edit") : null))));
    const hb = document.querySelector("#mode-history tbody");
    hb.replaceChildren(...data.history.map(h => el("tr", {},
      el("td", {}, WW.when(h.changed_at)), el("td", {}, h.changed_by), el("td", {}, h.mode),
      el("td", {}, h.change + ": " + describeChange(h.old, h.new)))));
  }

  function describeChange(oldV, newV) {
    if (!oldV) return Object.entries(newV || {}).filter(([, v]) => v !== null && v !== "").map(([k, v]) => k + "=" + v).join(", ");
    return Object.keys(newV || {}).filter(k => oldV[k] !== newV[k]).map(k => k + " " + oldV[k] + " → " + newV[k]).join(", ") || "no change";
  }

  const form = document.getElementById("mode-form");
  function openForm(mo) {
    form.hidden = false;
    form.reset();
    document.getElementById("mode-error").hidden = true;
    document.getElementById("mode-form-title").textContent = mo ? "Edit mode " + mo.name : "Add a mode";
    form.elements.id.value = mo ? mo.id : "";
    if (mo) for (const k of ["name", "frequency_hz", "damping_ratio", "amplification_factor", "required_margin_pct", "source", "date"]) {
      form.elements[k].value = mo[k] === null || mo[k] === undefined ? "" : mo[k];
    }
    form.elements.name.focus();
  }
  form.addEventListener("submit", async ev => {
    ev.preventDefault();
    const body = {};
    for (const k of ["name", "source", "date"]) body[k] = form.elements[k].value.trim() || null;
    for (const k of ["frequency_hz", "damping_ratio", "amplification_factor", "required_margin_pct"]) {
      const v = form.elements[k].value; body[k] = v === "" ? null : Number(v);
    }
    if (!body.source) body.source = "";
    const id = form.elements.id.value;
    try {
      await WW.api(root.dataset.modes + (id ? "/" + id : ""), { method: id ? "PUT" : "POST", body: body });
      form.hidden = true;
      await loadMachine();
    } catch (e) {
      const box = document.getElementById("mode-error"); box.textContent = e.message; box.hidden = false;
    }
  });
  document.getElementById("mode-cancel").addEventListener("click", () => { form.hidden = true; });
  if (canEdit) { const b = document.getElementById("mode-add"); b.hidden = false; b.addEventListener("click", () => openForm(null)); }

  function renderBaselines() {
    const tb = document.querySelector("#baseline-restarts tbody");
    const rows = machine.baseline_restarts || [];
    if (!rows.length) { tb.replaceChildren(el("tr", {}, el("td", { colspan: 5, class: "empty" }, "No restarts asked for."))); return; }
    tb.replaceChildren(...rows.map(r => el("tr", {},
      el("td", {}, WW.when(r.requested_at)), el("td", {}, r.requested_by), el("td", {}, r.point || "every point"),
      el("td", {}, r.comment), el("td", {}, r.applied_at ? WW.when(r.applied_at) : "waiting for the service"))));
  }

  const baselineForm = document.getElementById("baseline-form");
  if (baselineForm) baselineForm.addEventListener("submit", async ev => {
    ev.preventDefault();
    const err = document.getElementById("baseline-error"), done = document.getElementById("baseline-done");
    err.hidden = done.hidden = true;
    const point = baselineForm.elements.point.value || null;
    try {
      await WW.api(root.dataset.baseline, { method: "POST", body: { point: point, comment: baselineForm.elements.comment.value.trim() } });
      baselineForm.reset();
      done.textContent = "Asked for: the service restarts " + (point ? "point " + point : "every point") + " at its next reading.";
      done.hidden = false;
      await loadMachine();
    } catch (e) {
      err.textContent = e.message; err.hidden = false;
    }
  });

  // A stored spectrum (an alarm's evidence page links here with ?spectrum=<id>&step=<step>).
  async function openStored(spectrumId, step) {
    const sp = await WW.api(root.dataset.spectrumBase + spectrumId);
    drawSpectrum(sp, "stored with '" + step + "' at " + WW.when(sp.ts));
    document.getElementById("spectrum-latest").hidden = false;
    document.getElementById("chart-spectrum").scrollIntoView();
  }

  function latestFor(pid) { return machine.latest_spectra.find(s => s.point === pid); }

  function fillPointSelects() {
    for (const id of ["spectrum-point", "trend-point"]) {
      const s = document.getElementById(id);
      const cur = s.value;
      s.replaceChildren(...machine.points.map(p => el("option", { value: p.id }, p.id + " (" + p.direction + ")")));
      if (cur) s.value = cur;
    }
  }

  async function loadTrends() {
    const span = Number(document.getElementById("range").value);
    // The newer of the last reading and the last speed (a speed stream outlives a dead sensor).
    const times = [machine.last_reading_at, machine.speed_at].filter(Boolean).map(t => new Date(t).getTime() / 1000);
    const to = times.length ? Math.max(...times) : Date.now() / 1000;
    trendData = await WW.api(root.dataset.trends + "?from=" + (to - span) + "&to=" + (to + 1) + "&max_points=" + Math.min(2000, width(document.getElementById("chart-overall"))));
    drawResonance();
    drawTrends();
  }

  async function loadMachine() {
    machine = await WW.api(root.dataset.api);
    document.dispatchEvent(new CustomEvent("ww:machine", { detail: machine }));  // evidence.js
    renderFacts();
    fillPointSelects();
    const linePreset = document.querySelector("#marks-spacing option[value=line]");
    linePreset.disabled = !machine.line_frequency_hz;
    linePreset.textContent = machine.line_frequency_hz ? "twice line frequency (" + WW.num(2 * machine.line_frequency_hz, 0) + " Hz)" : "twice line frequency (none set)";
    renderCauses();
    renderMargins();
    renderBaselines();
    drawSpectrum(latestFor(document.getElementById("spectrum-point").value));
    await Promise.all([loadTrends(), renderModes()]);
    const asked = new URLSearchParams(location.search);
    if (/^[0-9]{1,19}$/.test(asked.get("spectrum") || "")) await openStored(asked.get("spectrum"), asked.get("step") || "an alarm step");
    document.body.dataset.loaded = "1";
  }

  document.getElementById("range").addEventListener("change", loadTrends);
  document.getElementById("trend-point").addEventListener("change", drawTrends);
  document.getElementById("spectrum-point").addEventListener("change", e => { drawSpectrum(latestFor(e.target.value)); });
  // The marker controls redraw the markers; choosing a spacing preset fills its Hz,
  // typing a spacing chooses "typed".
  for (const id of ["marks-run", "marks-run-count", "marks-freq", "marks-freq-hz", "marks-freq-count", "marks-side",
    "marks-carrier-hz", "marks-spacing", "marks-side-count"]) document.getElementById(id).addEventListener("change", updateMarks);
  document.getElementById("marks-spacing-hz").addEventListener("change", () => { document.getElementById("marks-spacing").value = "typed"; updateMarks(); });
  document.getElementById("spectrum-latest").addEventListener("click", e => { e.target.hidden = true; drawSpectrum(latestFor(document.getElementById("spectrum-point").value)); });
  let resizeTimer = null;
  window.addEventListener("resize", () => { clearTimeout(resizeTimer); resizeTimer = setTimeout(() => { if (trendData) { drawResonance(); drawTrends(); } }, 200); });
  loadMachine().catch(e => { document.getElementById("facts").append(el("p", { class: "notice notice-error" }, "Could not load: " + e.message)); });
})();
