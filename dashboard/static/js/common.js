/* Shared helpers: API calls with the CSRF header, formatting, DOM building without innerHTML. */
"use strict";
const WW = (function () {
  const csrf = document.querySelector('meta[name="csrf-token"]').content;

  async function api(url, opts) {
    opts = opts || {};
    const headers = Object.assign({ "Accept": "application/json" }, opts.headers || {});
    if (opts.body !== undefined) {
      headers["Content-Type"] = "application/json";
      headers["X-CSRFToken"] = csrf;
    }
    const resp = await fetch(url, {
      method: opts.method || "GET",
      headers: headers,
      credentials: "same-origin",
      body: opts.body === undefined ? undefined : JSON.stringify(opts.body),
    });
    const data = await resp.json().catch(() => null);
    if (!resp.ok) {
      const msg = data && data.error ? data.error.message : resp.status + " " + resp.statusText;
      throw new Error(msg);
    }
    return data;
  }

  // Build an element; children are nodes or strings (always set as text, never as HTML).
  function el(tag, attrs, ...children) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined || v === false) continue;
      if (k === "class") e.className = v;
      else if (k === "text") e.textContent = v;
      else if (k.startsWith("on")) e.addEventListener(k.slice(2), v);
      else e.setAttribute(k, v === true ? "" : v);
    }
    for (const c of children.flat()) {
      if (c === null || c === undefined) continue;
      e.append(c instanceof Node ? c : document.createTextNode(String(c)));
    }
    return e;
  }

  function num(v, digits) {
    if (v === null || v === undefined || Number.isNaN(v)) return "–";
    return Number(v).toFixed(digits === undefined ? 1 : digits);
  }

  // The plant's IANA time zone (dashboard.time_zone), from the page.
  const timeZone = document.querySelector('meta[name="time-zone"]').content || "UTC";
  const timeParts = new Intl.DateTimeFormat("en-GB", {
    timeZone: timeZone, year: "numeric", month: "2-digit", day: "2-digit",
    hour: "2-digit", minute: "2-digit", hourCycle: "h23", timeZoneName: "longOffset" });

  // A time as people read it, the one form of the whole dashboard (the server writes the
  // same with monitor.model.timefmt.plant_time): "YYYY-MM-DD HH:MM +HH:MM", 24-hour, in
  // the plant's time zone with the offset of that instant. Takes ISO text, epoch seconds
  // or a Date.
  function when(t) {
    if (t === null || t === undefined || t === "") return "–";
    const d = t instanceof Date ? t : new Date(typeof t === "number" ? t * 1000 : t);
    if (Number.isNaN(d.getTime())) return "–";
    const p = {};
    for (const x of timeParts.formatToParts(d)) p[x.type] = x.value;
    const offset = p.timeZoneName === "GMT" ? "+00:00" : p.timeZoneName.replace("GMT", "");
    return p.year + "-" + p.month + "-" + p.day + " " + p.hour + ":" + p.minute + " " + offset;
  }

  // Time-axis tick labels cut from when(): the clock time, with the date under the first
  // tick of each day; only dates when every tick falls on midnight.
  function timeTicks(u, splits) {
    const parts = splits.map(s => when(s).split(" "));
    if (parts.every(p => p[1] === "00:00")) return parts.map(p => p[0]);
    let day = null;
    return parts.map(p => {
      const label = p[0] === day ? p[1] : p[1] + "\n" + p[0];
      day = p[0];
      return label;
    });
  }

  // uPlot options of a chart against time: ticks on the plant's clock, labelled as above,
  // and the legend's time written by when().
  function timeChart(opts) {
    opts.tzDate = ts => uPlot.tzDate(new Date(ts * 1e3), timeZone);
    opts.series[0] = Object.assign({ label: "time", value: (u, v) => when(v) }, opts.series[0]);
    opts.axes = opts.axes || [{}];
    opts.axes[0] = Object.assign({ values: timeTicks, space: 80, size: 56 }, opts.axes[0]);
    return opts;
  }

  function zoneTag(zone) {
    if (!zone) return el("span", { class: "tag tag-muted" }, "–");
    return el("span", { class: "zone zone-" + zone, title: "ISO 20816 zone " + zone }, zone);
  }

  function stateTag(state) {
    const label = { alarm: "alarm", normal: "normal", no_data: "no data" }[state] || state;
    return el("span", { class: "state state-" + state }, label);
  }

  function severityTag(sev) {
    return el("span", { class: "sev sev-" + sev }, sev);
  }

  // Colours for chart series, chosen to stay apart for colour-blind readers, each at least
  // 3:1 against the white plot (WCAG 2.1 SC 1.4.11).
  const palette = ["#1b6ca8", "#d1495b", "#2a9d8f", "#8d5a97", "#b86e0a", "#5c6b73", "#3d405b", "#4e8f72"];

  // Phones show each table row as a card whose cells carry their column's name (CSS
  // content: attr(data-label), site.css); label the cells of every table, and again
  // whenever a script fills one.
  function labelCells() {
    for (const table of document.querySelectorAll("main table.grid")) {
      const names = [...table.querySelectorAll("thead th")].map(th => th.textContent.trim());
      for (const body of table.tBodies) {
        for (const row of body.rows) {
          let col = 0;
          for (const cell of row.cells) {
            if (cell.colSpan === 1 && names[col] && cell.dataset.label !== names[col]) cell.dataset.label = names[col];
            col += cell.colSpan;
          }
        }
      }
    }
  }
  let labelPending = false;
  new MutationObserver(() => {
    if (labelPending) return;
    labelPending = true;
    requestAnimationFrame(() => { labelPending = false; labelCells(); });
  }).observe(document.querySelector("main"), { childList: true, subtree: true });
  labelCells();

  return { api, el, num, when, timeZone, timeTicks, timeChart, zoneTag, stateTag, severityTag, palette, csrf };
})();
