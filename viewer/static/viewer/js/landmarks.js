// The landmark protocol of a read: current placements, the active landmark, undo / redo
// (a stack of commands with before / after states, never snapshots of everything), the
// side panel listing the landmarks, and the marker style.
//
// Marker colours: the Okabe & Ito colour-universal-design palette (bright ones first, black
// left out), always drawn with a dark outline and a light halo so they read on any grey;
// each marker also carries its number, and the active landmark differs by shape.

export const MARKER_COLOURS = ["#E69F00", "#56B4E9", "#F0E442", "#009E73", "#D55E00", "#CC79A7", "#0072B2"];

/** The event that turns placement `before` into `after` (null: nothing to send). */
export function eventFor(code, before, after) {
  if (!after) {
    return before ? { landmark: code, kind: "removed" } : null;
  }
  if (after.state === "absent") {
    return { landmark: code, kind: "marked_absent", confidence: after.confidence ?? null };
  }
  const [x, y, z] = after.xyz;
  return {
    landmark: code,
    kind: before && before.state === "placed" ? "moved" : "placed",
    x_mm: x,
    y_mm: y,
    z_mm: z,
    confidence: after.confidence ?? null,
  };
}

/** A placement as the API gives it, in our local form. */
export function fromPayload(p) {
  if (!p) return null;
  if (p.state === "absent") return { state: "absent", confidence: p.confidence };
  return { state: "placed", xyz: [p.x_mm, p.y_mm, p.z_mm], confidence: p.confidence };
}

/** What a queued (not yet stored) event does to a placement: for replaying after reload. */
export function applyLocal(before, event) {
  if (event.kind === "removed") return null;
  if (event.kind === "marked_absent") return { state: "absent", confidence: event.confidence ?? null };
  const confidence = event.confidence ?? (event.kind === "moved" && before ? before.confidence : null);
  return { state: "placed", xyz: [event.x_mm, event.y_mm, event.z_mm], confidence };
}

export class LandmarkBook {
  /** `send(event)` queues an event; `onChange()` redraws whatever shows placements. */
  constructor(landmarks, placements, send, onChange) {
    this.landmarks = [...landmarks].sort((a, b) => a.order - b.order);
    this.placements = new Map();
    for (const p of placements) this.placements.set(p.landmark, fromPayload(p));
    this.send = send;
    this.onChange = onChange;
    this.undoStack = [];
    this.redoStack = [];
    this.active = 0;
    this.locked = false;
    const firstOpen = this.landmarks.findIndex((lm) => !this.placements.get(lm.code));
    if (firstOpen >= 0) this.active = firstOpen;
  }

  get current() {
    return this.landmarks[this.active];
  }

  colourOf(code) {
    const index = this.landmarks.findIndex((lm) => lm.code === code);
    return MARKER_COLOURS[index % MARKER_COLOURS.length];
  }

  numberOf(code) {
    return this.landmarks.findIndex((lm) => lm.code === code) + 1;
  }

  get(code) {
    return this.placements.get(code) || null;
  }

  select(index) {
    const n = this.landmarks.length;
    this.active = ((index % n) + n) % n;
    this.onChange();
  }

  next() {
    this.select(this.active + 1);
  }

  previous() {
    this.select(this.active - 1);
  }

  /** Landmarks neither placed nor marked not visible. */
  missing() {
    return this.landmarks.filter((lm) => !this.placements.get(lm.code));
  }

  /** Change one landmark's placement as a reader action (undoable); sends its event. */
  change(code, after, { fromHistory = false } = {}) {
    if (this.locked) return false;
    const before = this.get(code);
    const event = eventFor(code, before, after);
    if (!event) return false;
    if (after) this.placements.set(code, after);
    else this.placements.delete(code);
    if (!fromHistory) {
      this.undoStack.push({ code, before, after });
      this.redoStack.length = 0;
    }
    this.send(event);
    this.onChange();
    return true;
  }

  place(code, xyz) {
    const before = this.get(code);
    const confidence = before && before.state === "placed" ? before.confidence : null;
    return this.change(code, { state: "placed", xyz, confidence });
  }

  remove(code) {
    return this.change(code, null);
  }

  toggleAbsent(code) {
    const lm = this.landmarks.find((l) => l.code === code);
    if (!lm || !lm.may_be_absent) return false;
    const before = this.get(code);
    if (before && before.state === "absent") return this.change(code, null);
    return this.change(code, { state: "absent", confidence: before ? before.confidence : null });
  }

  rate(code, confidence) {
    const before = this.get(code);
    if (!before || before.confidence === confidence) return false;
    return this.change(code, { ...before, confidence });
  }

  undo() {
    const command = this.undoStack.pop();
    if (!command || this.locked) return false;
    this.redoStack.push(command);
    this.selectCode(command.code);
    return this.change(command.code, command.before, { fromHistory: true });
  }

  redo() {
    const command = this.redoStack.pop();
    if (!command || this.locked) return false;
    this.undoStack.push(command);
    this.selectCode(command.code);
    return this.change(command.code, command.after, { fromHistory: true });
  }

  selectCode(code) {
    const index = this.landmarks.findIndex((lm) => lm.code === code);
    if (index >= 0) this.active = index;
  }

  /** Take the server's placement after an event was stored (the server is the truth). */
  acknowledge(code, payload, stillPending) {
    if (stillPending) return;
    const local = fromPayload(payload);
    if (local) this.placements.set(code, local);
    else this.placements.delete(code);
    this.onChange();
  }
}

const escapeHtml = (text) =>
  String(text).replace(/[&<>"']/g, (c) => ({ "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" })[c]);

/** Short status text of a placement. */
export function statusText(placement) {
  if (!placement) return "to do";
  const conf = placement.confidence ? ` · confidence ${placement.confidence}` : "";
  return placement.state === "absent" ? `not visible${conf}` : `placed${conf}`;
}

/**
 * Render the landmark list (every landmark with its description on a second, smaller line)
 * and the active landmark's card (where it is, its actions, confidence) into `listEl` and
 * `cardEl`.
 */
export function renderPanel(book, listEl, cardEl, worldText) {
  listEl.innerHTML = book.landmarks
    .map((lm, index) => {
      const p = book.get(lm.code);
      const state = p ? p.state : "todo";
      const current = index === book.active ? ' aria-current="true"' : "";
      const about = lm.description
        ? `<span class="lm-about" data-testid="lm-description">${escapeHtml(lm.description)}</span>`
        : "";
      return `<li><button type="button" class="lm-row lm-${state}" data-index="${index}"${current}>
        <span class="lm-badge" style="--lm-colour:${book.colourOf(lm.code)}">${index + 1}</span>
        <span class="lm-name">${escapeHtml(lm.name)} <small>${escapeHtml(lm.code)}</small></span>
        <span class="lm-state">${statusText(p)}</span>${about}</button></li>`;
    })
    .join("");
  const lm = book.current;
  const p = book.get(lm.code);
  const where = p && p.state === "placed" ? worldText(p.xyz) : statusText(p);
  const conf = [1, 2, 3]
    .map((c) => {
      const on = p && p.confidence === c ? ' aria-pressed="true"' : ' aria-pressed="false"';
      const disabled = p && !book.locked ? "" : " disabled";
      return `<button type="button" class="conf" data-confidence="${c}"${on}${disabled}>${c}</button>`;
    })
    .join("");
  const off = book.locked ? " disabled" : "";
  cardEl.innerHTML = `
    <h3><span class="lm-badge" style="--lm-colour:${book.colourOf(lm.code)}">${book.active + 1}</span>
      ${escapeHtml(lm.name)}</h3>
    <p class="lm-where" data-testid="active-where">${escapeHtml(where)}</p>
    <div class="lm-actions">
      <button type="button" data-act="place-here"${off}>Place at crosshair</button>
      <button type="button" data-act="goto"${p && p.state === "placed" ? "" : " disabled"}>Go to point</button>
      <button type="button" data-act="remove"${p && !book.locked ? "" : " disabled"}>Remove</button>
      ${lm.may_be_absent ? `<button type="button" data-act="absent"${off}
        aria-pressed="${p && p.state === "absent"}">Not visible</button>` : ""}
    </div>
    <div class="lm-conf" role="group" aria-label="Confidence">Confidence ${conf}
      <small>(1 unsure, 3 sure)</small></div>`;
}
