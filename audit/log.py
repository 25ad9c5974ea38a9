"""Writing and reading the audit log.

Services call `record` for exports and role changes, inside their own transaction, so an
entry exists exactly when the action took effect. Login signals call it from
`audit.receivers`. `entries_for_study` is what a study's coordinators may see.
"""

from __future__ import annotations

from django.db.models import Q, QuerySet
from django.http import HttpRequest, HttpResponse

from .models import AuditEntry, AuditKind

#: Longest user name kept for a failed login (longer input is cut, never refused).
USERNAME_MAX = 150


class AuditKindError(ValueError):
    """`record` was asked for a kind the audit log does not know."""


def client_address(request: HttpRequest | None) -> str | None:
    """The client's address as the WSGI server saw it (the proxy's own when behind one)."""
    if request is None:
        return None
    return request.META.get("REMOTE_ADDR") or None


def record(
    kind: str,
    *,
    actor=None,
    username: str = "",
    study=None,
    subject=None,
    request: HttpRequest | None = None,
    **detail: object,
) -> AuditEntry:
    """Append one audit entry and return it.

    `actor` is the user who acted (None for a failed login); `username` defaults to the
    actor's. `study` ties the entry to a study; `subject` is the user a role change is
    about. `detail` keys are stored as given and must be JSON values.
    """
    if kind not in AuditKind.values:
        raise AuditKindError(
            f"unknown audit kind {kind!r}; use one of {', '.join(AuditKind.values)}"
        )
    if not username and actor is not None:
        username = actor.get_username()
    return AuditEntry.objects.create(
        kind=kind,
        actor=actor if actor is not None and actor.pk is not None else None,
        username=str(username)[:USERNAME_MAX],
        study=study,
        study_slug=study.slug if study is not None else "",
        subject=subject,
        ip_address=client_address(request),
        detail=detail,
    )


def export_download(request: HttpRequest, study, response: HttpResponse,
                    name: str) -> HttpResponse:
    """Make `response` a download named `name`, recorded in the audit log as an export.

    The one way every download (API exports, dashboard tables, reports, protocols) is
    named and audited.
    """
    record(AuditKind.EXPORT, actor=request.user, study=study, request=request, file=name)
    response["Content-Disposition"] = f'attachment; filename="{name}"'
    return response


def entries_for_study(study) -> QuerySet[AuditEntry]:
    """The study's own entries, plus its members' logins, sign-outs, password changes and
    failed logins.

    A failed login is matched on the user name typed, so attempts on a member's name
    show even when no account was authenticated.
    """
    member_ids = list(study.memberships.values_list("user_id", flat=True).distinct())
    member_names = list(study.memberships.values_list("user__username", flat=True).distinct())
    logins = Q(kind__in=[AuditKind.LOGIN, AuditKind.LOGOUT, AuditKind.PASSWORD_CHANGED],
               actor_id__in=member_ids)
    failures = Q(kind=AuditKind.LOGIN_FAILED, username__in=member_names)
    return AuditEntry.objects.filter(Q(study=study) | logins | failures).select_related(
        "actor", "subject"
    )
