/* Plant overview: fetches /api/v1/machines, renders, sorts, filters and refreshes. */
"use strict";
(function () {
  const table = document.getElementById("machines-table");
  const tbody = table.querySelector("tbody");
  const empty = document.getElementById("machines-empty");
  const tally = document.getElementById("tally");
  const refreshed = document.getElementById("refreshed");
  const fText = document.getElementById("f-text");
  const fState = document.getElementById("f-state");
  const fZone = document.getElementById("f-zone");
  const machineUrl = table.dataset.machineUrl;
  let rows = [];
  let sortKey = "name";
  let sortDir = 1;

  const stateRank = { alarm: 0, normal: 1, no_data: 2 };

  function key(m, k) {
    switch (k) {
      case "state": return stateRank[m.state] !== undefined ? stateRank[m.state] : 9;
      case "zone": return m.worst_zone ? m.worst_zone.zone : "";
      case "margin_gap":
        // Shortfall against the required margin: most negative first when ascending.
        return m.nearest_margin ? m.nearest_margin.margin_pct - m.nearest_margin.required_pct : Infinity;
      case "speed_rpm": return m.speed_rpm === null ? -1 : m.speed_rpm;
      default: return (m[k] === null || m[k] === undefined) ? "" : m[k];
    }
  }

  function render() {
    const text = fText.value.trim().toLowerCase();
    const st = fState.value, zn = fZone.value;
    const shown = rows.filter(m =>
      (!text || (m.name + " " + m.id + " " + (m.location || "")).toLowerCase().includes(text)) &&
      (!st || m.state === st) &&
      (!zn || (m.worst_zone && m.worst_zone.zone === zn)));
    shown.sort((a, b) => {
      const x = key(a, sortKey), y = key(b, sortKey);
      if (x < y) return -sortDir;
      if (x > y) return sortDir;
      return a.name < b.name ? -1 : 1;
    });
    tbody.replaceChildren(...shown.map(m => {
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
        WW.el("td", { class: "num" }, m.speed_rpm === null ? "–" : WW.num(m.speed_rpm, 0)),
        marginCell,
        WW.el("td", {}, WW.zoneTag(z && z.zone),
              z ? WW.el("small", { class: "sub" }, z.point + " · " + WW.num(z.overall_mm_s_rms, 2) + " mm/s") : null),
        WW.el("td", { class: "num" }, m.active_alarms ? WW.severityTag(m.worst_severity) : null, " ", String(m.active_alarms)));
    }));
    empty.hidden = shown.length > 0;
    const nAlarm = rows.filter(m => m.state === "alarm").length;
    tally.replaceChildren(
      WW.el("span", {}, rows.length + " machines"),
      WW.el("span", { class: nAlarm ? "tally-alarm" : "" }, nAlarm + " in alarm"));
  }

  async function load() {
    try {
      const data = await WW.api(table.dataset.api);
      rows = data.items;
      render();
      refreshed.textContent = "updated " + WW.when(new Date());
      refreshed.classList.remove("error");
      document.body.dataset.loaded = "1";
    } catch (e) {
      refreshed.textContent = "refresh failed: " + e.message;
      refreshed.classList.add("error");
    }
  }

  table.querySelectorAll("th[data-key]").forEach(th => {
    th.tabIndex = 0;
    const go = () => {
      const k = th.dataset.key;
      sortDir = (k === sortKey) ? -sortDir : 1;
      sortKey = k;
      table.querySelectorAll("th").forEach(h => h.removeAttribute("aria-sort"));
      th.setAttribute("aria-sort", sortDir > 0 ? "ascending" : "descending");
      render();
    };
    th.addEventListener("click", go);
    th.addEventListener("keydown", e => { if (e.key === "Enter") go(); });
  });
  [fText, fState, fZone].forEach(x => x.addEventListener("input", render));
  load();
  setInterval(load, 1000 * Number(table.dataset.refreshS || 15));
})();
