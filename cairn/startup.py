"""Turning a configuration error into one line on stderr and a non-zero exit."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager

from .env import ConfigError


@contextmanager
def exit_on_config_error() -> Iterator[None]:
    try:
        yield
    except ConfigError as error:
        print(f"cairn: configuration error: {error}", file=sys.stderr)
        raise SystemExit(2) from None


def check_settings() -> None:
    """Load the settings now, so a bad value stops start-up before any work begins."""
    from django.conf import settings

    with exit_on_config_error():
        settings.INSTALLED_APPS  # noqa: B018 - touching it loads the settings module
