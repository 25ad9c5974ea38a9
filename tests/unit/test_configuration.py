"""A bad environment value stops start-up with one line naming the variable."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


def run_manage(tmp_path: Path, **env: str) -> subprocess.CompletedProcess:
    environment = {k: v for k, v in os.environ.items() if k not in {"DJANGO_SETTINGS_MODULE"}}
    environment.update({"CAIRN_VAR_DIR": str(tmp_path), "DJANGO_SETTINGS_MODULE": "cairn.settings"})
    environment.update(env)
    return subprocess.run(
        [sys.executable, "manage.py", "check"],
        cwd=ROOT,
        env=environment,
        capture_output=True,
        text=True,
        timeout=60,
    )


@pytest.mark.parametrize(
    ("env", "variable"),
    [
        ({"DATABASE_URL": "mysql://u@h/db"}, "DATABASE_URL"),
        ({"DATABASE_URL": "not a url at all"}, "DATABASE_URL"),
        ({"CELERY_BROKER_URL": "carrier-pigeon://loft"}, "CELERY_BROKER_URL"),
        ({"DEBUG": "0"}, "SECRET_KEY"),
        ({"DEBUG": "maybe"}, "DEBUG"),
        ({"CAIRN_UPLOAD_MAX_BYTES": "lots"}, "CAIRN_UPLOAD_MAX_BYTES"),
        ({"SECRET_KEY_FILE": "/nonexistent/key"}, "SECRET_KEY_FILE"),
    ],
)
def test_it_stops_with_one_line_naming_the_variable(tmp_path, env, variable) -> None:
    result = run_manage(tmp_path, **env)
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("cairn: configuration error: " + variable)
    assert "Traceback" not in result.stderr


def test_it_starts_with_the_defaults_and_generates_a_development_key(tmp_path) -> None:
    result = run_manage(tmp_path)
    assert result.returncode == 0, result.stderr
    key = (tmp_path / "secret_key").read_text()
    assert len(key) >= 40
    assert run_manage(tmp_path).returncode == 0
    assert (tmp_path / "secret_key").read_text() == key


def test_it_reads_the_secret_key_from_a_file_with_debug_off(tmp_path) -> None:
    secret = tmp_path / "key"
    secret.write_text("k" * 60)
    result = run_manage(
        tmp_path, DEBUG="0", SECRET_KEY_FILE=str(secret), ALLOWED_HOSTS="cairn.example"
    )
    assert result.returncode == 0, result.stderr


def test_sqlite_default_uses_wal_and_immediate_transactions() -> None:
    """Settings measured in the shared stack notes (concurrent web server and worker)."""
    from django.conf import settings

    options = settings.SQLITE_OPTIONS
    assert options["transaction_mode"] == "IMMEDIATE"
    assert "journal_mode=WAL" in options["init_command"]
