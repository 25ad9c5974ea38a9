"""The Celery app, configured from Django settings (CELERY_ namespace)."""

from __future__ import annotations

import os

from celery import Celery

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "cairn.settings")

app = Celery("cairn")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()


def _check_settings_on_worker_start() -> None:
    from .startup import check_settings

    check_settings()


_check_settings_on_worker_start()
