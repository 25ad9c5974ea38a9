// The review page: the reading page's viewer in a review mode. Every reader's point and the
// consensus are drawn as fixed markers; a click places the adjudicator's new point, which
// fills the decision form (the form itself is plain HTML and works without this script).

import { getJson } from "./api.js";
import { bindKeys } from "./keys.js";
import { LandmarkBook } from "./landmarks.js";
import { Viewer } from "./viewer.js";
import { Volume, fetchVoxels } from "./volume.js";

const NEW = "new";
const CONSENSUS = "consensus";
const config = JSON.parse(document.getElementById("review-config").textContent);
const root = document.getElementById("reader-app");
const $ = (sel) => root.querySelector(sel);

function notice(text) {
  const el = $("#rd-notice");
  el.textContent = text;
  el.dataset.kind = "bad";
  el.hidden = false;
}

/** The review points as a landmark book: one entry per reader, the consensus, the new point. */
function reviewBook(detail, onNewPoint) {
  const entries = [];
  const fixed = new Map();
  detail.readers.forEach((r, i) => {
    const code = `read:${r.read}`;
    entries.push({ code, name: r.reader, description: "", may_be_absent: false, order: i });
    if (r.state === "placed") fixed.set(code, { state: "placed", xyz: [r.x_mm, r.y_mm, r.z_mm], confidence: null });
  });
  const c = detail.consensus;
  entries.push({ code: CONSENSUS, name: "Consensus", description: "", may_be_absent: false, order: entries.length });
  if (c && c.x_mm !== null) fixed.set(CONSENSUS, { state: "placed", xyz: [c.x_mm, c.y_mm, c.z_mm], confidence: null });
  entries.push({ code: NEW, name: "New point", description: "", may_be_absent: false, order: entries.length });
  const placements = [...fixed].map(([code, p]) => ({ landmark: code, state: "placed", x_mm: p.xyz[0], y_mm: p.xyz[1], z_mm: p.xyz[2], confidence: null }));
  let viewer = null;
  const book = new LandmarkBook(entries, placements, (event) => {
    if (event.landmark === NEW) {
      onNewPoint(event.kind === "removed" ? null : [event.x_mm, event.y_mm, event.z_mm]);
      return;
    }
    // Readers' points and the consensus are evidence, not editable: put a dragged one back.
    book.placements.set(event.landmark, fixed.get(event.landmark));
    queueMicrotask(() => viewer && viewer.changed({ overlay: true }));
  }, () => viewer && viewer.changed({ overlay: true }));
  book.selectCode(NEW);
  return { book, attach: (v) => (viewer = v) };
}

function fillForm(xyz) {
  const inputs = ["#rv-x", "#rv-y", "#rv-z"].map((sel) => $(sel));
  inputs.forEach((input, a) => (input.value = xyz ? xyz[a].toFixed(3) : ""));
  if (xyz) $("#rv-new").checked = true;
}

async function loadVolumes(viewer, header) {
  const text = $("#rd-load-text");
  const count = (shape) => shape.reduce((a, b) => a * b, 1);
  const coarse = await fetchVoxels(header.coarse_url, header.dtype, count(header.coarse_shape));
  viewer.setVolume("coarse", new Volume(coarse, header.coarse_shape, 2));
  text.textContent = "Preview; loading full resolution…";
  const full = await fetchVoxels(header.url, header.dtype, count(header.shape), {
    onProgress: (received, total) => ($("#rd-progress").value = received / total),
  });
  viewer.setVolume("full", new Volume(full, header.shape, 1));
  viewer.onFirstImage = () => {
    performance.mark("viewer:full-ready");
    root.dataset.state = "ready";
  };
  viewer.changed({ images: true });
  $("#rd-load").hidden = true;
}

function focusOn(viewer, xyz) {
  if (!xyz) return;
  viewer.setCursor(viewer.toVoxel(xyz));
  viewer.changed({ images: true });
}

async function start() {
  let detail;
  try {
    detail = await getJson(config.api.detail);
  } catch (error) {
    root.dataset.state = "error";
    notice(`This review could not be opened: ${error.message}`);
    return;
  }
  const { book, attach } = reviewBook(detail, fillForm);
  const viewer = new Viewer(root, detail.volume, book);
  attach(viewer);
  bindKeys(root, viewer);
  window.cairnReview = { detail, viewer, book };
  const select = $("#rd-window");
  select.innerHTML = viewer.presets.map((p, i) => `<option value="${i}">${p.label}</option>`).join("");
  select.addEventListener("change", () => viewer.choosePreset(Number(select.value)));
  $("#rd-reset").addEventListener("click", () => viewer.resetView());
  const c = detail.consensus;
  const first = detail.readers.find((r) => r.state === "placed");
  focusOn(viewer, c && c.x_mm !== null ? [c.x_mm, c.y_mm, c.z_mm] : first && [first.x_mm, first.y_mm, first.z_mm]);
  $("#rv-points").addEventListener("click", (e) => {
    const row = e.target.closest("tr[data-point]");
    if (!row || e.target.tagName === "INPUT") return;
    const radio = row.querySelector("input[type=radio]");
    const code = radio.value.startsWith("read:") ? radio.value : radio.value === "new_point" ? NEW : CONSENSUS;
    const p = book.get(code);
    if (p) focusOn(viewer, p.xyz);
  });
  try {
    await loadVolumes(viewer, detail.volume);
  } catch (error) {
    root.dataset.state = "error";
    notice(`The image could not be loaded: ${error.message}. The decision form still works.`);
  }
}

start();
