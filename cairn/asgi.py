"""ASGI entry point."""

from __future__ import annotations

import os

from django.core.asgi import get_asgi_application

from .startup import exit_on_config_error

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "cairn.settings")
with exit_on_config_error():
    application = get_asgi_application()
