"""The coordinator's audit page and its CSV: logins, failed logins, exports, role changes.

Access goes through `studies.access.get_study` with the coordinator role, like every
other coordinator page; the entries come from `audit.log.entries_for_study`.
"""

from __future__ import annotations

import csv
import io
import json

from django.contrib.auth.decorators import login_required
from django.core.paginator import Paginator
from django.db.models import QuerySet
from django.http import HttpRequest, HttpResponse
from django.shortcuts import render

from audit import log as audit
from audit.models import AuditKind
from studies.access import get_study
from studies.constants import Role

#: Entries per page of the audit log.
PAGE_SIZE = 100
CSV_COLUMNS = ("time_utc", "what", "who", "about", "details", "address")


def _entries(request: HttpRequest, study) -> tuple[QuerySet, str]:
    """The study's entries, of one kind when ?kind= names one (else all), and that kind."""
    kind = request.GET.get("kind", "")
    entries = audit.entries_for_study(study)
    if kind in AuditKind.values:
        return entries.filter(kind=kind), kind
    return entries, ""


@login_required
def study_audit(request: HttpRequest, slug: str) -> HttpResponse:
    """The study's audit entries, newest first, a page at a time (?page=N, ?kind=K)."""
    study = get_study(request.user, slug, [Role.COORDINATOR])
    entries, kind = _entries(request, study)
    page = Paginator(entries, PAGE_SIZE).get_page(request.GET.get("page"))
    return render(request, "viewer/audit.html",
                  {"study": study, "page": page, "kind": kind, "kinds": AuditKind.choices})


@login_required
def study_audit_csv(request: HttpRequest, slug: str) -> HttpResponse:
    """All of the study's audit entries (or one ?kind=) as CSV, newest first; the download
    is itself recorded as an export."""
    study = get_study(request.user, slug, [Role.COORDINATOR])
    entries, kind = _entries(request, study)
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for e in entries.select_related("subject"):
        writer.writerow([
            e.created_at.strftime("%Y-%m-%dT%H:%M:%SZ"), e.kind, e.username,
            e.subject.username if e.subject else "", json.dumps(e.detail, sort_keys=True),
            e.ip_address or "",
        ])
    response = HttpResponse(out.getvalue(), content_type="text/csv; charset=utf-8")
    name = f"{study.slug}-audit{'-' + kind if kind else ''}.csv"
    return audit.export_download(request, study, response, name)
