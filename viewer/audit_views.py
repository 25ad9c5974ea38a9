"""The coordinator's audit page: logins, failed logins, exports and role changes.

Access goes through `studies.access.get_study` with the coordinator role, like every
other coordinator page; the entries come from `audit.log.entries_for_study`.
"""

from __future__ import annotations

from django.contrib.auth.decorators import login_required
from django.core.paginator import Paginator
from django.http import HttpRequest, HttpResponse
from django.shortcuts import render

from audit.log import entries_for_study
from studies.access import get_study
from studies.constants import Role

#: Entries per page of the audit log.
PAGE_SIZE = 100


@login_required
def study_audit(request: HttpRequest, slug: str) -> HttpResponse:
    """The study's audit entries, newest first, a page at a time (?page=N)."""
    study = get_study(request.user, slug, [Role.COORDINATOR])
    pages = Paginator(entries_for_study(study), PAGE_SIZE)
    page = pages.get_page(request.GET.get("page"))
    return render(request, "viewer/audit.html", {"study": study, "page": page})
