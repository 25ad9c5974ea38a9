"""`make loadtest`: 50 simulated readers against gunicorn + PostgreSQL + Redis + Celery.

Bounded and loopback only: a private PostgreSQL (54329) and Redis (63790) are started in
a temporary folder and removed afterwards. For `--seconds` (120) the readers open reads
and volumes and place, move and remove points; they submit finished reads (each submit
asks for an analysis) and a coordinator asks for an analysis every 20 s. Readers start 10
a second (5 s to start all 50); the Celery worker runs at nice 10, as on a shared host
where background analysis should yield to the web server. Then it checks
that every acknowledged event is in the database exactly once and that
`rebuild_placements --check` finds no mismatch.

Prints one JSON object per figure per line, like `make bench`. Exit code 1 when an event
was lost or doubled, a 5xx was answered, the placements do not match the events, or a
reader thread failed; the latency targets are reported, not enforced.
"""

from __future__ import annotations

import argparse
import sys
import time
from concurrent.futures import ThreadPoolExecutor

from .readers import Coordinator, Record, SimulatedReader, login
from .stack import Stack
from .verify import (
    emit,
    event_counts,
    percentile,
    rebuild_check,
    server_event_times_ms,
    wait_for_runs,
)

ENDPOINTS = ("event", "read_detail", "volume", "worklist", "submit", "analysis_request")


def sign_in(stack: Stack, names: list[str], password: str) -> list:
    with ThreadPoolExecutor(8) as pool:
        return list(pool.map(lambda n: login(stack.base_url, n, password), names))


#: Readers started per second (a ramp-up, as load tools do): 50 people do not open their
#: first read in the same millisecond.
SPAWN_PER_S = 10.0


def start_readers(stack: Stack, sessions: list, record: Record, seconds: float,
                  drain_s: float = 60.0) -> list[SimulatedReader]:
    now = time.monotonic()
    stop_at = now + seconds
    readers = [
        SimulatedReader(stack.base_url, session, record, stop_at=stop_at,
                        drain_until=stop_at + drain_s, seed=1000 + n,
                        start_at=now + n / SPAWN_PER_S)
        for n, session in enumerate(sessions)
    ]
    for reader in readers:
        reader.start()
    return readers


def report_latencies(record: Record, prefix: str) -> None:
    for endpoint in ENDPOINTS:
        values = record.latencies_ms.get(endpoint, [])
        if not values:
            continue
        for q in (50, 95, 99):
            emit(f"{prefix}.{endpoint}_p{q}.ms", percentile(values, q), "ms", None, "lower",
                 n=len(values))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--readers", type=int, default=50)
    parser.add_argument("--seconds", type=float, default=120.0)
    parser.add_argument("--cases", type=int, default=20)
    parser.add_argument("--web-workers", type=int, default=4)
    args = parser.parse_args()
    stack = Stack(web_workers=args.web_workers)
    ok = False
    try:
        stack.start()
        study = stack.script("tests.load.setup_study", str(args.readers), str(args.cases))
        stack.start_web()
        stack.start_worker()
        sessions = sign_in(stack, study["readers"], study["password"])
        coordinator_session = login(stack.base_url, study["coordinator"], study["password"])
        record = Record()
        cpu_before = stack.cpu_seconds()
        started = time.monotonic()
        readers = start_readers(stack, sessions, record, args.seconds)
        coordinator = Coordinator(stack.base_url, coordinator_session, record, study["slug"],
                                  stop_at=started + args.seconds)
        coordinator.start()
        for thread in [*readers, coordinator]:
            thread.join()
        elapsed = time.monotonic() - started
        cpu_after = stack.cpu_seconds()
        runs = wait_for_runs(stack, timeout=120)
        counts = event_counts(stack, record)
        mismatch = rebuild_check(stack)
        place = record.latencies_ms.get("event", [])
        errors = [r.error for r in readers if r.error]

        emit("load.requests_per_s", record.requests / elapsed, "1/s", None, "higher",
             readers=args.readers, seconds=round(elapsed, 1), web_workers=args.web_workers)
        for q, target in ((50, None), (95, 50.0), (99, None)):
            emit(f"load.place_p{q}.ms", percentile(place, q), "ms", target, "lower",
                 n=len(place))
        server = server_event_times_ms(stack)
        for q in (50, 95):
            emit(f"load.place_server_p{q}.ms", percentile(server, q), "ms", None, "lower",
                 n=len(server), measured="inside the web worker (access log)")
        emit("load.errors_5xx", record.errors_5xx, "count", 0, "lower")
        emit("load.lost", counts["lost"], "count", 0, "lower", acknowledged=len(record.acked))
        emit("load.duplicated", counts["duplicated"], "count", 0, "lower",
             stored=counts["stored"])
        emit("load.refused_4xx", len(record.refused), "count", None, "lower",
             examples=record.refused[:3])
        emit("load.rebuild_mismatch", int(mismatch != 0), "count", 0, "lower")
        emit("load.reads_submitted", record.submitted, "count", None, "higher")
        emit("load.analysis_runs", sum(runs.values()), "count", None, None, by_status=runs,
             requested_by_coordinator=coordinator.requested)
        report_latencies(record, "load")
        for part, seconds in cpu_after.items():  # where the two cores went during the load
            emit(f"load.cpu_share.{part}", (seconds - cpu_before[part]) / elapsed, "cores", None,
                 None, cpu_seconds=round(seconds - cpu_before[part], 1))
        for error in errors:
            print(f"reader failed: {error}", file=sys.stderr)
        ok = not (counts["lost"] or counts["duplicated"] or record.errors_5xx or mismatch
                  or errors)
    finally:
        stack.stop()
        if ok:
            stack.cleanup()
        else:
            print(f"logs kept in {stack.tmp}", file=sys.stderr)
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
