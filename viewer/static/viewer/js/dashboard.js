// The results dashboard: sortable tables, and the live progress of the latest analysis run.
//
// Config comes from the json_script element "dashboard-config": {status, run, state}.
// While a run is pending or running the page polls the status endpoint and moves the bar;
// when the run ends the page reloads to show its tables.

import { csrfToken, getJson } from "./api.js";

const POLL_MS = 1500;
const config = JSON.parse(document.getElementById("dashboard-config").textContent);

/** Sort key of a cell: its data-sort value as a number when it is one, else as text. */
function keyOf(cell) {
  const raw = cell.dataset.sort ?? cell.textContent.trim();
  const number = Number(raw);
  return raw !== "" && Number.isFinite(number) ? { n: number } : { s: raw.toLowerCase() };
}

function compare(a, b) {
  if ("n" in a && "n" in b) return a.n - b.n;
  if ("n" in a) return -1;
  if ("n" in b) return 1;
  return a.s < b.s ? -1 : a.s > b.s ? 1 : 0;
}

/** Click a column heading to sort by it; click again to reverse. Empty cells go last. */
export function makeSortable(table) {
  const headings = Array.from(table.tHead.rows[0].cells);
  headings.forEach((th, column) => {
    th.tabIndex = 0;
    th.classList.add("sort-head");
    const sort = () => {
      const ascending = th.getAttribute("aria-sort") !== "ascending";
      headings.forEach((h) => h.removeAttribute("aria-sort"));
      th.setAttribute("aria-sort", ascending ? "ascending" : "descending");
      const body = table.tBodies[0];
      const rows = Array.from(body.rows);
      rows.sort((r1, r2) => {
        const k1 = keyOf(r1.cells[column]);
        const k2 = keyOf(r2.cells[column]);
        const empty1 = "s" in k1 && k1.s === "";
        const empty2 = "s" in k2 && k2.s === "";
        if (empty1 || empty2) return empty1 - empty2;
        return ascending ? compare(k1, k2) : compare(k2, k1);
      });
      rows.forEach((row) => body.appendChild(row));
    };
    th.addEventListener("click", sort);
    th.addEventListener("keydown", (event) => {
      if (event.key === "Enter" || event.key === " ") {
        event.preventDefault();
        sort();
      }
    });
  });
}

function showProgress(state) {
  const box = document.querySelector(".run-progress");
  const bar = document.getElementById("run-bar");
  const message = document.getElementById("run-message");
  const status = document.getElementById("run-status");
  box.hidden = false;
  bar.value = state.progress;
  message.textContent = state.message || "";
  if (status) status.textContent = state.status.charAt(0).toUpperCase() + state.status.slice(1);
  document.getElementById("run-state").dataset.state = state.status;
}

async function poll() {
  let state;
  try {
    state = await getJson(config.status);
  } catch (error) {
    document.getElementById("run-message").textContent = `progress unavailable: ${error.message}`;
    window.setTimeout(poll, POLL_MS * 2);
    return;
  }
  if (state.status === "pending" || state.status === "running") {
    showProgress(state);
    window.setTimeout(poll, POLL_MS);
  } else if (state.code !== config.run || state.status !== config.state) {
    window.location.reload();
  }
}

async function runNow(event) {
  event.preventDefault();
  const button = document.getElementById("run-now");
  button.disabled = true;
  const response = await fetch(config.status, {
    method: "POST",
    credentials: "same-origin",
    headers: { Accept: "application/json", "X-CSRFToken": csrfToken() },
  });
  const state = await response.json().catch(() => ({}));
  button.disabled = false;
  if (!response.ok) {
    document.getElementById("run-message").textContent = state.error || `HTTP ${response.status}`;
    return;
  }
  if (state.status === "pending" || state.status === "running") {
    showProgress(state);
    window.setTimeout(poll, POLL_MS);
  } else if (state.code !== config.run) {
    window.location.reload();
  } else {
    showProgress({ ...state, message: "nothing changed since this run" });
  }
}

document.querySelectorAll("table.sortable").forEach(makeSortable);
document.getElementById("run-now").form.addEventListener("submit", runNow);
if (config.state === "pending" || config.state === "running") window.setTimeout(poll, POLL_MS);
