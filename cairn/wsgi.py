"""WSGI entry point (gunicorn cairn.wsgi)."""

from __future__ import annotations

import os

from django.core.wsgi import get_wsgi_application

from .startup import exit_on_config_error

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "cairn.settings")
with exit_on_config_error():
    application = get_wsgi_application()
