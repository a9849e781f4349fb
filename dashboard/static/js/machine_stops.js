/* Planned stops of the machine page: the stops not over yet (GET /api/v1/machines/{id}/stops?current=true),
   announcing one (POST .../stops) and ending one early (POST .../stops/{id}/end); docs/api.md, "Planned stops". */
"use strict";
(function () {
  const panel = document.getElementById("stops-panel");
  if (!panel) return;
  const el = WW.el;
  const url = panel.dataset.stops;
  const tbody = panel.querySelector("#stops-table tbody");
  const form = document.getElementById("stop-form");
  const canEnd = !!form;

  function row(s) {
    const end = canEnd
      ? el("td", {}, el("button", { type: "button", "data-stop": String(s.id), onclick: () => endStop(s.id) }, "End now"))
      : null;
    return el("tr", { "data-stop": String(s.id) },
      el("td", {}, WW.when(s.from)), el("td", {}, WW.when(s.until)), el("td", {}, s.announced_by),
      el("td", {}, s.comment), el("td", {}, s.current ? "yes" : "not yet"), end);
  }

  async function load() {
    const data = await WW.api(url + "?current=true");
    tbody.replaceChildren(...(data.items.length ? data.items.map(row)
      : [el("tr", {}, el("td", { colspan: "6", class: "empty" }, "No planned stop."))]));
  }

  async function endStop(id) {
    await WW.api(url + "/" + id + "/end", { method: "POST", body: {} });
    await load();
  }

  if (form) form.addEventListener("submit", async ev => {
    ev.preventDefault();
    const err = document.getElementById("stop-error");
    err.hidden = true;
    const hours = Number(form.elements.hours.value);
    try {
      await WW.api(url, { method: "POST", body: {
        until: new Date(Date.now() + hours * 3600e3).toISOString(), comment: form.elements.comment.value.trim() } });
      form.elements.comment.value = "";
      await load();
    } catch (e) {
      err.textContent = e.message; err.hidden = false;
    }
  });

  load().catch(e => { tbody.replaceChildren(el("tr", {}, el("td", { colspan: "6", class: "notice notice-error" }, "Could not load: " + e.message))); });
})();
