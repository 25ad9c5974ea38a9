"""After the load: every acknowledged event stored exactly once, placements match events."""

from __future__ import annotations

import json
import time
from collections import Counter

import numpy as np

from .readers import Record
from .stack import Stack


def event_counts(stack: Stack, record: Record) -> dict[str, int]:
    """lost: acknowledged but not stored; unacknowledged: stored but never acknowledged to a
    client (a reply lost on the way); duplicated: rows beyond the first of one action, where
    an action is the same client_event_id, or the same read, landmark, kind, client time and
    point stored under another id (a client that re-sent an action under a new id)."""
    rows = stack.sql(
        "SELECT client_event_id::text, read_id, landmark_id, kind, client_time, x_mm, y_mm, "
        "z_mm FROM studies_placementevent")
    by_id = Counter(row[0] for row in rows)
    by_content = Counter(row[1:] for row in rows)
    acked = set(record.acked)
    return {
        "lost": len(acked - set(by_id)),
        "duplicated": sum(n - 1 for n in by_id.values() if n > 1)
        + sum(n - 1 for n in by_content.values() if n > 1),
        "unacknowledged": len(set(by_id) - acked),
        "stored": len(rows),
    }


def server_event_times_ms(stack: Stack) -> list[float]:
    """Time gunicorn spent on each event POST (its access log, %(D)s in microseconds).

    Measured inside the web worker, from reading the request to the end of the response: it
    leaves out the wait in the listen queue and the client's own time, so the gap between
    this and the client's figure is queueing.
    """
    log = stack.tmp / "access.log"
    times = []
    for line in log.read_text().splitlines() if log.exists() else []:
        parts = line.split()
        if len(parts) == 4 and parts[0] == "POST" and parts[1].endswith("/events/"):
            times.append(int(parts[3]) / 1e3)
    return times


def rebuild_check(stack: Stack) -> int:
    """0 when `rebuild_placements --check` finds no mismatch, else its exit code."""
    return stack.manage("rebuild_placements", "--check").returncode


def wait_for_runs(stack: Stack, timeout: float) -> dict[str, int]:
    """Wait until no analysis run is pending or running; return the count per status."""
    deadline = time.monotonic() + timeout
    while True:
        rows = dict(stack.sql("SELECT status, count(*) FROM studies_analysisrun GROUP BY status"))
        if not rows.get("pending") and not rows.get("running"):
            return rows
        if time.monotonic() > deadline:
            return rows
        time.sleep(1.0)


def percentile(values: list[float], q: float) -> float:
    return float(np.percentile(values, q)) if values else float("nan")


def emit(name: str, value: float, unit: str, target: float | None = None,
         better: str | None = None, **extra) -> None:
    """One figure as one JSON line, in the shape `make bench` prints."""
    figure = {"name": name, "value": round(float(value), 4), "unit": unit, "target": target}
    if better:
        figure["better"] = better
    print(json.dumps({**figure, **extra}), flush=True)
