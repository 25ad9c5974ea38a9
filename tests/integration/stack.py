"""Running cairn against real services in subprocesses: a database, a broker, a worker.

The pytest process uses its own test database; these helpers give the subprocesses (a
`celery worker`, management commands, flow scripts) a separate, real one.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
import uuid
from contextlib import contextmanager
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PG_HOST, PG_PORT = "127.0.0.1", 5432
REDIS_HOST, REDIS_PORT = "127.0.0.1", 6379


def port_open(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=1.0):
            return True
    except OSError:
        return False


@contextmanager
def postgres_database():
    """A fresh PostgreSQL database on 127.0.0.1:5432 (dropped afterwards); yields its URL."""
    import psycopg

    name = f"cairn_it_{uuid.uuid4().hex[:10]}"
    admin = f"postgresql://postgres@{PG_HOST}:{PG_PORT}/postgres"
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    try:
        yield f"postgres://postgres@{PG_HOST}:{PG_PORT}/{name}"
    finally:
        with psycopg.connect(admin, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


class Stack:
    """Environment for subprocesses: DATABASE_URL, CELERY_BROKER_URL and a data dir."""

    def __init__(self, tmp: Path, database_url: str, broker_url: str) -> None:
        self.env = {
            **{k: v for k, v in os.environ.items() if not k.startswith("PYTEST")},
            "DJANGO_SETTINGS_MODULE": "cairn.settings",
            "CAIRN_VAR_DIR": str(tmp / "var"),
            "CAIRN_DATA_DIR": str(tmp / "data"),
            "DATABASE_URL": database_url,
            "CELERY_BROKER_URL": broker_url,
            "PYTHONPATH": str(ROOT),
        }

    def manage(self, *args: str) -> str:
        result = subprocess.run(
            [sys.executable, "manage.py", *args],
            cwd=ROOT,
            env=self.env,
            capture_output=True,
            text=True,
            timeout=300,
        )
        if result.returncode != 0:
            raise RuntimeError(f"manage.py {' '.join(args)} failed:\n{result.stderr}")
        return result.stdout

    def flow(self, name: str, **kwargs: object) -> dict:
        """Run a function of tests/integration/flows.py in a subprocess; return its JSON."""
        result = subprocess.run(
            [sys.executable, "-m", "tests.integration.flows", name, json.dumps(kwargs)],
            cwd=ROOT,
            env=self.env,
            capture_output=True,
            text=True,
            timeout=300,
        )
        if result.returncode != 0:
            raise RuntimeError(f"flow {name} failed:\n{result.stderr}")
        return json.loads(result.stdout.strip().splitlines()[-1])

    @contextmanager
    def worker(self, log_path: Path):
        """A real `celery worker` process, stopped (SIGTERM, then kill) afterwards."""
        with open(log_path, "w") as log:
            process = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "celery",
                    "-A",
                    "cairn",
                    "worker",
                    "--pool=solo",
                    "--loglevel=INFO",
                    f"--hostname=it-{uuid.uuid4().hex[:6]}@%h",
                    "--without-gossip",
                    "--without-mingle",
                    "--without-heartbeat",
                ],
                cwd=ROOT,
                env=self.env,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        try:
            deadline = time.monotonic() + 60
            while "ready." not in log_path.read_text():
                if process.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError(f"worker did not start:\n{log_path.read_text()}")
                time.sleep(0.2)
            yield process
        finally:
            process.terminate()
            try:
                process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()


def wait_for(check, timeout: float = 60.0, interval: float = 0.3):
    """Call `check` until it returns something truthy; return it (or raise on timeout)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        time.sleep(interval)
    raise TimeoutError("condition not met in time")
