// Talking to the API: JSON with the session cookie and Django's CSRF token, and the event
// queue that makes saving safe (nothing lost, nothing doubled).
//
// Every reader action becomes one append-only event with a client UUID and the client time.
// Events go out one at a time, in order. A network failure keeps the event at the head of
// the queue and retries it later with the same UUID, so the server stores it exactly once.
// The queue is mirrored in localStorage, so a closed tab or a crash loses nothing either.
// Each event gets its base version when it is made: the read version the page then knew plus
// the events queued before it. The base version is kept with the event in localStorage and
// sent unchanged on every retry, also after a reload, so an action made offline is never
// applied over changes stored since from another tab or machine: the server answers 409,
// the queue stops, and the events it could not apply are set aside (kept in localStorage
// under their own key, never sent again) until the reader has been told and dismisses them.
//
// Each tab keeps its own queue under cairn.pending.<read>.<tab id> (and its set-aside events
// under cairn.setaside.<read>.<tab id>), so no tab ever writes, and so never erases, another
// tab's unsent events. The tab id lives in sessionStorage (it survives a reload of the tab)
// and the tab holds a Web Lock named after it for as long as the page lives, which is how
// other pages learn that the tab is gone: when they can take its lock. A page adopts the
// queues of gone tabs of its read when it opens and, through a waiting lock request, as soon
// as another open tab of the read goes away: the events keep their UUIDs, base versions and
// order and go after the page's own, so the server stores each once or answers 409 (set
// aside, with the notice). Without Web Locks (a page not served over HTTPS) a tab writes a
// heartbeat instead and counts as gone when the heartbeat is missing or older than GONE_MS.

import { uuid4 } from "./coords.js";

export class ApiError extends Error {
  constructor(status, message) {
    super(message);
    this.status = status;
  }
}

/** Django's CSRF token from its cookie. */
export function csrfToken() {
  const match = document.cookie.match(/(?:^|;\s*)csrftoken=([^;]+)/);
  return match ? decodeURIComponent(match[1]) : "";
}

/**
 * GET a JSON resource; throws ApiError with the server's message on failure. No custom
 * headers, so a <link rel=preload as=fetch> of the same URL can be reused.
 */
export async function getJson(url) {
  const response = await fetch(url, { credentials: "same-origin" });
  const data = await response.json().catch(() => ({}));
  if (!response.ok) throw new ApiError(response.status, data.error || `HTTP ${response.status}`);
  return data;
}

/** POST JSON; resolves {status, data}. Network failures reject with a TypeError. */
export async function postJson(url, body, { keepalive = false } = {}) {
  const response = await fetch(url, {
    method: "POST",
    credentials: "same-origin",
    keepalive,
    headers: {
      "Content-Type": "application/json",
      Accept: "application/json",
      "X-CSRFToken": csrfToken(),
    },
    body: JSON.stringify(body),
  });
  const data = await response.json().catch(() => ({}));
  return { status: response.status, data };
}

const RETRY_MS = [500, 1000, 2000, 3000, 5000];

/**
 * The ordered, persistent queue of placement events for one read.
 *
 * `hooks.onState(state, pending)` reports "saved" | "saving" | "offline" | "conflict" |
 * "refused"; `hooks.onAck(event, data)` one stored event; `hooks.onConflict(message, lost)`
 * a stale version; `hooks.onRefused(event, message)` a 4xx that stored nothing;
 * `hooks.onAdopt(events)` events of a tab that went away while this page was open.
 */
export class EventQueue {
  /**
   * Open the queue of one read in this tab: claim the tab id, restore this tab's own events
   * and adopt those of gone tabs. Use this, not the constructor.
   */
  static async open(url, readCode, version, hooks = {}) {
    const tab = await claimTab();
    const queue = new EventQueue(url, readCode, version, hooks, tab);
    queue.adoptedAtOpen = await queue.adoptGone({ atOpen: true });
    queue.watchOtherTabs();
    return queue;
  }

  constructor(url, readCode, version, hooks = {}, tab = uuid4()) {
    this.url = url;
    this.tab = tab;
    this.prefix = `cairn.pending.${readCode}`;
    this.asidePrefix = `cairn.setaside.${readCode}`;
    this.key = `${this.prefix}.${tab}`;
    this.asideKey = `${this.asidePrefix}.${tab}`;
    this.version = version;
    this.hooks = hooks;
    this.watched = new Set();
    this.pending = this.checked(readList(this.key));
    this.sending = false;
    this.failures = 0;
    this.timer = null;
    this.stopped = false;
    this.latencies = [];
    window.addEventListener("online", () => {
      this.failures = 0; // the network says it is back: retry now, not after the backoff
      if (!hasLocks()) this.adoptGone();
      this.flush();
    });
  }

  /**
   * Events left in localStorage by an earlier page (oldest first). Events without a base
   * version (left by an older page) cannot be checked against changes made elsewhere since,
   * so they are set aside rather than sent.
   */
  checked(stored) {
    if (stored.every((e) => Number.isInteger(e.base_version))) return stored;
    this.setAside(stored);
    return [];
  }

  persist() {
    writeList(this.key, this.pending);
  }

  /** Ids of other tabs that left a queue for this read ("" is the older, shared key). */
  otherTabs() {
    const tabs = [];
    for (const key of storageKeys()) {
      if (key === this.prefix) tabs.push("");
      else if (key.startsWith(`${this.prefix}.`) && key !== this.key) {
        tabs.push(key.slice(this.prefix.length + 1));
      }
    }
    return tabs;
  }

  /**
   * Take over the queues of gone tabs of this read: at open they join this tab's queue in
   * the order they were made (the queue whose first event is oldest first, each queue kept
   * whole); later they go after whatever this tab has queued. `held` names a tab whose lock
   * the caller already holds. Reports adopted events through `hooks.onAdopt` (not at open).
   */
  async adoptGone({ atOpen = false, held = null } = {}) {
    const blocks = [];
    for (const tab of this.otherTabs()) {
      if (tab === held) this.take(tab, blocks);
      else await takeIfGone(tab, () => this.take(tab, blocks));
    }
    if (!blocks.length) return [];
    const adopted = blocks.flat();
    if (atOpen) {
      if (this.pending.length) blocks.push(this.pending);
      blocks.sort((x, y) => String(x[0].client_time).localeCompare(String(y[0].client_time)));
      this.pending = blocks.flat();
    } else {
      this.pending = [...this.pending, ...adopted];
    }
    this.persist();
    if (!atOpen) {
      if (this.hooks.onAdopt) this.hooks.onAdopt(adopted);
      this.flush();
    }
    return adopted;
  }

  /**
   * Move a gone tab's queue into this tab's key (synchronously, while its lock is held):
   * first written here, then removed there, so a crash between the two can only repeat an
   * event (stored once by its UUID), never lose one.
   */
  take(tab, blocks) {
    const key = tab ? `${this.prefix}.${tab}` : this.prefix;
    const known = new Set([...this.pending, ...blocks.flat()].map((e) => e.client_event_id));
    const events = this.checked(readList(key)).filter((e) => !known.has(e.client_event_id));
    if (events.length) {
      blocks.push(events);
      writeList(this.key, [...this.pending, ...blocks.flat()]);
    }
    writeList(key, []);
  }

  /**
   * Wait for every other open tab of this read to go away, then adopt its queue. The lock
   * request waits in the browser (no polling); a tab seen later is found by the storage
   * event its first save raises here.
   */
  watchOtherTabs() {
    const watch = (tab) => {
      if (!tab || this.watched.has(tab)) return;
      this.watched.add(tab);
      if (hasLocks()) {
        navigator.locks
          .request(`${LOCK_PREFIX}${tab}`, () => {
            this.watched.delete(tab);
            return this.adoptGone({ held: tab });
          })
          .catch(() => this.watched.delete(tab));
      }
    };
    for (const tab of this.otherTabs()) watch(tab);
    window.addEventListener("storage", (e) => {
      if (e.key && e.newValue && e.key.startsWith(`${this.prefix}.`) && e.key !== this.key) {
        watch(e.key.slice(this.prefix.length + 1));
      }
    });
    if (!hasLocks()) setInterval(() => this.adoptGone(), HEARTBEAT_MS);
  }

  /** Events this browser (any tab) made that the server could not apply (oldest first). */
  setAsideEvents() {
    const events = [];
    for (const key of storageKeys()) {
      if (key === this.asidePrefix || key.startsWith(`${this.asidePrefix}.`)) events.push(...readList(key));
    }
    return events.sort((a, b) => String(a.client_time).localeCompare(String(b.client_time)));
  }

  setAside(events) {
    if (events.length) writeList(this.asideKey, [...readList(this.asideKey), ...events]);
  }

  /** The reader has been told about these set-aside events and lets them go. */
  discardSetAside(events) {
    const told = new Set(events.map((e) => e.client_event_id));
    for (const key of storageKeys()) {
      if (key === this.asidePrefix || key.startsWith(`${this.asidePrefix}.`)) {
        writeList(key, readList(key).filter((e) => !told.has(e.client_event_id)));
      }
    }
  }

  /** The read version an event made now is based on: the last queued event's, plus one. */
  nextBaseVersion() {
    const last = this.pending[this.pending.length - 1];
    return last ? last.base_version + 1 : this.version;
  }

  /** Add one action (landmark, kind, x_mm, y_mm, z_mm, confidence); returns the event. */
  push(action) {
    const event = {
      client_event_id: uuid4(),
      client_time: new Date().toISOString(),
      ...action,
      base_version: this.nextBaseVersion(),
    };
    event.queued_at = performance.now();
    this.pending.push(event);
    this.persist();
    this.flush();
    return event;
  }

  report(state) {
    if (this.hooks.onState) this.hooks.onState(state, this.pending.length);
  }

  /** Send what is queued, one event at a time, until empty or the network fails. */
  async flush() {
    if (this.sending || this.stopped) return;
    if (this.timer) {
      clearTimeout(this.timer);
      this.timer = null;
    }
    this.sending = true;
    let refused = false;
    try {
      while (this.pending.length && !this.stopped) {
        this.report(this.failures ? "offline" : "saving");
        const outcome = await this.sendHead();
        if (outcome === "retry") {
          this.failures += 1;
          this.report("offline");
          const delay = RETRY_MS[Math.min(this.failures - 1, RETRY_MS.length - 1)];
          this.timer = setTimeout(() => this.flush(), delay);
          return;
        }
        this.failures = 0;
        if (outcome === "refused") refused = true;
      }
      if (!this.stopped) this.report(refused ? "refused" : "saved");
    } finally {
      this.sending = false;
    }
  }

  async sendHead() {
    const event = this.pending[0];
    const { queued_at: queuedAt, ...body } = event; // base_version as made, never updated
    let result;
    try {
      result = await postJson(this.url, body);
    } catch {
      return "retry";
    }
    const { status, data } = result;
    if (status === 200 || status === 201) {
      this.version = data.version;
      this.pending.shift();
      this.persist();
      if (typeof queuedAt === "number") this.latencies.push(performance.now() - queuedAt);
      if (this.hooks.onAck) this.hooks.onAck(event, data);
      return "done";
    }
    if (status === 409) {
      // Changed elsewhere: this event and every later one were made on top of a state the
      // server no longer has. Keep them aside (not sent, not lost) and stop.
      this.stopped = true;
      const lost = this.pending.splice(0).map(({ queued_at: _, ...e }) => e);
      this.setAside(lost);
      this.persist();
      this.report("conflict");
      if (this.hooks.onConflict) this.hooks.onConflict(data.error || "conflict", lost);
      return "done";
    }
    if (status >= 400 && status < 500) {
      this.pending.shift();
      // Nothing was stored for it, so the later events' base versions, which counted it,
      // come down by one.
      for (const later of this.pending) later.base_version -= 1;
      this.persist();
      this.report("refused");
      if (this.hooks.onRefused) this.hooks.onRefused(event, data.error || `HTTP ${status}`);
      return "refused";
    }
    return "retry"; // 5xx or a proxy error page: the server did not take it; try again.
  }

  /** Resolves once nothing is queued (or the queue stopped). */
  async drained(timeoutMs = 10000) {
    const start = performance.now();
    while ((this.pending.length || this.sending) && !this.stopped) {
      if (performance.now() - start > timeoutMs) return false;
      await new Promise((r) => setTimeout(r, 5));
    }
    return !this.pending.length;
  }
}

// ---- which tab is this, and which tabs are gone ---------------------------------------------

const TAB_KEY = "cairn.tab";
const LOCK_PREFIX = "cairn.tab.";
const ALIVE_PREFIX = "cairn.alive.";
const HEARTBEAT_MS = 20000;
const GONE_MS = 180000; // > the one-minute timer throttling of hidden tabs (Chrome)
const RELOAD_WAIT_MS = 1000; // a reloaded tab's old page may hold its lock a moment longer

function hasLocks() {
  return Boolean(navigator.locks && navigator.locks.request);
}

/** Hold the lock `name` until the page goes away; resolves false if it is not to be had. */
function holdLock(name, waitMs) {
  return new Promise((resolve) => {
    const timeout = waitMs && typeof AbortSignal.timeout === "function";
    const options = timeout ? { signal: AbortSignal.timeout(waitMs) } : { ifAvailable: true };
    navigator.locks
      .request(name, options, (lock) => {
        if (!lock) {
          resolve(false);
          return null;
        }
        resolve(true);
        return new Promise(() => {}); // held for the page's lifetime
      })
      .catch(() => resolve(false));
  });
}

/**
 * This tab's id: kept in sessionStorage so a reload keeps it, made new when another live page
 * already has it (a duplicated tab copies sessionStorage).
 */
async function claimTab() {
  let id = null;
  try {
    id = window.sessionStorage.getItem(TAB_KEY);
  } catch {
    // sessionStorage disabled: a new id each page (the old one's queue is then adopted)
  }
  if (hasLocks()) {
    if (!id || !(await holdLock(`${LOCK_PREFIX}${id}`, RELOAD_WAIT_MS))) {
      id = uuid4();
      await holdLock(`${LOCK_PREFIX}${id}`, 0);
    }
  } else {
    try {
      // A reloaded tab removed its heartbeat on pagehide; a live one (duplicated tab) has it.
      const alive = id && window.localStorage.getItem(`${ALIVE_PREFIX}${id}`);
      if (!id || (alive && Date.now() - Number(alive) < GONE_MS)) id = uuid4();
      const beat = () => window.localStorage.setItem(`${ALIVE_PREFIX}${id}`, String(Date.now()));
      beat();
      setInterval(beat, HEARTBEAT_MS);
      window.addEventListener("pagehide", () => window.localStorage.removeItem(`${ALIVE_PREFIX}${id}`));
    } catch {
      id = id || uuid4(); // storage disabled: nothing is kept across pages anyway
    }
  }
  try {
    window.sessionStorage.setItem(TAB_KEY, id);
  } catch {
    // see above
  }
  return id;
}

/**
 * Run `take()` (synchronous) if the tab `tab` is gone, holding its lock meanwhile so no two
 * pages adopt the same queue; resolves take()'s events, or [] if the tab is still open.
 * Tab "" is the shared key of older pages: always taken.
 */
async function takeIfGone(tab, take) {
  if (!tab) return take();
  if (hasLocks()) {
    return navigator.locks.request(`${LOCK_PREFIX}${tab}`, { ifAvailable: true }, (lock) =>
      lock ? take() : [],
    );
  }
  let beat = 0;
  try {
    beat = Number(window.localStorage.getItem(`${ALIVE_PREFIX}${tab}`) || 0);
  } catch {
    return [];
  }
  return Date.now() - beat > GONE_MS ? take() : [];
}

function storageKeys() {
  const keys = [];
  try {
    for (let i = 0; i < window.localStorage.length; i += 1) keys.push(window.localStorage.key(i));
  } catch {
    // storage disabled
  }
  return keys;
}

function readList(key) {
  try {
    const stored = JSON.parse(window.localStorage.getItem(key) || "[]");
    return Array.isArray(stored) ? stored : [];
  } catch {
    return [];
  }
}

function writeList(key, list) {
  try {
    if (list.length) window.localStorage.setItem(key, JSON.stringify(list));
    else window.localStorage.removeItem(key);
  } catch {
    // Storage full or disabled: the in-memory queue still holds the events.
  }
}
