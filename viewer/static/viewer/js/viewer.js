// The viewer state (crosshair, window, layout, panes) and every action a reader can take,
// whether it comes from the mouse, the keyboard or a button. Event handlers only change
// state and mark what needs drawing; drawing happens once per animation frame.

import {
  PLANES, invertAffine, obliqueDegrees, spacingOf, voxelToSlice, voxelToWorld, worldToVoxel,
} from "./coords.js";
import { Pane } from "./panes.js";
import { buildLut } from "./render.js";
import { percentileWindow } from "./volume.js";

const PANE_ORDER = ["axial", "coronal", "sagittal"];


// Common CT windows as (centre, width) in HU (common practice; exact values vary by site).
const CT_PRESETS = [
  { id: "ct-soft", label: "Soft tissue 40/400", center: 40, width: 400 },
  { id: "ct-brain", label: "Brain 40/80", center: 40, width: 80 },
  { id: "ct-lung", label: "Lung −600/1500", center: -600, width: 1500 },
  { id: "ct-bone", label: "Bone 400/1800", center: 400, width: 1800 },
];

export class Viewer {
  constructor(root, header, book) {
    this.root = root;
    this.header = header;
    this.book = book;
    this.shape = header.shape;
    this.affine = header.affine;
    this.inverse = invertAffine(header.affine);
    this.spacing = spacingOf(header.affine);
    this.oblique = obliqueDegrees(header.affine);
    this.dtype = header.dtype;
    this.normalWorldAxis = {};
    for (const plane of PANE_ORDER) {
      const c = PLANES[plane].normal;
      const col = [0, 1, 2].map((r) => Math.abs(this.affine[r][c]));
      this.normalWorldAxis[plane] = col.indexOf(Math.max(...col));
    }
    this.cursor = this.shape.map((n) => Math.round((n - 1) / 2));
    this.full = null;
    this.coarse = null;
    this.showCrosshair = true;
    this.clickMode = "place";
    this.presets = this.makePresets();
    this.presetIndex = 0;
    this.setWindow(this.presets[0], false);
    this.stage = root.querySelector("#rd-stage");
    this.panes = {};
    for (const plane of PANE_ORDER) {
      this.panes[plane] = new Pane(this, plane, this.stage.querySelector(`.pane[data-plane="${plane}"]`));
    }
    this.activePane = "axial";
    this.dirty = { panes: new Set(PANE_ORDER), overlay: true, panel: true };
    this.frameWork = [];
    this.flushForTiming = false;
    this.onPanel = () => {};
    this.onHover = () => {};
    this.onCursor = () => {};
    this.onAnnounce = () => {};
    this.onSubmitAsked = () => {};
    this.onFirstImage = null;
    this.onWindowChange = () => {};
    this.onModeChange = () => {};
    this.onLayoutChange = () => {};
    const observer = new ResizeObserver(() => this.layoutChanged());
    for (const plane of PANE_ORDER) observer.observe(this.panes[plane].el);
    this.layoutChanged();
  }

  makePresets() {
    const h = this.header;
    const stored = { id: "stored", label: `Suggested ${fmt(h.window_center)}/${fmt(h.window_width)}`,
      center: h.window_center, width: h.window_width };
    const auto = { id: "auto", label: "Auto 1–99 %", auto: [1, 99] };
    const wide = { id: "auto-wide", label: "Auto 0.5–99.5 %", auto: [0.5, 99.5] };
    const range = { id: "range", label: "Full range", center: (h.value_min + h.value_max) / 2,
      width: Math.max(1, h.value_max - h.value_min) };
    if (h.modality === "CT") return [stored, ...CT_PRESETS, auto, range];
    return [stored, auto, wide, range];
  }

  toVoxel(xyz) {
    return worldToVoxel(this.inverse, xyz);
  }

  toWorld(ijk) {
    return voxelToWorld(this.affine, ijk);
  }

  // ---- drawing ---------------------------------------------------------------------

  changed({ panes = [], images = false, overlay = true, panel = false } = {}) {
    for (const p of images ? PANE_ORDER : panes) this.dirty.panes.add(p);
    if (overlay) this.dirty.overlay = true;
    if (panel) this.dirty.panel = true;
    if (!this.frameRequested) {
      this.frameRequested = true;
      requestAnimationFrame(() => this.frame());
    }
  }

  frame() {
    this.frameRequested = false;
    const start = performance.now();
    let drew = false;
    for (const plane of this.dirty.panes) drew = this.panes[plane].drawImage() || drew;
    const imageCount = this.dirty.panes.size;
    this.dirty.panes.clear();
    if (this.dirty.overlay) for (const plane of PANE_ORDER) this.panes[plane].drawOverlay();
    if (this.flushForTiming && imageCount) {
      // A 1x1 read-back forces the canvas to rasterise, so timings are honest.
      this.panes.axial.ictx.getImageData(0, 0, 1, 1);
    }
    this.dirty.overlay = false;
    if (this.dirty.panel) {
      this.dirty.panel = false;
      this.onPanel();
    }
    const end = performance.now();
    if (imageCount) this.frameWork.push(end - start);
    if (this.frameWork.length > 5000) this.frameWork.splice(0, 1000);
    if (drew && this.onFirstImage) {
      const cb = this.onFirstImage;
      this.onFirstImage = null;
      cb();
    }
  }

  layoutChanged() {
    let resized = false;
    for (const plane of PANE_ORDER) resized = this.panes[plane].resize() || resized;
    if (resized) this.changed({ images: true });
  }

  // ---- volumes and window --------------------------------------------------------------

  setVolume(kind, volume) {
    if (kind === "full") {
      this.full = volume;
      this.coarse = null; // one resident copy: the coarse volume is dropped after the swap
    } else {
      this.coarse = volume;
    }
    if (this.pendingAuto) this.applyPreset(this.presets[this.presetIndex]);
    this.changed({ images: true, panel: true });
    this.onCursor();
  }

  setWindow(win, redraw = true) {
    const width = Math.max(1, win.width);
    this.window = { center: win.center, width };
    this.table = buildLut(this.dtype, win.center, width);
    if (redraw) {
      this.changed({ images: true });
      this.onWindowChange(this.window);
    }
  }

  applyPreset(preset) {
    if (!preset.auto) {
      this.pendingAuto = false;
      this.setWindow(preset);
      return;
    }
    const source = this.full || this.coarse;
    if (!source) {
      this.pendingAuto = true;
      return;
    }
    this.pendingAuto = false;
    this.setWindow(percentileWindow(source.data, preset.auto[0], preset.auto[1]));
  }

  choosePreset(index) {
    this.presetIndex = ((index % this.presets.length) + this.presets.length) % this.presets.length;
    this.applyPreset(this.presets[this.presetIndex]);
  }

  /** Right-drag: horizontal changes the width, vertical the level, in proportion to width. */
  dragWindow(start, dx, dy) {
    const k = start.width / 400;
    this.setWindow({ center: start.center - dy * k, width: Math.max(1, start.width + dx * k * 2) });
  }

  // ---- crosshair and slices --------------------------------------------------------------

  clampVoxel(ijk) {
    return ijk.map((x, a) => Math.min(this.shape[a] - 1, Math.max(0, x)));
  }

  /** Move the crosshair; the two panes whose slice changed are redrawn. */
  setCursor(ijk) {
    const next = this.clampVoxel(ijk);
    const moved = PANE_ORDER.filter((plane) => {
      const a = PLANES[plane].normal;
      return Math.round(next[a]) !== Math.round(this.cursor[a]);
    });
    this.cursor = next;
    this.changed({ panes: moved });
    this.onCursor();
    this.announceSoon();
  }

  stepSlice(plane, steps) {
    const a = PLANES[plane].normal;
    const next = [...this.cursor];
    next[a] = Math.min(this.shape[a] - 1, Math.max(0, Math.round(next[a]) + steps));
    this.setActivePane(plane);
    this.setCursor(next);
  }

  setActivePane(plane) {
    if (this.activePane === plane) return;
    this.activePane = plane;
    for (const p of PANE_ORDER) this.panes[p].el.classList.toggle("is-active", p === plane);
  }

  hover(ijk) {
    this.onHover(ijk);
  }

  announceSoon() {
    clearTimeout(this.announceTimer);
    this.announceTimer = setTimeout(() => {
      const pane = this.panes[this.activePane];
      this.onAnnounce(`${PLANES[this.activePane].name} slice ${pane.depth() + 1}`);
    }, 400);
  }

  // ---- landmarks ----------------------------------------------------------------------

  placeActive(ijk) {
    if (this.book.locked) return;
    this.setCursor(ijk);
    const code = this.book.current.code;
    const xyz = this.toWorld(ijk);
    if (this.book.place(code, xyz)) {
      this.onAnnounce(`Landmark ${this.book.active + 1} placed`);
    }
  }

  previewMarker(code, ijk) {
    const p = this.book.get(code);
    if (!p) return;
    // Keep the position from before the drag, not the last preview.
    if (!this.preview || this.preview.code !== code) this.preview = { code, before: p };
    this.book.placements.set(code, { ...p, xyz: this.toWorld(ijk) });
    this.changed({ overlay: true });
  }

  /** A marker drag was cancelled: put the marker back where it was. */
  cancelMarker(code) {
    if (this.preview && this.preview.code === code) this.book.placements.set(code, this.preview.before);
    this.preview = null;
    this.changed({ overlay: true });
  }

  commitMarker(code, ijk) {
    const before = this.preview && this.preview.code === code ? this.preview.before : this.book.get(code);
    this.preview = null;
    this.book.placements.set(code, before);
    this.book.change(code, { ...before, state: "placed", xyz: this.toWorld(ijk) });
    this.setCursor(ijk);
  }

  placeAtCursor() {
    this.placeActive([...this.cursor]);
  }

  gotoActive() {
    const p = this.book.get(this.book.current.code);
    if (!p || p.state !== "placed") return;
    const ijk = this.toVoxel(p.xyz);
    this.setCursor(ijk);
    // Bring the point into view in every pane: a fitted pane shows the whole slice; a
    // zoomed one keeps its zoom and is centred on the point.
    for (const plane of PANE_ORDER) {
      const pane = this.panes[plane];
      pane.centre = pane.zoom > 1 ? voxelToSlice(plane, this.shape, this.clampVoxel(ijk)) : null;
    }
    this.changed({ images: true });
  }

  removeActive() {
    this.book.remove(this.book.current.code);
  }

  toggleAbsent() {
    this.book.toggleAbsent(this.book.current.code);
  }

  undo() {
    this.book.undo();
  }

  redo() {
    this.book.redo();
  }

  // ---- keyboard actions --------------------------------------------------------------------

  keySlice(e) {
    const plane = this.activePane;
    const n = this.shape[PLANES[plane].normal];
    const steps = { ArrowUp: 1, ArrowDown: -1, PageUp: 10, PageDown: -10, Home: -n, End: n }[e.key];
    this.stepSlice(plane, steps);
  }

  keyNextPane() {
    const next = PANE_ORDER[(PANE_ORDER.indexOf(this.activePane) + 1) % 3];
    this.panes[next].el.focus();
    this.setActivePane(next);
  }

  keyNudge(e) {
    const p = PLANES[this.activePane];
    const step = e.shiftKey ? 10 : 1;
    const key = e.key.toLowerCase();
    const next = [...this.cursor];
    // Screen left/right runs against u's voxel axis, screen up/down against v's.
    if (key === "j") next[p.uAxis] += step;
    if (key === "l") next[p.uAxis] -= step;
    if (key === "i") next[p.vAxis] += step;
    if (key === "k") next[p.vAxis] -= step;
    this.setCursor(next);
  }

  keyZoom(e) {
    const factor = e.key === "+" || e.key === "=" ? 1.25 : 1 / 1.25;
    this.panes[this.activePane].zoomAtCursor(factor);
  }

  keyWindow(e) {
    this.choosePreset(this.presetIndex + (e.shiftKey ? -1 : 1));
  }

  keyClickMode() {
    this.clickMode = this.clickMode === "place" ? "aim" : "place";
    this.onModeChange(this.clickMode);
  }

  keyLandmark(e) {
    if (e.key.toLowerCase() === "n") this.book.next();
    else this.book.previous();
    this.onAnnounce(`Landmark ${this.book.active + 1}: ${this.book.current.name}`);
  }

  keyConfidence(e) {
    this.book.rate(this.book.current.code, Number(e.key));
  }

  resetView() {
    for (const plane of PANE_ORDER) this.panes[plane].resetView();
    this.choosePreset(0);
    this.changed({ images: true });
  }

  toggleLayout() {
    const even = this.stage.dataset.layout === "focus";
    this.stage.dataset.layout = even ? "even" : "focus";
    this.onLayoutChange(this.stage.dataset.layout);
    this.layoutChanged();
  }

  setMain(plane) {
    this.stage.dataset.main = plane;
    this.stage.dataset.layout = "focus";
    this.onLayoutChange("focus");
    this.layoutChanged();
  }

  askSubmit() {
    this.onSubmitAsked();
  }

  escape() {
    const main = this.stage.dataset.main;
    this.panes[main].el.focus();
    this.setActivePane(main);
  }

  /** Geometry of one pane for tests and measurements (CSS px relative to the pane). */
  describePane(plane) {
    const pane = this.panes[plane];
    const g = pane.geometry();
    return { plane, depth: pane.depth(), w: g.w, h: g.h, rect: g.rect, size: pane.size, zoom: pane.zoom };
  }
}

function fmt(x) {
  return Math.abs(x) >= 100 ? Math.round(x) : Math.round(x * 10) / 10;
}

export { PANE_ORDER };
