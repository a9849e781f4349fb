/* Plant overview: one page of /api/v1/machines at a time, filtered, sorted and paged by the
   server (docs/api.md, "Machines"), refreshed on a timer. */
"use strict";
(function () {
  const table = document.getElementById("machines-table");
  const tbody = table.querySelector("tbody");
  const empty = document.getElementById("machines-empty");
  const tally = document.getElementById("tally");
  const refreshed = document.getElementById("refreshed");
  const fText = document.getElementById("f-text");
  const fGroup = document.getElementById("f-group");
  const fState = document.getElementById("f-state");
  const fSeverity = document.getElementById("f-severity");
  const fZone = document.getElementById("f-zone");
  const prev = document.getElementById("page-prev");
  const next = document.getElementById("page-next");
  const where = document.getElementById("page-where");
  const machineUrl = table.dataset.machineUrl;
  const pageSize = Number(table.dataset.pageSize || 50);
  // The server's sort key of each column, and the column sorted now ('-' first: reversed).
  let sort = "state";
  let offset = 0;
  let nextOffset = null;
  let loading = 0;

  function query() {
    const p = new URLSearchParams({ sort: sort, limit: String(pageSize) });
    if (offset > 0) p.set("cursor", String(offset));
    for (const [k, input] of [["q", fText], ["group", fGroup], ["state", fState], ["severity", fSeverity], ["zone", fZone]]) {
      const v = input.value.trim();
      if (v) p.set(k, v);
    }
    return table.dataset.api + "?" + p.toString();
  }

  function row(m) {
    const nm = m.nearest_margin;
    const marginCell = nm
      ? WW.el("td", { class: "num " + (nm.within_required ? "short" : "clear"),
                      title: nm.order + "x (" + WW.num(nm.excitation_hz, 2) + " Hz) vs " + nm.mode + " (" + WW.num(nm.mode_hz, 2) + " Hz)" },
          WW.num(nm.margin_pct, 1) + " % / " + WW.num(nm.required_pct, 1) + " %",
          WW.el("small", { class: "sub" }, nm.order + "x → " + nm.mode))
      : WW.el("td", { class: "num" }, "–");
    const z = m.worst_zone;
    return WW.el("tr", { "data-machine": m.id, class: "state-row-" + m.state },
      WW.el("td", {}, WW.el("a", { href: machineUrl.replace("__ID__", encodeURIComponent(m.id)) }, m.name),
            WW.el("small", { class: "sub" }, m.id)),
      WW.el("td", {}, m.location || ""),
      WW.el("td", {}, WW.stateTag(m.state)),
      WW.el("td", { class: "num" }, m.speed_rpm === null ? "–" : WW.num(m.speed_rpm, 0),
            m.running ? WW.el("small", { class: "sub run-" + m.running, "data-running": m.running,
                                          title: m.stop_announced ? "stop announced" : "" }, m.running) : null),
      marginCell,
      WW.el("td", {}, WW.zoneTag(z && z.zone),
            z ? WW.el("small", { class: "sub" }, z.point + " · " + WW.num(z.overall_mm_s_rms, 2) + " mm/s") : null),
      WW.el("td", { class: "num" }, m.active_alarms ? WW.severityTag(m.worst_severity) : null, " ", String(m.active_alarms)));
  }

  function render(data) {
    tbody.replaceChildren(...data.items.map(row));
    empty.hidden = data.items.length > 0;
    const c = data.counts;
    const all = c.alarm + c.normal + c.no_data;
    tally.replaceChildren(
      WW.el("span", {}, all + " machines"),
      WW.el("span", { class: c.alarm ? "tally-alarm" : "" }, c.alarm + " in alarm"));
    nextOffset = data.next === null ? null : Number(data.next);
    prev.disabled = offset === 0;
    next.disabled = nextOffset === null;
    where.textContent = data.items.length
      ? (offset + 1) + "–" + (offset + data.items.length) + " of " + data.total
      : "0 of " + data.total;
  }

  async function load() {
    const mine = ++loading;
    try {
      const data = await WW.api(query());
      if (mine !== loading) return;  // a newer request (filter, sort, page) answers instead
      if (!data.items.length && offset > 0) {
        offset = 0;  // the page emptied (machines changed state): back to the first
        return load();
      }
      render(data);
      refreshed.textContent = "updated " + WW.when(new Date());
      refreshed.classList.remove("error");
      document.body.dataset.loaded = "1";
    } catch (e) {
      if (mine !== loading) return;
      refreshed.textContent = "refresh failed: " + e.message;
      refreshed.classList.add("error");
    }
  }

  function fromStart() {
    offset = 0;
    load();
  }

  table.querySelectorAll("th[data-key]").forEach(th => {
    th.tabIndex = 0;
    const go = () => {
      const k = th.dataset.key;
      sort = sort === k ? "-" + k : k;
      table.querySelectorAll("th").forEach(h => h.removeAttribute("aria-sort"));
      th.setAttribute("aria-sort", sort.startsWith("-") ? "descending" : "ascending");
      fromStart();
    };
    th.addEventListener("click", go);
    th.addEventListener("keydown", e => { if (e.key === "Enter") go(); });
  });
  let typing = null;
  fText.addEventListener("input", () => { clearTimeout(typing); typing = setTimeout(fromStart, 300); });
  [fGroup, fState, fSeverity, fZone].forEach(x => x.addEventListener("change", fromStart));
  prev.addEventListener("click", () => { offset = Math.max(0, offset - pageSize); load(); });
  next.addEventListener("click", () => { if (nextOffset !== null) { offset = nextOffset; load(); } });
  load();
  setInterval(load, 1000 * Number(table.dataset.refreshS || 15));
})();
