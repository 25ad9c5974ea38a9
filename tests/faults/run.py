"""`make faulttest`: faults injected into a private production-like stack, one at a time.

Scenarios (each prints fault.<scenario>.lost, .duplicated and .result_matches, 1 or 0):

- worker_killed: the Celery pool process computing an analysis gets SIGKILL; the task is
  redelivered (acks late, reject on worker lost) and the stored tables must equal those
  of a clean run of the same inputs. lost: the run never completed.
- postgres_stopped: our private PostgreSQL is stopped for 10 s while readers save; they
  queue and resend with the same client_event_id; gunicorn must serve again without a
  restart. result_matches: placements match events, no half-written read, web recovered.
- redis_down: our private Redis is stopped while readers save and submit; saving must go
  on, the analysis must say it is deferred, and run once Redis is back.
- web_killed: every gunicorn process gets SIGKILL in the middle of the load, then
  gunicorn is started again; no half-written rows (each service call is one transaction).

Then schemathesis runs against the API with a larger budget (CAIRN_FUZZ_EXAMPLES=20).
Bounded: about five minutes on a quiet two-core machine. Exit code 1 when any figure
misses its target.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time

import psutil
import requests

from tests.load.readers import Record, login
from tests.load.run import start_readers
from tests.load.stack import ROOT, Stack, wait_until
from tests.load.verify import emit, event_counts, rebuild_check, wait_for_runs

FLOWS = "tests.faults.flows"
READERS, CASES, SUBMITTING = 16, 10, 4
SCHEMATHESIS_EXAMPLES = os.environ.get("CAIRN_FAULT_FUZZ_EXAMPLES", "20")


def flow(stack: Stack, name: str, **kwargs) -> dict:
    import json

    return stack.script(FLOWS, name, json.dumps(kwargs))


def wait_run(stack: Stack, run_pk: int, statuses: set[str], timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    while True:
        state = flow(stack, "run_state", run_pk=run_pk)
        if state["status"] in statuses or time.monotonic() > deadline:
            return state
        time.sleep(0.5)


def clean_state(stack: Stack) -> dict[str, int]:
    """Consistency figures shared by the save scenarios."""
    state = flow(stack, "consistency")
    state["rebuild_mismatch"] = int(rebuild_check(stack) != 0)
    return state


def kill_when_running(stack: Stack, run_pk: int, found: dict) -> None:
    """Poll the run (one connection, every 5 ms); SIGKILL the pool processes once it runs."""
    import psycopg

    with psycopg.connect(stack.pg.url.replace("postgres://", "postgresql://"),
                         autocommit=True) as conn:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            status = conn.execute("SELECT status FROM studies_analysisrun WHERE id = %s",
                                  (run_pk,)).fetchone()[0]
            if status == "running":
                children = psutil.Process(stack.worker.popen.pid).children(recursive=True)
                for child in children:
                    child.send_signal(signal.SIGKILL)
                found["killed"] = len(children)
                return
            if status in ("completed", "failed"):
                return
            time.sleep(0.005)


def worker_killed(stack: Stack, slug: str) -> dict:
    clean = flow(stack, "new_run", slug=slug)
    reference = wait_run(stack, clean["run_pk"], {"completed", "failed"}, 180)
    found: dict[str, int] = {}
    tries = 0
    while not found.get("killed") and tries < 3:
        tries += 1
        run_pk = flow(stack, "new_run", slug=slug, send=False)["run_pk"]
        watcher = threading.Thread(target=kill_when_running, args=(stack, run_pk, found))
        watcher.start()
        flow(stack, "send_run", run_pk=run_pk)
        watcher.join()
    final = wait_run(stack, run_pk, {"completed", "failed"}, 150)
    same_digest = stack.sql(
        "SELECT count(*) FROM studies_analysisrun WHERE input_digest = "
        "(SELECT input_digest FROM studies_analysisrun WHERE id = %s) AND id > %s",
        (run_pk, clean["run_pk"]))[0][0]
    matches = (final["status"] == reference["status"] == "completed"
               and final["tables_sha256"] == reference["tables_sha256"])
    return {"lost": int(final["status"] != "completed"),
            "duplicated": max(same_digest - tries, 0),
            "result_matches": int(matches and bool(found.get("killed"))),
            "killed_during_run": int(bool(found.get("killed"))), "tries": tries,
            "final_status": final["status"], "attempts_on_run": final["attempts"],
            "final_message": final["message"]}


def under_load(stack: Stack, sessions, seconds: float, fault) -> Record:
    """Readers work for `seconds`; `fault(stack)` runs meanwhile in this thread."""
    record = Record()
    readers = start_readers(stack, sessions, record, seconds, drain_s=90)
    fault(stack)
    for reader in readers:
        reader.join()
    errors = [r.error for r in readers if r.error]
    for error in errors:
        print(f"reader failed: {error}", file=sys.stderr)
    record.reader_errors = len(errors)
    return record


def save_result(stack: Stack, record: Record, **extra) -> dict:
    counts = event_counts(stack, record)
    state = clean_state(stack)
    consistent = not (state["read_version_mismatch"] or state["placement_not_latest"]
                      or state["rebuild_mismatch"])
    ok = consistent and not record.reader_errors and all(extra.get(k, 1) for k in ("recovered",))
    return {"lost": counts["lost"], "duplicated": counts["duplicated"],
            "result_matches": int(ok), "acknowledged": len(record.acked),
            "retries": record.retries, "answered_5xx": record.errors_5xx, **state, **extra}


def postgres_stopped(stack: Stack, sessions) -> dict:
    recovered = {}

    def fault(stack: Stack) -> None:
        time.sleep(10)
        stack.pg.stop()
        time.sleep(10)
        stack.pg.start()
        back = time.monotonic()
        try:
            wait_until(lambda: requests.get(stack.base_url + "/login/", timeout=10)
                       .status_code == 200, 30, "web recovery")
            recovered["seconds"] = round(time.monotonic() - back, 2)
        except RuntimeError:
            recovered["seconds"] = None

    record = under_load(stack, sessions, 40, fault)
    return save_result(stack, record, recovered=int(recovered.get("seconds") is not None),
                       recovery_s=recovered.get("seconds"),
                       web_restarted=0)


def redis_down(stack: Stack, sessions, slug: str) -> dict:
    seen = {}

    def fault(stack: Stack) -> None:
        time.sleep(5)
        stack.redis.stop()
        time.sleep(3)
        seen["during"] = flow(stack, "request", slug=slug)
        time.sleep(12)
        stack.start_redis()

    record = under_load(stack, sessions, 30, fault)
    during = seen["during"]
    deferred = "deferred" in during["message"]
    after = wait_run(stack, during["run_pk"], {"completed", "failed"}, 120)
    result = save_result(stack, record, deferred_message=during["message"],
                         run_after=after["status"])
    result["result_matches"] = int(result["result_matches"] and deferred
                                   and after["status"] == "completed")
    return result


def web_killed(stack: Stack, sessions) -> dict:
    def fault(stack: Stack) -> None:
        time.sleep(8)
        stack.web.signal(signal.SIGKILL)
        stack.web.popen.wait()
        stack.web.popen = None
        time.sleep(1)
        stack.start_web()

    record = under_load(stack, sessions, 30, fault)
    return save_result(stack, record)


def schemathesis_budget() -> int:
    env = {**os.environ, "CAIRN_FUZZ_EXAMPLES": SCHEMATHESIS_EXAMPLES}
    result = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:warnings",
                             "tests/unit/test_api_schemathesis.py"], cwd=ROOT, env=env,
                            capture_output=True, text=True, timeout=1800)
    tail = result.stdout.strip().splitlines()[-1:] or [""]
    print(f"schemathesis ({SCHEMATHESIS_EXAMPLES} examples per operation): {tail[0]}",
          file=sys.stderr)
    return int(result.returncode == 0)


def main() -> int:
    stack = Stack(web_workers=3)
    results: dict[str, dict] = {}
    try:
        stack.start()
        study = stack.script("tests.load.setup_study", str(READERS), str(CASES))
        stack.start_web()
        stack.start_worker()
        flow(stack, "submit_reads", slug=study["slug"], readers=SUBMITTING)
        wait_for_runs(stack, timeout=120)
        sessions = [login(stack.base_url, name, study["password"])
                    for name in study["readers"][SUBMITTING:]]
        scenarios = {
            "worker_killed": lambda: worker_killed(stack, study["slug"]),
            "postgres_stopped": lambda: postgres_stopped(stack, sessions),
            "redis_down": lambda: redis_down(stack, sessions, study["slug"]),
            "web_killed": lambda: web_killed(stack, sessions),
        }
        chosen = sys.argv[1:] or list(scenarios)  # e.g. `python -m tests.faults.run redis_down`
        for name in chosen:
            results[name] = scenarios[name]()
    finally:
        stack.stop()
    for scenario, figures in results.items():
        extra = {k: v for k, v in figures.items()
                 if k not in ("lost", "duplicated", "result_matches")}
        emit(f"fault.{scenario}.lost", figures["lost"], "count", 0, "lower")
        emit(f"fault.{scenario}.duplicated", figures["duplicated"], "count", 0, "lower")
        emit(f"fault.{scenario}.result_matches", figures["result_matches"], "bool", 1,
             "higher", **extra)
    passed = True
    if not sys.argv[1:]:  # the larger schemathesis budget belongs to the full run only
        passed = schemathesis_budget()
        emit("fault.schemathesis.passed", passed, "bool", 1, "higher",
             examples_per_operation=int(SCHEMATHESIS_EXAMPLES))
    ok = passed and len(results) == len(sys.argv[1:] or range(4)) and all(
        f["lost"] == 0 and f["duplicated"] == 0 and f["result_matches"] == 1
        for f in results.values())
    if ok:
        stack.cleanup()
    else:
        print(f"logs kept in {stack.tmp}", file=sys.stderr)
    return 0 if ok else 1


if __name__ == "__main__":
    threading.current_thread().name = "faulttest"
    sys.exit(main())
