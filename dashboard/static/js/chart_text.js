/* Text alternatives of the charts (WCAG 2.1 SC 1.1.1): each chart's accessible name says
   what it plots (its series, the span of x, the range of each series) and a "Show the data
   as a table" disclosure after it holds the plotted series, one row per x value, written as
   the chart's legend writes them. Both come from the uPlot instance the chart was drawn
   with, so the text cannot drift from the picture. The table is built when opened (a
   spectrum has thousands of bins) and rebuilt when the chart is redrawn while open. */
"use strict";
const ChartText = (function () {
  const el = WW.el;
  const drawn = new WeakMap();  // chart element -> { u, marks }

  function title(target) {
    if (!target.dataset.title) target.dataset.title = target.getAttribute("aria-label") || target.id;
    return target.dataset.title;
  }

  // A cell of series si at row i, as the legend shows it (the series' value function).
  function cell(u, si, i) {
    const v = u.data[si][i];
    if (v === null || v === undefined || Number.isNaN(v)) return "–";
    const s = u.series[si];
    return String(s.value ? s.value(u, v, si, i) : v);
  }

  function xName(u) {
    const axis = u.axes[0] && u.axes[0].label;
    return axis || u.series[0].label || "x";
  }

  function lowerFirst(text) { return text.charAt(0).toLowerCase() + text.slice(1); }

  // "<label> <min> to <max> at <x of max>" of one series, or "<label> no data".
  function range(u, si) {
    const ys = u.data[si];
    let lo = -1, hi = -1;
    for (let i = 0; i < ys.length; i++) {
      const v = ys[i];
      if (v === null || v === undefined || Number.isNaN(v)) continue;
      if (lo < 0 || v < ys[lo]) lo = i;
      if (hi < 0 || v > ys[hi]) hi = i;
    }
    const name = u.series[si].label;
    if (lo < 0) return name + " no data";
    if (ys[lo] === ys[hi]) return name + " " + cell(u, si, lo);
    return name + " " + cell(u, si, lo) + " to " + cell(u, si, hi) + " at " + cell(u, 0, hi);
  }

  // The accessible name: what the chart plots, over what span, and each series' range.
  function summary(target, u, marks) {
    const n = u.data[0].length;
    const names = u.series.slice(1).map(s => s.label);
    const span = n ? " (" + cell(u, 0, 0) + " to " + cell(u, 0, n - 1) + ")" : "";
    const parts = [title(target) + ": " + names.join(", ") + " against " + lowerFirst(xName(u)) + span + ", " + n + " points."];
    parts.push(u.series.slice(1).map((s, k) => range(u, k + 1)).join("; ") + ".");
    if (marks.length) parts.push("Also drawn: " + marks.join("; ") + ".");
    parts.push("The data is in the table after the chart.");
    return parts.join(" ");
  }

  function table(target, u, marks) {
    const head = el("tr", {}, el("th", { scope: "col" }, xName(u)),
      u.series.slice(1).map(s => el("th", { scope: "col" }, s.label)));
    const rows = [];
    for (let i = 0; i < u.data[0].length; i++) {
      const cells = [el("th", { scope: "row" }, cell(u, 0, i))];
      for (let si = 1; si < u.series.length; si++) cells.push(el("td", { class: "num" }, cell(u, si, i)));
      rows.push(el("tr", {}, cells));
    }
    return [
      el("div", { class: "chart-table-wrap", tabindex: "0", role: "region", "aria-label": "Data of " + title(target) },
        el("table", { class: "chart-table" }, el("caption", {}, title(target) + ", as drawn"),
          el("thead", {}, head), el("tbody", {}, rows))),
      marks.length ? el("ul", { class: "chart-marks" }, marks.map(m => el("li", {}, m))) : null,
    ];
  }

  // The disclosure after the chart element, made once.
  function box(target) {
    let d = target.nextElementSibling;
    if (d && d.classList.contains("chart-data") && d.dataset.for === target.id) return d;
    d = el("details", { class: "chart-data", "data-for": target.id },
      el("summary", {}, "Show the data of " + title(target).toLowerCase() + " as a table"));
    d.addEventListener("toggle", () => fill(target, d));
    target.after(d);
    return d;
  }

  function fill(target, d) {
    const got = drawn.get(target);
    d.querySelectorAll(":scope > :not(summary)").forEach(x => x.remove());
    if (d.open && got) d.append(...table(target, got.u, got.marks).filter(Boolean));
  }

  // After a chart is drawn: name it and offer its data. marks: other things the chart
  // draws that are no series (mode bands, frequency markers), as short text.
  function attach(target, u, marks) {
    marks = marks || [];
    title(target);
    target.setAttribute("role", "img");
    target.setAttribute("aria-label", summary(target, u, marks));
    target.dataset.rows = String(u.data[0].length);
    drawn.set(target, { u, marks });
    const d = box(target);
    d.hidden = false;
    fill(target, d);
  }

  // A chart with nothing to draw: its element's text says so; no table.
  function clear(target) {
    drawn.delete(target);
    title(target);
    target.removeAttribute("role");
    target.removeAttribute("aria-label");
    target.dataset.rows = "0";
    const d = target.nextElementSibling;
    if (d && d.classList.contains("chart-data") && d.dataset.for === target.id) { d.open = false; d.hidden = true; fill(target, d); }
  }

  return { attach, clear, summary };
})();
