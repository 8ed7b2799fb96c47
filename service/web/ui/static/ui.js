// Tallyward operations view: live alert rows (polling the seq feed) and the day chart's readout.
// No library, no other host: the page works without this script, it only adds live updates.
"use strict";

const POLL_MS = 3000; // milliseconds between polls of the alert feed

function pollAlerts(table) {
  const body = table.tBodies[0];
  const live = document.getElementById("live");
  const limit = Number(table.dataset.limit || 200);
  let after = table.dataset.after;
  let busy = false;
  async function tick() {
    if (busy) return;
    busy = true;
    try {
      const sep = table.dataset.poll.includes("?") ? "&" : "?";
      const res = await fetch(table.dataset.poll + sep + "after=" + encodeURIComponent(after),
                              {credentials: "same-origin", headers: {"Accept": "application/json"}});
      if (res.status === 401) { live.textContent = "Signed out: reload to sign in again."; return; }
      if (!res.ok) { live.textContent = "Update failed (" + res.status + "); retrying."; return; }
      const page = await res.json();
      let added = 0, changed = 0, removed = 0;
      for (const change of page.changes) {
        const old = document.getElementById("alert-" + change.id);
        if (change.row === null) {
          if (old) { old.remove(); removed++; }
          continue;
        }
        const holder = document.createElement("tbody");
        holder.innerHTML = change.row;
        const row = holder.firstElementChild;
        row.classList.add("fresh");
        if (old) { old.replaceWith(row); changed++; }
        else { body.insertBefore(row, body.firstElementChild); added++; }
      }
      while (body.rows.length > limit) body.deleteRow(body.rows.length - 1);
      after = String(page.next_after);
      table.dataset.after = after;
      if (added || changed || removed) {
        const count = document.getElementById("alert-count");
        if (count) count.textContent = String(Number(count.textContent) + added - removed);
        live.textContent = "Updated " + new Date().toLocaleTimeString() + ": " + added +
          " new, " + changed + " changed, " + removed + " no longer matching.";
      }
    } catch (err) {
      live.textContent = "Update failed; retrying.";
    } finally {
      busy = false;
    }
  }
  setInterval(tick, POLL_MS);
}

function chartReadout(svg) {
  const out = document.getElementById("readout");
  if (!out) return;
  const show = (event) => {
    const point = event.target.closest(".pt");
    if (point) out.textContent = point.dataset.value;
  };
  svg.addEventListener("mouseover", show);
  svg.addEventListener("focusin", show);
}

document.addEventListener("DOMContentLoaded", () => {
  const table = document.querySelector("table[data-poll]");
  if (table) pollAlerts(table);
  const chart = document.querySelector("svg.day");
  if (chart) chartReadout(chart);
});
