// One pane per plane: an image canvas, an overlay canvas above it (crosshair, markers,
// orientation letters, scale bar) and the pointer handling that turns clicks and drags into
// viewer actions. Screen <-> slice <-> voxel mapping lives in coords.js.

import { PLANES, niceLength, paneTransform, planeLetters, sliceToVoxel, voxelToSlice, voxelToWorld } from "./coords.js";
import { PaneRaster } from "./render.js";

const HIT_PX = 9;
const FAINT_MM = 4; // markers within this distance of the slice are drawn faint
const CLICK_SLOP_PX = 4;

export class Pane {
  constructor(viewer, plane, el) {
    this.viewer = viewer;
    this.plane = plane;
    this.p = PLANES[plane];
    this.el = el;
    this.imageCanvas = el.querySelector("canvas.pane-image");
    this.overlayCanvas = el.querySelector("canvas.pane-overlay");
    this.caption = el.querySelector(".pane-caption");
    this.ictx = this.imageCanvas.getContext("2d", { alpha: false });
    this.raster = new PaneRaster(this.ictx);
    this.octx = this.overlayCanvas.getContext("2d");
    this.zoom = 1;
    this.centre = null; // slice coordinates at the pane centre; null = middle of the slice
    this.size = { width: 1, height: 1 };
    this.dpr = 1;
    this.drag = null;
    this.wheelRest = 0;
    this.bind();
  }

  /** Slice size, voxel sizes and the current screen transform (CSS px). */
  geometry() {
    const shape = this.viewer.shape;
    const w = shape[this.p.uAxis];
    const h = shape[this.p.vAxis];
    const su = this.viewer.spacing[this.p.uAxis];
    const sv = this.viewer.spacing[this.p.vAxis];
    const centre = this.centre || [(w - 1) / 2, (h - 1) / 2];
    const t = paneTransform(this.size, w, h, su, sv, this.zoom, centre);
    const [x0, y0] = t.toScreen(-0.5, -0.5);
    const [x1, y1] = t.toScreen(w - 0.5, h - 0.5);
    return { w, h, su, sv, centre, t, rect: { x: x0, y: y0, width: x1 - x0, height: y1 - y0 } };
  }

  depth() {
    const n = this.viewer.shape[this.p.normal];
    return Math.min(n - 1, Math.max(0, Math.round(this.viewer.cursor[this.p.normal])));
  }

  resize() {
    // The canvases fill the pane inside its border (clientWidth/Height: whole CSS px).
    const dpr = window.devicePixelRatio || 1;
    const width = Math.max(1, this.el.clientWidth);
    const height = Math.max(1, this.el.clientHeight);
    if (width === this.size.width && height === this.size.height && dpr === this.dpr) return false;
    this.size = { width, height };
    this.dpr = dpr;
    for (const c of [this.imageCanvas, this.overlayCanvas]) {
      c.width = Math.round(width * dpr);
      c.height = Math.round(height * dpr);
      c.style.width = `${width}px`;
      c.style.height = `${height}px`;
    }
    return true;
  }

  /** Draw the slice picture (skipped when slice, window and view are unchanged). */
  drawImage() {
    const v = this.viewer;
    const source = v.full || v.coarse;
    if (!source) {
      this.ictx.fillStyle = "#101214";
      this.ictx.fillRect(0, 0, this.imageCanvas.width, this.imageCanvas.height);
      return false;
    }
    const g = this.geometry();
    const key = `${this.zoom}|${g.centre[0]}|${g.centre[1]}`;
    this.raster.draw(source, v.shape, this.plane, this.depth(), v.window, v.table, g.t,
      this.size, this.dpr, key);
    return true;
  }

  /** Markers of placed landmarks near this slice: [{code, x, y, full, distanceMm}]. */
  markers(g = this.geometry()) {
    const v = this.viewer;
    const out = [];
    const depth = this.depth();
    for (const lm of v.book.landmarks) {
      const p = v.book.get(lm.code);
      if (!p || p.state !== "placed") continue;
      const ijk = v.toVoxel(p.xyz);
      const offVox = Math.abs(ijk[this.p.normal] - depth);
      const distanceMm = offVox * v.spacing[this.p.normal];
      const full = offVox <= 0.5 + 1e-9;
      if (!full && distanceMm > FAINT_MM) continue;
      const [u, s] = voxelToSlice(this.plane, v.shape, ijk);
      const [x, y] = g.t.toScreen(u, s);
      out.push({ code: lm.code, x, y, full, distanceMm });
    }
    return out;
  }

  drawOverlay() {
    const v = this.viewer;
    const ctx = this.octx;
    ctx.setTransform(this.dpr, 0, 0, this.dpr, 0, 0);
    ctx.clearRect(0, 0, this.size.width, this.size.height);
    const g = this.geometry();
    if (v.showCrosshair) this.drawCrosshair(ctx, g);
    for (const m of this.markers(g)) this.drawMarker(ctx, m);
    this.drawLetters(ctx);
    this.drawScaleBar(ctx, g);
    this.updateCaption();
  }

  drawCrosshair(ctx, g) {
    const [u, s] = voxelToSlice(this.plane, this.viewer.shape, this.viewer.cursor);
    const [x, y] = g.t.toScreen(u, s);
    const gap = 10;
    ctx.save();
    ctx.strokeStyle = "rgba(214, 209, 196, 0.55)";
    ctx.lineWidth = 1;
    ctx.beginPath();
    const X = Math.round(x) + 0.5;
    const Y = Math.round(y) + 0.5;
    ctx.moveTo(0, Y);
    ctx.lineTo(X - gap, Y);
    ctx.moveTo(X + gap, Y);
    ctx.lineTo(this.size.width, Y);
    ctx.moveTo(X, 0);
    ctx.lineTo(X, Y - gap);
    ctx.moveTo(X, Y + gap);
    ctx.lineTo(X, this.size.height);
    ctx.stroke();
    ctx.restore();
  }

  drawMarker(ctx, m) {
    const book = this.viewer.book;
    const colour = book.colourOf(m.code);
    const active = book.current.code === m.code;
    const r = active ? 6.5 : 5;
    ctx.save();
    ctx.globalAlpha = m.full ? 1 : 0.55;
    ctx.lineWidth = 4;
    ctx.strokeStyle = "rgba(255,255,255,0.8)";
    ctx.beginPath();
    ctx.arc(m.x, m.y, r + 1.5, 0, 2 * Math.PI);
    ctx.stroke();
    ctx.lineWidth = 2;
    ctx.strokeStyle = "#000";
    ctx.beginPath();
    ctx.arc(m.x, m.y, r, 0, 2 * Math.PI);
    if (m.full) {
      ctx.fillStyle = colour;
      ctx.fill();
    } else {
      ctx.setLineDash([3, 2]);
    }
    ctx.stroke();
    if (!m.full) {
      ctx.setLineDash([]);
      ctx.strokeStyle = colour;
      ctx.lineWidth = 1.5;
      ctx.beginPath();
      ctx.arc(m.x, m.y, r - 1.5, 0, 2 * Math.PI);
      ctx.stroke();
    }
    if (active) {
      // The active landmark: a square frame with ticks, so it differs by shape, not colour only.
      ctx.setLineDash([]);
      ctx.lineWidth = 2;
      ctx.strokeStyle = "#000";
      ctx.strokeRect(m.x - r - 5, m.y - r - 5, 2 * r + 10, 2 * r + 10);
      ctx.strokeStyle = colour;
      ctx.lineWidth = 1;
      ctx.strokeRect(m.x - r - 5, m.y - r - 5, 2 * r + 10, 2 * r + 10);
    }
    ctx.font = "bold 12px system-ui, sans-serif";
    ctx.lineWidth = 3;
    ctx.strokeStyle = "#000";
    const label = String(book.numberOf(m.code));
    ctx.strokeText(label, m.x + r + 6, m.y - r - 3);
    ctx.fillStyle = "#fff";
    ctx.fillText(label, m.x + r + 6, m.y - r - 3);
    ctx.restore();
  }

  drawLetters(ctx) {
    const letters = planeLetters(this.plane, this.viewer.affine);
    const { width, height } = this.size;
    ctx.save();
    ctx.font = "600 13px system-ui, sans-serif";
    ctx.textBaseline = "middle";
    ctx.textAlign = "center";
    ctx.lineWidth = 3;
    ctx.strokeStyle = "rgba(0,0,0,0.85)";
    ctx.fillStyle = "#e8e4da";
    const spots = [
      [letters.left, 12, height / 2],
      [letters.right, width - 12, height / 2],
      [letters.top, width / 2, 30], // below the caption line
      [letters.bottom, width / 2, height - 12],
    ];
    for (const [text, x, y] of spots) {
      ctx.strokeText(text, x, y);
      ctx.fillText(text, x, y);
    }
    ctx.restore();
  }

  drawScaleBar(ctx, g) {
    const mm = niceLength((this.size.width * 0.22) / g.t.pxPerMm);
    const px = mm * g.t.pxPerMm;
    const x = 14;
    const y = this.size.height - 14;
    ctx.save();
    ctx.lineWidth = 4;
    ctx.strokeStyle = "rgba(0,0,0,0.8)";
    ctx.beginPath();
    ctx.moveTo(x, y);
    ctx.lineTo(x + px, y);
    ctx.stroke();
    ctx.lineWidth = 2;
    ctx.strokeStyle = "#e8e4da";
    ctx.beginPath();
    ctx.moveTo(x, y - 4);
    ctx.lineTo(x, y);
    ctx.lineTo(x + px, y);
    ctx.lineTo(x + px, y - 4);
    ctx.stroke();
    ctx.font = "11px system-ui, sans-serif";
    ctx.lineWidth = 3;
    ctx.strokeStyle = "#000";
    ctx.fillStyle = "#e8e4da";
    ctx.strokeText(`${mm} mm`, x, y - 9);
    ctx.fillText(`${mm} mm`, x, y - 9);
    ctx.restore();
    // The bar as text too (assistive technology and tests): its length in mm and CSS px.
    const scale = `${mm} mm = ${px.toFixed(2)} px`;
    if (this.el.dataset.scale !== scale) this.el.dataset.scale = scale;
  }

  updateCaption() {
    const v = this.viewer;
    const depth = this.depth();
    const n = v.shape[this.p.normal];
    const world = voxelToWorld(v.affine, v.cursor);
    const axis = v.normalWorldAxis[this.plane];
    const text = `${this.p.name} · slice ${depth + 1}/${n} · ${"xyz"[axis]} ${world[axis].toFixed(1)} mm`;
    if (this.caption.textContent !== text) {
      this.caption.textContent = text;
      this.el.dataset.slice = String(depth);
      this.el.setAttribute("aria-label", `${this.p.name} pane, slice ${depth + 1} of ${n}`);
    }
  }

  /** Continuous canonical voxel under CSS point (x, y) of this pane, or null off the image. */
  voxelAt(x, y, g = this.geometry()) {
    const [u, s] = g.t.toSlice(x, y);
    if (u < -0.5 || s < -0.5 || u > g.w - 0.5 || s > g.h - 0.5) return null;
    return sliceToVoxel(this.plane, this.viewer.shape, u, s, this.depth());
  }

  hitMarker(x, y) {
    let best = null;
    for (const m of this.markers()) {
      const d = Math.hypot(m.x - x, m.y - y);
      if (d <= HIT_PX && (!best || d < best.d)) best = { ...m, d };
    }
    return best;
  }

  bind() {
    const el = this.el;
    el.addEventListener("contextmenu", (e) => e.preventDefault());
    el.addEventListener("pointerdown", (e) => this.onDown(e));
    el.addEventListener("pointermove", (e) => this.onMove(e));
    el.addEventListener("pointerup", (e) => this.onUp(e));
    el.addEventListener("pointercancel", () => {
      if (this.drag && this.drag.kind === "marker") this.viewer.cancelMarker(this.drag.code);
      this.drag = null;
    });
    el.addEventListener("pointerleave", () => this.viewer.hover(null));
    el.addEventListener("wheel", (e) => this.onWheel(e), { passive: false });
    el.addEventListener("click", (e) => this.onClick(e));
    el.addEventListener("dblclick", (e) => {
      // A double-click makes this the large pane; its second click places nothing (onClick).
      e.preventDefault();
      this.viewer.setMain(this.plane);
    });
    el.addEventListener("focus", () => this.viewer.setActivePane(this.plane));
  }

  point(e) {
    const r = this.overlayCanvas.getBoundingClientRect();
    return [e.clientX - r.left, e.clientY - r.top];
  }

  onDown(e) {
    const v = this.viewer;
    const [x, y] = this.point(e);
    focusWithoutScroll(this.el);
    this.el.setPointerCapture(e.pointerId);
    this.pressed = null;
    const base = { x0: x, y0: y, x, y, moved: false };
    if (e.button === 2) {
      this.drag = { ...base, kind: "window", start: { ...v.window } };
    } else if (e.button === 1 || (e.button === 0 && e.shiftKey)) {
      this.drag = { ...base, kind: "pan", centre: [...this.geometry().centre] };
    } else if (e.button === 0) {
      const hit = v.book.locked ? null : this.hitMarker(x, y);
      if (hit) {
        v.book.selectCode(hit.code);
        this.drag = { ...base, kind: "marker", code: hit.code, ijk: null };
        v.changed({ panel: true, overlay: true });
      } else {
        this.drag = { ...base, kind: v.clickMode === "aim" || v.book.locked ? "aim" : "press" };
        if (this.drag.kind === "aim") this.aim(x, y);
      }
    }
    e.preventDefault();
  }

  aim(x, y) {
    const ijk = this.voxelAt(x, y);
    if (ijk) this.viewer.setCursor(ijk);
  }

  onMove(e) {
    const [x, y] = this.point(e);
    this.viewer.hover(this.voxelAt(x, y));
    const d = this.drag;
    if (!d) return;
    d.x = x;
    d.y = y;
    if (Math.hypot(x - d.x0, y - d.y0) > CLICK_SLOP_PX) d.moved = true;
    if (d.kind === "press" && d.moved) d.kind = "aim";
    if (d.kind === "aim") this.aim(x, y);
    else if (d.kind === "pan") this.pan(d, x, y);
    else if (d.kind === "window") this.viewer.dragWindow(d.start, x - d.x0, y - d.y0);
    else if (d.kind === "marker" && d.moved) {
      const ijk = this.voxelAt(x, y);
      if (ijk) {
        d.ijk = ijk;
        this.viewer.previewMarker(d.code, ijk);
      }
    }
  }

  pan(d, x, y) {
    const g = this.geometry();
    this.centre = [d.centre[0] - (x - d.x0) / g.t.kx, d.centre[1] - (y - d.y0) / g.t.ky];
    this.viewer.changed({ panes: [this.plane] });
  }

  onUp(e) {
    const d = this.drag;
    this.drag = null;
    if (!d) return;
    const [x, y] = this.point(e);
    if (d.kind === "press") {
      // Placed by the click event that follows, which knows the click count.
      this.pressed = { ijk: this.voxelAt(x, y), x, y };
    } else if (d.kind === "marker") {
      if (d.moved && d.ijk) this.viewer.commitMarker(d.code, d.ijk);
      else this.viewer.cancelMarker(d.code);
    }
  }

  /**
   * A plain click in place mode places the active landmark at once (the event is sent
   * straight away); the second click of a double (or triple) click places nothing.
   */
  onClick(e) {
    const pressed = this.pressed;
    this.pressed = null;
    if (!pressed || e.button !== 0 || e.detail > 1) return;
    if (pressed.ijk) this.viewer.placeActive(pressed.ijk);
  }

  onWheel(e) {
    e.preventDefault();
    const [x, y] = this.point(e);
    if (e.ctrlKey) {
      this.zoomAt(x, y, e.deltaY < 0 ? 1.15 : 1 / 1.15);
      return;
    }
    const perStep = e.deltaMode === 1 ? 1 : e.deltaMode === 2 ? 0.1 : 100;
    this.wheelRest += e.deltaY;
    const steps = Math.trunc(this.wheelRest / perStep);
    if (steps !== 0) {
      this.wheelRest -= steps * perStep;
      this.viewer.stepSlice(this.plane, steps);
    }
  }

  /** Zoom by `factor` keeping the slice point under (x, y) fixed. */
  zoomAt(x, y, factor) {
    const g = this.geometry();
    const [u, s] = g.t.toSlice(x, y);
    const zoom = Math.min(40, Math.max(0.5, this.zoom * factor));
    const k = zoom / this.zoom;
    this.zoom = zoom;
    this.centre = [u - (u - g.centre[0]) / k, s - (s - g.centre[1]) / k];
    this.viewer.changed({ panes: [this.plane] });
  }

  /** Zoom about the crosshair (keyboard). */
  zoomAtCursor(factor) {
    const g = this.geometry();
    const [u, s] = voxelToSlice(this.plane, this.viewer.shape, this.viewer.cursor);
    const [x, y] = g.t.toScreen(u, s);
    this.zoomAt(x, y, factor);
  }

  resetView() {
    this.zoom = 1;
    this.centre = null;
  }
}

function focusWithoutScroll(el) {
  if (document.activeElement !== el) el.focus({ preventScroll: true });
}
