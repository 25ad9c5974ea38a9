"""Simulated readers: Python clients that behave like the reading page.

Each reader signs in through the login form, takes its worklist, opens each read (the
read's detail and its volume), then places, moves and removes landmarks with a short
think time, and submits the read when every landmark is placed or marked not visible.

Events go through an outbox, as on the page: an event gets its client_event_id and its
base_version (the read's version it was made on) once and keeps them; when the server
cannot be reached or answers 5xx, the event stays queued and is sent again with the same
id (after a short back-off) until the server acknowledges it. Nothing new is created while
the outbox holds an unacknowledged event.
"""

from __future__ import annotations

import random
import re
import threading
import time
import uuid
from collections import defaultdict, deque
from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np
import requests

RETRY_STATUSES = {502, 503, 504, 500}
BACKOFF_S = (0.2, 0.5, 1.0, 2.0)


@dataclass
class Record:
    """Everything the clients saw; shared by all reader threads (append under the lock)."""

    lock: threading.Lock = field(default_factory=threading.Lock)
    latencies_ms: dict[str, list[float]] = field(default_factory=lambda: defaultdict(list))
    statuses: dict[int, int] = field(default_factory=lambda: defaultdict(int))
    acked: dict[str, dict] = field(default_factory=dict)
    refused: list[tuple[int, str]] = field(default_factory=list)
    retries: int = 0
    unreachable: int = 0
    submitted: int = 0
    requests: int = 0

    def note(self, endpoint: str, status: int, elapsed_ms: float) -> None:
        with self.lock:
            self.requests += 1
            self.statuses[status] += 1
            if status < 500:
                self.latencies_ms[endpoint].append(elapsed_ms)

    @property
    def errors_5xx(self) -> int:
        return sum(n for status, n in self.statuses.items() if status >= 500)


def login(base_url: str, username: str, password: str) -> requests.Session:
    """A session signed in through the login form, with the CSRF header set."""
    session = requests.Session()
    page = session.get(f"{base_url}/login/", timeout=30)
    token = re.search(r'name="csrfmiddlewaretoken" value="([^"]+)"', page.text).group(1)
    response = session.post(
        f"{base_url}/login/",
        data={"csrfmiddlewaretoken": token, "username": username, "password": password},
        headers={"Referer": f"{base_url}/login/"},
        allow_redirects=False,
        timeout=30,
    )
    if response.status_code != 302:
        raise RuntimeError(f"login of {username!r} failed: HTTP {response.status_code}")
    session.headers["X-CSRFToken"] = session.cookies["csrftoken"]
    return session


class SimulatedReader(threading.Thread):
    """One reader working through their worklist until `stop_at` (monotonic seconds)."""

    def __init__(self, base_url: str, session: requests.Session, record: Record, *,
                 stop_at: float, drain_until: float, seed: int,
                 think_s: tuple[float, float] = (0.3, 1.0), start_at: float = 0.0) -> None:
        super().__init__(daemon=True)
        self.start_at = start_at  # monotonic seconds; the reader waits until then
        self.base, self.session, self.record = base_url, session, record
        self.stop_at, self.drain_until = stop_at, drain_until
        self.rng = random.Random(seed)
        self.think_s = think_s
        self.outbox: deque[dict] = deque()
        self.version = 0  # of the read being worked on, as last acknowledged
        self.error: str | None = None

    # -- HTTP -----------------------------------------------------------------------------

    def call(self, endpoint: str, method: str, path: str, **kwargs) -> requests.Response | None:
        """One request; None when the server could not be reached."""
        started = time.perf_counter()
        try:
            response = self.session.request(method, self.base + path, timeout=30, **kwargs)
        except requests.RequestException:
            with self.record.lock:
                self.record.unreachable += 1
            return None
        self.record.note(endpoint, response.status_code, (time.perf_counter() - started) * 1e3)
        return response

    def patiently(self, endpoint: str, method: str, path: str, **kwargs) -> requests.Response:
        """Retry until the server answers below 500 (reads and submits, as the page does)."""
        attempt = 0
        while True:
            response = self.call(endpoint, method, path, **kwargs)
            if response is not None and response.status_code not in RETRY_STATUSES:
                return response
            if time.monotonic() > self.drain_until:
                raise TimeoutError(f"{method} {path}: no answer before the drain deadline")
            time.sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])
            attempt += 1

    # -- the outbox -----------------------------------------------------------------------

    def flush(self, events_path: str) -> bool:
        """Send queued events in order; True when the outbox is empty."""
        attempt = 0
        while self.outbox:
            event = self.outbox[0]
            response = self.call("event", "POST", events_path, json=event)
            if response is None or response.status_code in RETRY_STATUSES:
                with self.record.lock:
                    self.record.retries += 1
                if time.monotonic() > self.drain_until:
                    return False
                time.sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])
                attempt += 1
                continue
            self.outbox.popleft()
            attempt = 0
            with self.record.lock:
                if response.status_code in (200, 201):
                    body = response.json()
                    self.version = body["version"]
                    self.record.acked[event["client_event_id"]] = {
                        "kind": event["kind"], "created": body["created"]}
                else:
                    self.record.refused.append((response.status_code, response.text[:200]))
        return True

    # -- behaviour ------------------------------------------------------------------------

    def run(self) -> None:
        time.sleep(max(0.0, self.start_at - time.monotonic()))
        try:
            worklist = self.patiently("worklist", "GET", "/api/v1/worklist/").json()["reads"]
            for read in worklist:
                if time.monotonic() > self.stop_at:
                    break
                if read["status"] != "submitted":
                    self.work_on(read["code"])
        except Exception as error:  # reported by the driver
            self.error = f"{type(error).__name__}: {error}"

    def point(self, affine: np.ndarray, shape: list[int]) -> dict:
        ijk = [self.rng.uniform(0, n - 1) for n in shape]
        xyz = affine @ np.array([*ijk, 1.0])
        return {"x_mm": float(xyz[0]), "y_mm": float(xyz[1]), "z_mm": float(xyz[2])}

    def event(self, landmark: str, kind: str, **values) -> dict:
        """A new action, made on the version the reader knows (the outbox holds one at most)."""
        return {"client_event_id": str(uuid.uuid4()), "client_time": datetime.now(UTC).isoformat(),
                "landmark": landmark, "kind": kind, "base_version": self.version, **values}

    def work_on(self, code: str) -> None:
        detail = self.patiently("read_detail", "GET", f"/api/v1/reads/{code}/").json()
        self.version = detail["version"]
        volume = detail["volume"]
        self.patiently("volume", "GET", volume["url"], headers={"Accept-Encoding": "zstd"})
        affine, shape = np.array(volume["affine"]), volume["shape"]
        events_path = f"/api/v1/reads/{code}/events/"
        landmarks = {lm["code"]: lm for lm in detail["landmarks"]}
        placed = {p["landmark"] for p in detail["placements"]}
        while time.monotonic() < self.stop_at:
            missing = [c for c in landmarks if c not in placed]
            if not missing and self.rng.random() < 0.35:
                break
            self.outbox.append(self.next_event(landmarks, placed, missing, affine, shape))
            if not self.flush(events_path):
                return
            time.sleep(self.rng.uniform(*self.think_s))
        else:
            return
        response = self.patiently("submit", "POST", f"/api/v1/reads/{code}/submit/")
        if response.status_code == 200:
            with self.record.lock:
                self.record.submitted += 1

    def next_event(self, landmarks, placed: set, missing: list, affine, shape) -> dict:
        roll = self.rng.random()
        if missing and (not placed or roll < 0.6):
            code = self.rng.choice(missing)
            placed.add(code)
            if landmarks[code]["may_be_absent"] and self.rng.random() < 0.3:
                return self.event(code, "marked_absent")
            return self.event(code, "placed", confidence=self.rng.randint(1, 3),
                              **self.point(affine, shape))
        code = self.rng.choice(sorted(placed))
        if roll < 0.85:
            return self.event(code, "moved", **self.point(affine, shape))
        placed.discard(code)
        return self.event(code, "removed")


class Coordinator(threading.Thread):
    """Asks for an analysis run every `every_s` seconds while the readers work."""

    def __init__(self, base_url: str, session: requests.Session, record: Record, slug: str,
                 *, stop_at: float, every_s: float = 20.0) -> None:
        super().__init__(daemon=True)
        self.base, self.session, self.record, self.slug = base_url, session, record, slug
        self.stop_at, self.every_s = stop_at, every_s
        self.requested = 0

    def run(self) -> None:
        while time.monotonic() + self.every_s < self.stop_at:
            time.sleep(self.every_s)
            started = time.perf_counter()
            try:
                response = self.session.post(f"{self.base}/studies/{self.slug}/results/run/",
                                             headers={"Referer": self.base + "/"},
                                             allow_redirects=False, timeout=30)
            except requests.RequestException:
                continue
            elapsed = (time.perf_counter() - started) * 1e3
            self.record.note("analysis_request", response.status_code, elapsed)
            self.requested += response.status_code == 302
