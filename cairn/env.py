"""Reading settings from environment variables, failing loudly on malformed values.

Each helper raises `ConfigError` with a one-line message that names the variable;
manage.py, wsgi.py and the Celery app print that line and exit instead of a traceback.
A secret can also be given as ``NAME_FILE``: the path of a file holding the value.
"""

from __future__ import annotations

import os
from pathlib import Path

from django.core.exceptions import ImproperlyConfigured

_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


class ConfigError(ImproperlyConfigured):
    """A malformed or missing environment setting."""


def envstr(name: str, default: str) -> str:
    return os.environ.get(name, default)


def envbool(name: str, default: bool) -> bool:
    raw = os.environ.get(name)
    if raw is None:
        return default
    value = raw.strip().lower()
    if value in _TRUE:
        return True
    if value in _FALSE:
        return False
    raise ConfigError(f"{name}: expected a boolean (1/0, true/false, yes/no), got {raw!r}")


def envint(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None:
        return default
    try:
        return int(raw)
    except ValueError:
        raise ConfigError(f"{name}: expected an integer, got {raw!r}") from None


def envlist(name: str, default: list[str]) -> list[str]:
    raw = os.environ.get(name)
    if raw is None:
        return default
    return [item.strip() for item in raw.split(",") if item.strip()]


def envsecret(name: str) -> str | None:
    """The value of NAME, or the contents of the file named by NAME_FILE, or None."""
    if name in os.environ:
        return os.environ[name]
    path = os.environ.get(f"{name}_FILE")
    if path is None:
        return None
    try:
        return Path(path).read_text().strip()
    except OSError as error:
        raise ConfigError(f"{name}_FILE: cannot read {path!r}: {error.strerror}") from None


def development_secret_key(var_dir: Path) -> str:
    """A random key generated once into var/ so development sessions survive restarts."""
    from django.core.management.utils import get_random_secret_key

    path = var_dir / "secret_key"
    if not path.exists():
        var_dir.mkdir(parents=True, exist_ok=True)
        path.write_text(get_random_secret_key())
        path.chmod(0o600)
    return path.read_text().strip()
