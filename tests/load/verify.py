"""After the load: every acknowledged event stored exactly once, placements match events."""

from __future__ import annotations

import json
import time

import numpy as np

from .readers import Record
from .stack import Stack


def event_counts(stack: Stack, record: Record) -> dict[str, int]:
    """lost: acknowledged but not stored; duplicated: stored more than once (extra rows);
    unacknowledged: stored but never acknowledged to a client (a reply lost on the way)."""
    rows = stack.sql("SELECT client_event_id::text, count(*) FROM studies_placementevent "
                     "GROUP BY client_event_id")
    stored = {event_id: n for event_id, n in rows}
    acked = set(record.acked)
    return {
        "lost": len(acked - set(stored)),
        "duplicated": sum(n - 1 for n in stored.values() if n > 1),
        "unacknowledged": len(set(stored) - acked),
        "stored": sum(stored.values()),
    }


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
