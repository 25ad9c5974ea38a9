"""The placement flow and a task through a real worker, on the real services users run.

PostgreSQL (127.0.0.1:5432) + Redis (127.0.0.1:6379), and the embedded default: SQLite +
kombu's filesystem transport. Under CI=true a missing service fails these tests.
"""

from __future__ import annotations

import pytest

from tests.conftest import require_service

from .stack import (
    PG_HOST,
    PG_PORT,
    REDIS_HOST,
    REDIS_PORT,
    Stack,
    port_open,
    postgres_database,
    wait_for,
)


@pytest.fixture
def postgres_url():
    require_service(port_open(PG_HOST, PG_PORT), "PostgreSQL on 127.0.0.1:5432")
    with postgres_database() as url:
        yield url


def redis_url() -> str:
    require_service(port_open(REDIS_HOST, REDIS_PORT), "Redis on 127.0.0.1:6379")
    return f"redis://{REDIS_HOST}:{REDIS_PORT}/7"


def check_flow(result: dict) -> None:
    # three posts of the same event: stored once (201, then 200 twice)
    assert result["statuses"] == [201, 200, 200, 201, 201, 200]
    assert result["events"] == 3
    assert result["placements"] == 2
    assert result["moved_x_ok"]
    assert result["mismatches"] == 0


@pytest.mark.postgres
def test_it_runs_the_placement_flow_on_postgresql(tmp_path, postgres_url) -> None:
    stack = Stack(tmp_path, postgres_url, "memory://")
    stack.manage("migrate", "--noinput")
    result = stack.flow("placement_flow")
    assert result["vendor"] == "postgresql"
    check_flow(result)
    for operation in ("UPDATE", "DELETE"):
        assert "append-only" in result["trigger"][operation]


@pytest.mark.postgres
@pytest.mark.redis
def test_it_runs_a_task_through_redis_in_a_real_worker(tmp_path, postgres_url) -> None:
    stack = Stack(tmp_path, postgres_url, redis_url())
    stack.manage("migrate", "--noinput")
    study_pk = stack.flow("placement_flow")["study_pk"]
    assert stack.flow("tamper", study_pk=study_pk)["changed"] == 1
    assert stack.flow("mismatches")["mismatches"] == 1
    with stack.worker(tmp_path / "worker.log"):
        stack.flow("send_rebuild", study_pk=study_pk)
        wait_for(lambda: stack.flow("mismatches")["mismatches"] == 0, timeout=60)


@pytest.mark.postgres
@pytest.mark.redis
def test_a_worker_sends_the_debounced_analysis_of_a_submitted_read_when_it_is_due(
    tmp_path, postgres_url
) -> None:
    """The submit leaves a waiting run in the database (no broker-held message); the real
    worker's timer sends it once the debounce has passed, and the worker computes it (a
    one-reader study: stored as failed, with the reason)."""
    stack = Stack(tmp_path, postgres_url, redis_url())
    stack.env["CAIRN_ANALYSIS_DEBOUNCE_SECONDS"] = "2"
    stack.manage("migrate", "--noinput")
    stack.flow("placement_flow")
    [(status, message, _)] = stack.flow("runs")["runs"]
    assert status == "pending" and message.startswith("waiting:")
    with stack.worker(tmp_path / "worker.log"):
        done = wait_for(
            lambda: [r for r in stack.flow("runs")["runs"] if r[0] in ("completed", "failed")],
            timeout=60,
        )
    assert done[0][0] == "failed" and "two readers" in done[0][2]


def test_it_runs_a_task_through_the_filesystem_transport_with_sqlite(tmp_path) -> None:
    stack = Stack(tmp_path, f"sqlite:///{tmp_path / 'it.sqlite3'}", "filesystem://")
    stack.manage("migrate", "--noinput")
    result = stack.flow("placement_flow")
    check_flow(result)
    stack.flow("tamper", study_pk=result["study_pk"])
    with stack.worker(tmp_path / "worker.log"):
        stack.flow("send_rebuild", study_pk=result["study_pk"])
        wait_for(lambda: stack.flow("mismatches")["mismatches"] == 0, timeout=60)
