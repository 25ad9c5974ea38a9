// Active reading time: seconds while the tab is visible and the reader has touched the
// mouse, wheel or keyboard within the last minute. Reported to the API in chunks (at most
// 600 s per report, the API's limit); an unsent chunk is kept and added to the next one.

import { postJson } from "./api.js";

const IDLE_AFTER_MS = 60000;
const TICK_MS = 1000;
const REPORT_EVERY_MS = 30000;
const MAX_REPORT_S = 600;

export class ActivityClock {
  /** `url`: the read's activity endpoint; `initial`: seconds already stored for the read. */
  constructor(url, initial, onChange) {
    this.url = url;
    this.stored = initial;
    this.unsent = 0;
    this.inFlight = 0; // seconds in a report not yet answered (still counted in the total)
    this.onChange = onChange;
    this.lastInput = performance.now();
    this.lastTick = performance.now();
    this.lastReport = performance.now();
    this.stopped = false;
    this.sending = false;
    const touch = () => {
      this.lastInput = performance.now();
    };
    for (const type of ["pointerdown", "pointermove", "wheel", "keydown"]) {
      window.addEventListener(type, touch, { passive: true, capture: true });
    }
    document.addEventListener("visibilitychange", () => {
      this.tick();
      if (document.visibilityState === "hidden") this.report(true);
    });
    window.addEventListener("pagehide", () => this.report(true));
    this.interval = setInterval(() => this.tick(), TICK_MS);
  }

  /** True while time counts: tab visible and input within the last minute. */
  isActive(now = performance.now()) {
    return document.visibilityState === "visible" && now - this.lastInput <= IDLE_AFTER_MS;
  }

  tick() {
    const now = performance.now();
    const elapsed = Math.min(now - this.lastTick, 5 * TICK_MS) / 1000;
    this.lastTick = now;
    if (this.stopped) return;
    if (this.isActive(now)) this.unsent += elapsed;
    if (this.onChange) this.onChange(this.total(), this.isActive(now));
    if (now - this.lastReport >= REPORT_EVERY_MS) this.report(false);
  }

  total() {
    return this.stored + this.unsent + this.inFlight;
  }

  /** Send the unsent seconds (keepalive when the page is going away). */
  async report(leaving) {
    if (this.sending || this.unsent < 0.5) return;
    this.lastReport = performance.now();
    const seconds = Math.min(MAX_REPORT_S, Math.round(this.unsent * 10) / 10);
    this.sending = true;
    this.unsent -= seconds;
    this.inFlight = seconds;
    try {
      const { status } = await postJson(this.url, { seconds }, { keepalive: leaving });
      if (status === 200) this.stored += seconds;
      else if (status >= 500) this.unsent += seconds;
      // Other 4xx: the read is locked or gone; the seconds cannot be stored.
    } catch {
      this.unsent += seconds;
    } finally {
      this.inFlight = 0;
      this.sending = false;
    }
  }

  /** Stop counting (after submit); sends what is left first. */
  async stop() {
    await this.report(false);
    this.stopped = true;
    clearInterval(this.interval);
  }
}
