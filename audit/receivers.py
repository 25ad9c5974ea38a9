"""Login, logout and failed-login signals into the audit log."""

from __future__ import annotations

from django.contrib.auth.signals import user_logged_in, user_logged_out, user_login_failed
from django.dispatch import receiver

from .log import record
from .models import AuditKind


@receiver(user_logged_in, dispatch_uid="audit-login")
def on_login(sender, request, user, **kwargs) -> None:
    record(AuditKind.LOGIN, actor=user, request=request)


@receiver(user_logged_out, dispatch_uid="audit-logout")
def on_logout(sender, request, user, **kwargs) -> None:
    if user is not None:
        record(AuditKind.LOGOUT, actor=user, request=request)


@receiver(user_login_failed, dispatch_uid="audit-login-failed")
def on_login_failed(sender, credentials, request=None, **kwargs) -> None:
    # Django has already masked the password in `credentials`; keep only the user name.
    record(AuditKind.LOGIN_FAILED, username=str(credentials.get("username", "")), request=request)
