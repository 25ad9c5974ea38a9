"""The audit log: one append-only row per security-relevant action.

Entries are written only through `audit.log.record`. A study's coordinators see the
entries of their study, and the logins, sign-outs, password changes and failed logins of
its members.
"""

from __future__ import annotations

from django.conf import settings
from django.db import models
from django.utils import timezone


class AuditKind(models.TextChoices):
    LOGIN = "login", "Logged in"
    LOGIN_FAILED = "login_failed", "Failed login"
    LOGOUT = "logout", "Logged out"
    EXPORT = "export", "Export"
    ROLE_ADDED = "role_added", "Role given"
    ROLE_REMOVED = "role_removed", "Role taken away"
    PASSWORD_CHANGED = "password_changed", "Password changed"


class AuditEntryQuerySet(models.QuerySet):
    """Audit entries are append-only: bulk updates and deletes are refused."""

    def update(self, **kwargs):
        raise PermissionError("audit entries are append-only and cannot be updated")

    def delete(self):
        raise PermissionError("audit entries are append-only and cannot be deleted")


class AuditEntry(models.Model):
    """Who did what, when, from where; `username` keeps the name typed at a failed login.

    `study` is set for study actions (exports, role changes); `study_slug` keeps the slug
    should the study be deleted. `detail` holds small, non-identifying facts (the role
    given, the export's format and file count); never a password or patient data.
    """

    created_at = models.DateTimeField(default=timezone.now, db_index=True)
    kind = models.CharField(max_length=16, choices=AuditKind)
    actor = models.ForeignKey(
        settings.AUTH_USER_MODEL,
        on_delete=models.SET_NULL,
        null=True,
        blank=True,
        related_name="+",
    )
    username = models.CharField(max_length=150, blank=True)
    subject = models.ForeignKey(
        settings.AUTH_USER_MODEL,
        on_delete=models.SET_NULL,
        null=True,
        blank=True,
        related_name="+",
        help_text="The user a role change applies to.",
    )
    study = models.ForeignKey(
        "studies.Study", on_delete=models.SET_NULL, null=True, blank=True, related_name="+"
    )
    study_slug = models.CharField(max_length=64, blank=True)
    ip_address = models.GenericIPAddressField(null=True, blank=True)
    detail = models.JSONField(default=dict, blank=True)

    objects = AuditEntryQuerySet.as_manager()

    class Meta:
        ordering = ["-created_at", "-pk"]
        verbose_name_plural = "audit entries"

    def __str__(self) -> str:
        return f"{self.created_at:%Y-%m-%d %H:%M:%S} {self.kind} {self.username}"

    def save(self, *args, **kwargs) -> None:
        if self.pk is not None:
            raise PermissionError("audit entries are append-only and cannot be changed")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise PermissionError("audit entries are append-only and cannot be deleted")
