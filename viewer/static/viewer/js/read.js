// The reading page: load the read (JSON header, then the coarse and the full volume), wire
// the viewer, the landmark panel, saving, active time and submitting together.

import { ActivityClock } from "./activity.js";
import { EventQueue, getJson, postJson } from "./api.js";
import { bindKeys, shortcutHtml } from "./keys.js";
import { LandmarkBook, applyLocal, renderPanel } from "./landmarks.js";
import { Viewer } from "./viewer.js";
import { Volume, fetchVoxels } from "./volume.js";

const config = JSON.parse(document.getElementById("read-config").textContent);
const root = document.getElementById("reader-app");
const $ = (sel) => root.querySelector(sel);

const SAVE_TEXT = {
  saved: "All changes saved",
  saving: "Saving…",
  offline: "Offline: changes kept, retrying",
  conflict: "Not saved: changed elsewhere",
  refused: "A change was refused",
};

function notice(html, kind = "info") {
  const el = $("#rd-notice");
  el.innerHTML = html;
  el.dataset.kind = kind;
  el.hidden = false;
}

function fmtMm(xyz) {
  return xyz.map((x) => x.toFixed(2)).join(", ");
}

function fmtClock(seconds) {
  const s = Math.floor(seconds);
  const h = Math.floor(s / 3600);
  const m = Math.floor((s % 3600) / 60);
  const rest = String(s % 60).padStart(2, "0");
  return h ? `${h}:${String(m).padStart(2, "0")}:${rest}` : `${m}:${rest}`;
}

async function start() {
  performance.mark("viewer:start");
  let detail;
  try {
    detail = await getJson(config.api.detail);
  } catch (error) {
    root.dataset.state = "error";
    notice(`This read could not be opened: ${error.message}`, "bad");
    return;
  }
  performance.mark("viewer:header");
  // Start reading the coarse volume (already requested by the page's preload link) before
  // building the page, so the network and the page setup overlap.
  const coarseCount = detail.volume.coarse_shape.reduce((a, b) => a * b, 1);
  const coarsePromise = fetchVoxels(detail.volume.coarse_url, detail.volume.dtype, coarseCount);
  coarsePromise.catch(() => {}); // reported where it is awaited
  const locked = detail.status === "submitted";
  const page = { detail, viewer: null, book: null, queue: null, clock: null };
  window.cairnRead = page;

  const queue = await EventQueue.open(config.api.events, detail.code, detail.version, {
    onState: (state, pending) => showSave(state, pending),
    onAck: (event, data) => {
      const later = queue.pending.some((e) => e.landmark === event.landmark);
      book.acknowledge(event.landmark, data.placement, later);
    },
    onConflict: (message, lost) => {
      book.locked = true;
      root.dataset.state = "conflict";
      notice(
        `<strong>This read was changed in another tab or on another machine.</strong> ` +
          `${countText(lost.length)} from this browser could not be applied and ` +
          `${lost.length === 1 ? "was" : "were"} not saved (${escape(actionList(book, lost))}); ` +
          `nothing stored was overwritten. The panes now show the read as stored. ` +
          `<span class="muted">Server: ${escape(message)}.</span> ` +
          `<button type="button" data-act="reload">Reload the read</button>`,
        "bad",
      );
      showStored(page);
    },
    onAdopt: (events) => {
      // Another tab of this read closed with unsent changes: this page sends them now.
      for (const event of events) replay(book, event);
      if (root.dataset.state !== "conflict") notice(
        `${countText(events.length)} left by a closed tab of this read ` +
          `(${escape(actionList(book, events))}) ${events.length === 1 ? "is" : "are"} being saved from this tab.`,
      );
      viewer.changed({ overlay: true, panel: true });
    },
    onRefused: (event, message) => {
      notice(`The server refused a change to ${escape(event.landmark)}: ${escape(message)}. Nothing was stored for it.`, "bad");
      resync();
    },
  });
  page.queue = queue;

  const placements = [...detail.placements];
  const book = new LandmarkBook(detail.landmarks, placements, (event) => queue.push(event), () =>
    viewer.changed({ overlay: true, panel: true }),
  );
  for (const event of queue.pending) replay(book, event);
  book.locked = locked;
  page.book = book;

  const viewer = new Viewer(root, detail.volume, book);
  page.viewer = viewer;
  wire(viewer, book, queue, page);
  page.asideShown = [];
  if (locked) {
    root.dataset.state = "submitted";
    notice(`This read was submitted and is locked. <a href="${config.home}">Back to the worklist</a>`, "ok");
  }
  const aside = queue.setAsideEvents();
  page.asideShown = aside;
  if (aside.length) {
    notice(
      `${countText(aside.length)} made earlier in this browser could not be applied without ` +
        `overwriting changes made to this read elsewhere, and ${aside.length === 1 ? "was" : "were"} ` +
        `not saved (${escape(actionList(book, aside))}). What you see is the read as stored. ` +
        `<button type="button" data-act="dismiss-aside">Dismiss this note</button>`,
      "warn",
    );
  }
  if (queue.pending.length) {
    if (!aside.length) {
      const closed = queue.adoptedAtOpen.length ? ` (${queue.adoptedAtOpen.length} of them from a closed tab)` : "";
      notice(`${queue.pending.length} change(s) from an earlier visit were not yet saved${closed}; sending them now.`);
    }
    queue.flush();
  }
  if (!locked) {
    page.clock = new ActivityClock(config.api.activity, detail.active_seconds, (total, active) => {
      $("#rd-clock").textContent = `Active ${fmtClock(total)}${active ? "" : " (paused)"}`;
    });
  }
  announceOtherTabs(detail.code);
  await loadVolumes(viewer, detail.volume, coarsePromise);
}

async function loadVolumes(viewer, header, coarsePromise) {
  const progress = $("#rd-progress");
  const text = $("#rd-load-text");
  viewer.onFirstImage = () => {
    performance.mark("viewer:first-image");
    requestAnimationFrame(() => performance.mark("viewer:first-frame"));
  };
  try {
    const fullCount = header.shape.reduce((a, b) => a * b, 1);
    const coarse = await coarsePromise;
    performance.mark("viewer:coarse-ready");
    viewer.setVolume("coarse", new Volume(coarse, header.coarse_shape, 2));
    text.textContent = "Preview; loading full resolution…";
    let shown = 0;
    const full = await fetchVoxels(header.url, header.dtype, fullCount, {
      onProgress: (received, total) => {
        const now = performance.now();
        if (now - shown < 50 && received < total) return;
        shown = now;
        progress.value = received / total;
        text.textContent = `${Math.round((100 * received) / total)} % of ${(total / 2 ** 20).toFixed(0)} MiB`;
      },
    });
    viewer.setVolume("full", new Volume(full, header.shape, 1));
    viewer.onFirstImage = () => {
      performance.mark("viewer:full-ready");
      root.dataset.state = root.dataset.state === "loading" ? "ready" : root.dataset.state;
    };
    viewer.changed({ images: true });
    $("#rd-load").hidden = true;
  } catch (error) {
    root.dataset.state = "error";
    notice(`The image could not be loaded: ${escape(error.message)}. <button type="button" data-act="reload">Try again</button>`, "bad");
  }
}

function wire(viewer, book, queue, page) {
  $("#rd-keys").innerHTML = shortcutHtml();
  const select = $("#rd-window");
  select.innerHTML = viewer.presets.map((p, i) => `<option value="${i}">${p.label}</option>`).join("");
  select.addEventListener("change", () => viewer.choosePreset(Number(select.value)));
  viewer.onWindowChange = (w) => {
    $("#rd-wl").textContent = `C ${Math.round(w.center)} · W ${Math.round(w.width)}`;
    select.value = String(viewer.presetIndex);
  };
  viewer.onWindowChange(viewer.window);
  viewer.onModeChange = (mode) => {
    $("#rd-mode").textContent = mode === "place" ? "Click: place" : "Click: aim";
    $("#rd-mode").setAttribute("aria-pressed", String(mode === "aim"));
  };
  viewer.onLayoutChange = (layout) => {
    $("#rd-layout").textContent = layout === "focus" ? "Three equal" : "One large";
  };
  viewer.onAnnounce = (text) => {
    $("#rd-announce").textContent = text;
  };
  const readout = (ijk, source) => {
    $("#ro-source").textContent = source;
    if (!ijk) return;
    const full = viewer.full || viewer.coarse;
    const value = full ? full.valueAt(ijk) : null;
    $("#ro-voxel").textContent = ijk.map((x) => x.toFixed(2)).join(", ");
    $("#ro-world").textContent = `${fmtMm(viewer.toWorld(ijk))} mm`;
    $("#ro-value").textContent = value === null ? "–" : String(value);
  };
  viewer.onHover = (ijk) => (ijk ? readout(ijk, "under the pointer") : readout(viewer.cursor, "crosshair"));
  viewer.onPanel = () => {
    renderPanel(book, $("#lm-list"), $("#lm-card"), (xyz) => `${fmtMm(xyz)} mm (world, RAS)`);
    const done = book.landmarks.length - book.missing().length;
    $("#rd-count").textContent = `${done} of ${book.landmarks.length} done`;
  };
  viewer.onCursor = () => readout(viewer.cursor, "crosshair");
  viewer.onCursor();
  const h = viewer.header;
  $("#ro-geometry").textContent =
    `${h.shape.join(" × ")} voxels · ${viewer.spacing.map((s) => s.toFixed(2)).join(" × ")} mm · ${h.modality}` +
    (viewer.oblique > 1 ? ` · oblique grid ${viewer.oblique.toFixed(0)}°` : "");
  $("#lm-list").addEventListener("click", (e) => {
    const row = e.target.closest("[data-index]");
    if (!row) return;
    book.select(Number(row.dataset.index));
    viewer.gotoActive();
  });
  $("#lm-card").addEventListener("click", (e) => {
    const button = e.target.closest("button");
    if (!button) return;
    if (button.dataset.confidence) viewer.book.rate(book.current.code, Number(button.dataset.confidence));
    const act = button.dataset.act;
    if (act === "place-here") viewer.placeAtCursor();
    if (act === "goto") viewer.gotoActive();
    if (act === "remove") viewer.removeActive();
    if (act === "absent") viewer.toggleAbsent();
  });
  $("#rd-mode").addEventListener("click", () => viewer.keyClickMode());
  $("#rd-layout").addEventListener("click", () => viewer.toggleLayout());
  $("#rd-reset").addEventListener("click", () => viewer.resetView());
  $("#rd-submit").addEventListener("click", () => askSubmit(page));
  viewer.onSubmitAsked = () => askSubmit(page);
  root.addEventListener("click", (e) => {
    if (e.target.closest("[data-act='reload']")) window.location.reload();
    if (e.target.closest("[data-act='dismiss-aside']")) {
      queue.discardSetAside(page.asideShown);
      $("#rd-notice").hidden = true;
    }
  });
  bindKeys(root, viewer);
  viewer.panes.axial.el.focus({ preventScroll: true });
  viewer.panes.axial.el.classList.add("is-active");
  window.addEventListener("beforeunload", (e) => {
    if (queue.pending.length) e.preventDefault();
  });
}

function showSave(state, pending) {
  const el = $("#rd-save");
  el.dataset.state = state;
  el.textContent = SAVE_TEXT[state] + (pending && state !== "saved" ? ` (${pending} waiting)` : "");
}

async function askSubmit(page) {
  const { book, queue, viewer } = page;
  if (book.locked) return;
  const missing = book.missing();
  if (missing.length) {
    notice(`Not yet complete. Place or mark not visible: ${missing.map((lm) => escape(lm.name)).join(", ")}.`, "warn");
    book.selectCode(missing[0].code);
    viewer.changed({ overlay: true, panel: true });
    return;
  }
  const dialog = $("#rd-confirm");
  dialog.returnValue = "";
  dialog.showModal();
  const choice = await new Promise((resolve) =>
    dialog.addEventListener("close", () => resolve(dialog.returnValue), { once: true }),
  );
  if (choice !== "submit") {
    viewer.escape();
    return;
  }
  showSave("saving", queue.pending.length);
  if (!(await queue.drained(15000))) {
    notice("Some changes are not saved yet (offline?). The read was not submitted; try again when saved.", "warn");
    return;
  }
  if (page.clock) await page.clock.stop();
  let result;
  try {
    result = await postJson(config.api.submit, {});
  } catch {
    notice("The network is down; the read was not submitted. Try again when it is back.", "warn");
    return;
  }
  if (result.status !== 200) {
    notice(`The read was not submitted: ${escape(result.data.error || `HTTP ${result.status}`)}`, "bad");
    return;
  }
  book.locked = true;
  root.dataset.state = "submitted";
  showSave("saved", 0);
  $("#rd-submit").disabled = true;
  notice(`Submitted. This read is now locked. <a href="${config.home}">Back to the worklist</a>`, "ok");
  viewer.changed({ overlay: true, panel: true });
}

async function resync() {
  const page = window.cairnRead;
  if (!(await page.queue.drained(15000))) return;
  try {
    const detail = await getJson(config.api.detail);
    if (page.queue.pending.length || page.queue.sending) return; // a newer change is on its way
    page.book.placements.clear();
    for (const p of detail.placements) page.book.acknowledge(p.landmark, p, false);
    page.queue.version = detail.version;
    page.viewer.changed({ overlay: true, panel: true });
  } catch {
    // The next change will retry; the notice already tells the reader.
  }
}

/** After a conflict: show the placements as the server has them (the page stays locked). */
async function showStored(page) {
  try {
    const detail = await getJson(config.api.detail);
    page.book.placements.clear();
    for (const p of detail.placements) page.book.acknowledge(p.landmark, p, false);
  } catch {
    // Offline again: the notice already says what happened; a reload shows the stored read.
  }
  page.viewer.changed({ overlay: true, panel: true });
}

/** Show a queued (not yet stored) event on the page, as after a reload. */
function replay(book, event) {
  const next = applyLocal(book.get(event.landmark), event);
  if (next) book.placements.set(event.landmark, next);
  else book.placements.delete(event.landmark);
}

function countText(n) {
  return n === 1 ? "1 unsaved action" : `${n} unsaved actions`;
}

const KIND_TEXT = { placed: "placed", moved: "moved", removed: "removed", marked_absent: "marked not visible" };

/** "placed Left orb centre, moved Midline bead" for a list of events. */
function actionList(book, events) {
  const name = (code) => (book.landmarks.find((lm) => lm.code === code) || { name: code }).name;
  return events.map((e) => `${KIND_TEXT[e.kind] || e.kind} ${name(e.landmark)}`).join(", ");
}

function announceOtherTabs(code) {
  if (!("BroadcastChannel" in window)) return;
  const channel = new BroadcastChannel(`cairn.read.${code}`);
  const warn = () =>
    notice(
      "This read is also open in another tab. Work in one tab only: changes made in the other " +
        "tab will stop this one from saving over them.",
      "warn",
    );
  channel.onmessage = (e) => {
    if (e.data === "hello") channel.postMessage("here");
    warn();
  };
  channel.postMessage("hello");
}

function escape(text) {
  return String(text).replace(/[&<>"]/g, (c) => ({ "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;" })[c]);
}

start();
