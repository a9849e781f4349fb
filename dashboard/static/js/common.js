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

  function when(iso) {
    if (!iso) return "–";
    const d = new Date(iso);
    return d.toISOString().replace("T", " ").slice(0, 16) + " UTC";
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

  // Colours for chart series, chosen to stay apart for colour-blind readers.
  const palette = ["#1b6ca8", "#d1495b", "#2a9d8f", "#8d5a97", "#e09f3e", "#5c6b73", "#3d405b", "#81b29a"];

  return { api, el, num, when, zoneTag, stateTag, severityTag, palette, csrf };
})();
