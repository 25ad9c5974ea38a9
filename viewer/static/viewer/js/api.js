// Talking to the API: JSON with the session cookie and Django's CSRF token, and the event
// queue that makes saving safe (nothing lost, nothing doubled).
//
// Every reader action becomes one append-only event with a client UUID and the client time.
// Events go out one at a time, in order. A network failure keeps the event at the head of
// the queue and retries it later with the same UUID, so the server stores it exactly once.
// The queue is mirrored in localStorage, so a closed tab or a crash loses nothing either.
// Each event carries the read version the page last saw; a 409 means another tab or
// machine changed the read, and the queue stops instead of overwriting.

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
 * a stale version; `hooks.onRefused(event, message)` a 4xx that stored nothing.
 */
export class EventQueue {
  constructor(url, readCode, version, hooks = {}) {
    this.url = url;
    this.key = `cairn.pending.${readCode}`;
    this.version = version;
    this.hooks = hooks;
    this.pending = this.restore();
    this.sending = false;
    this.failures = 0;
    this.timer = null;
    this.stopped = false;
    this.latencies = [];
    window.addEventListener("online", () => {
      this.failures = 0; // the network says it is back: retry now, not after the backoff
      this.flush();
    });
  }

  /** Events left in localStorage by an earlier page of this read (oldest first). */
  restore() {
    try {
      const stored = JSON.parse(window.localStorage.getItem(this.key) || "[]");
      return Array.isArray(stored) ? stored : [];
    } catch {
      return [];
    }
  }

  persist() {
    try {
      if (this.pending.length) window.localStorage.setItem(this.key, JSON.stringify(this.pending));
      else window.localStorage.removeItem(this.key);
    } catch {
      // Storage full or disabled: the in-memory queue still holds the events.
    }
  }

  /** Add one action (landmark, kind, x_mm, y_mm, z_mm, confidence); returns the event. */
  push(action) {
    const event = {
      client_event_id: uuid4(),
      client_time: new Date().toISOString(),
      ...action,
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
    const { queued_at: queuedAt, ...body } = event;
    body.base_version = this.version;
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
      this.stopped = true;
      const lost = this.pending.splice(0);
      this.persist();
      this.report("conflict");
      if (this.hooks.onConflict) this.hooks.onConflict(data.error || "conflict", lost);
      return "done";
    }
    if (status >= 400 && status < 500) {
      this.pending.shift();
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
