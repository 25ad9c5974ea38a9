from __future__ import annotations

from django.apps import AppConfig


class AuditConfig(AppConfig):
    """The audit log: logins, failed logins, exports and role changes."""

    name = "audit"
    verbose_name = "Audit log"
    default_auto_field = "django.db.models.BigAutoField"

    def ready(self) -> None:
        from . import receivers  # noqa: F401 - connects the login signals
