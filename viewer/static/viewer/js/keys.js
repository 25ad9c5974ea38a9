// The keyboard: one table of shortcuts, used both to dispatch keys and to list them on the
// page. Keys act only while focus is inside the reading page (a pane or the side panel),
// never in a text field, and browser shortcuts (Ctrl+W, Ctrl+T, F5, ...) are left alone.

/**
 * Each entry: `keys` (shown), `match(e)` (does this keydown belong to it), `action`
 * (a method name on the viewer, called with the event), `group` and `label`.
 */
export const SHORTCUTS = [
  { group: "Slices", keys: ["↑", "↓"], label: "next / previous slice in the active pane",
    match: (e) => !e.ctrlKey && !e.metaKey && (e.key === "ArrowUp" || e.key === "ArrowDown"),
    action: "keySlice" },
  { group: "Slices", keys: ["PgUp", "PgDn"], label: "ten slices up / down",
    match: (e) => e.key === "PageUp" || e.key === "PageDown", action: "keySlice" },
  { group: "Slices", keys: ["Home", "End"], label: "first / last slice",
    match: (e) => e.key === "Home" || e.key === "End", action: "keySlice" },
  { group: "Slices", keys: ["O"], label: "make the next pane active",
    match: (e) => plain(e) && lower(e) === "o", action: "keyNextPane" },
  { group: "Crosshair", keys: ["J", "L", "I", "K"], label: "move crosshair left / right / up / down (Shift: 10 voxels)",
    match: (e) => !e.ctrlKey && !e.metaKey && !e.altKey && ["j", "l", "i", "k"].includes(lower(e)),
    action: "keyNudge" },
  { group: "Crosshair", keys: ["C"], label: "switch click between placing and aiming",
    match: (e) => plain(e) && lower(e) === "c", action: "keyClickMode" },
  { group: "View", keys: ["+", "−"], label: "zoom in / out at the crosshair",
    match: (e) => !e.ctrlKey && !e.metaKey && ["+", "=", "-", "_"].includes(e.key), action: "keyZoom" },
  { group: "View", keys: ["W"], label: "next window preset (Shift: previous)",
    match: (e) => !e.ctrlKey && !e.metaKey && !e.altKey && lower(e) === "w", action: "keyWindow" },
  { group: "View", keys: ["R"], label: "reset zoom, pan and window",
    match: (e) => plain(e) && lower(e) === "r", action: "resetView" },
  { group: "View", keys: ["T"], label: "one large pane / three equal panes",
    match: (e) => plain(e) && lower(e) === "t", action: "toggleLayout" },
  { group: "Landmarks", keys: ["N", "P"], label: "next / previous landmark",
    match: (e) => plain(e) && (lower(e) === "n" || lower(e) === "p"), action: "keyLandmark" },
  { group: "Landmarks", keys: ["Enter"], label: "place the active landmark at the crosshair",
    match: (e) => e.key === "Enter" && !e.ctrlKey && !e.metaKey && !e.shiftKey && !e.altKey,
    action: "placeAtCursor" },
  { group: "Landmarks", keys: ["G"], label: "go to the active landmark",
    match: (e) => plain(e) && lower(e) === "g", action: "gotoActive" },
  { group: "Landmarks", keys: ["1", "2", "3"], label: "confidence (1 unsure, 3 sure)",
    match: (e) => plain(e) && ["1", "2", "3"].includes(e.key), action: "keyConfidence" },
  { group: "Landmarks", keys: ["V"], label: "mark not visible (again: undo the mark)",
    match: (e) => plain(e) && lower(e) === "v", action: "toggleAbsent" },
  { group: "Landmarks", keys: ["Del"], label: "remove the active landmark's point",
    match: (e) => e.key === "Delete" || e.key === "Backspace", action: "removeActive" },
  { group: "Landmarks", keys: ["Ctrl", "Z"], label: "undo",
    match: (e) => (e.ctrlKey || e.metaKey) && !e.shiftKey && lower(e) === "z", action: "undo" },
  { group: "Landmarks", keys: ["Ctrl", "Y"], label: "redo (also Ctrl+Shift+Z)",
    match: (e) => (e.ctrlKey || e.metaKey) && (lower(e) === "y" || (e.shiftKey && lower(e) === "z")),
    action: "redo" },
  { group: "Read", keys: ["Ctrl", "Enter"], label: "submit the read (asks first)",
    match: (e) => (e.ctrlKey || e.metaKey) && e.key === "Enter", action: "askSubmit" },
];

function lower(e) {
  return e.key.length === 1 ? e.key.toLowerCase() : e.key;
}

function plain(e) {
  return !e.ctrlKey && !e.metaKey && !e.altKey && !e.shiftKey;
}

function typing(target) {
  if (!target || !target.closest) return false;
  return Boolean(target.closest("input, textarea, select, [contenteditable='true']"));
}

/** Attach the shortcut table to `root`: keydown inside it calls viewer[action](event). */
export function bindKeys(root, viewer) {
  root.addEventListener("keydown", (e) => {
    if (typing(e.target) || e.isComposing) return;
    if (e.target.closest && e.target.closest("dialog")) return;
    // On a focused button, Enter and Space press the button as usual.
    const onButton = e.target.tagName === "BUTTON" || e.target.tagName === "A";
    if (onButton && (e.key === " " || (e.key === "Enter" && !e.ctrlKey && !e.metaKey))) return;
    const entry = SHORTCUTS.find((s) => s.match(e));
    if (!entry) {
      if (e.key === "Escape") viewer.escape();
      return;
    }
    e.preventDefault();
    viewer[entry.action](e);
  });
}

/** The shortcut table as HTML (a definition list per group). */
export function shortcutHtml() {
  const groups = new Map();
  for (const s of SHORTCUTS) {
    if (!groups.has(s.group)) groups.set(s.group, []);
    groups.get(s.group).push(s);
  }
  const mouse = [
    ["Click", "place the active landmark (or move the crosshair, see C)"],
    ["Drag", "move the crosshair; drag a marker to move it"],
    ["Wheel", "step slices; Ctrl+wheel zooms"],
    ["Right-drag", "window (left-right) and level (up-down)"],
    ["Shift-drag", "pan (middle-drag too)"],
    ["Double-click", "make this the large pane"],
  ];
  let html = "";
  for (const [group, list] of groups) {
    html += `<h4>${group}</h4><dl>`;
    for (const s of list) {
      html += `<dt>${s.keys.map((k) => `<kbd>${k}</kbd>`).join(s.keys[0] === "Ctrl" ? "+" : " ")}</dt><dd>${s.label}</dd>`;
    }
    html += "</dl>";
  }
  html += "<h4>Mouse</h4><dl>";
  for (const [k, label] of mouse) html += `<dt>${k}</dt><dd>${label}</dd>`;
  return `${html}</dl><p class="muted">Tab moves between panes and buttons; Esc returns to the large pane.</p>`;
}
