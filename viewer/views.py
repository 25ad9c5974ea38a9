"""HTML pages. Each fetches its objects through studies.access and reads through services."""

from __future__ import annotations

from django.contrib.auth.decorators import login_required
from django.db.models import Count, Min, Q
from django.http import HttpRequest, HttpResponse
from django.shortcuts import render
from django.urls import reverse

from studies.access import get_own_read, get_study, roles_in, studies_for
from studies.api.payloads import read_dict
from studies.constants import ReadStatus, Role, StudyStatus
from studies.services import reads


@login_required
def home(request: HttpRequest) -> HttpResponse:
    """One page for every role: coordinated studies, adjudication queues, reading worklists."""
    coordinated = studies_for(request.user, Role.COORDINATOR).annotate(
        n_cases=Count("cases", distinct=True),
        n_reads=Count("reads", distinct=True),
        n_submitted=Count("reads", filter=Q(reads__status=ReadStatus.SUBMITTED), distinct=True),
    )
    reading = studies_for(request.user, Role.READER)
    return render(
        request,
        "viewer/home.html",
        {
            "coordinated": coordinated,
            "adjudicated": studies_for(request.user, Role.ADJUDICATOR),
            "worklists": [worklist_context(request.user, study) for study in reading],
        },
    )


def worklist_context(user, study) -> dict:
    """A reader's worklist for one study, with the progress of their own work only."""
    available = list(reads.worklist(user, study))
    own = study.reads.filter(reader=user)
    submitted = own.filter(status=ReadStatus.SUBMITTED).count()
    total = own.count()
    upcoming = next((r for r in available if r.status != ReadStatus.SUBMITTED), None)
    # Reads still in their washout are hidden; say how many, and from when, so the count
    # above the list adds up (nothing about which case they are).
    later = own.none()
    if study.status == StudyStatus.OPEN:
        later = own.exclude(pk__in=[r.pk for r in available]).exclude(
            status=ReadStatus.SUBMITTED)
    return {
        "study": study,
        "reads": available,
        "submitted": submitted,
        "total": total,
        "percent": round(100 * submitted / total) if total else 0,
        "next_read": upcoming,
        "later": later.count(),
        "later_from": later.filter(available_from__isnull=False)
        .aggregate(first=Min("available_from"))["first"],
    }


@login_required
def study_detail(request: HttpRequest, slug: str) -> HttpResponse:
    """The coordinator's view of a study: protocol, cases, readers and their reads."""
    study = get_study(request.user, slug, [Role.COORDINATOR])
    readers = (
        study.memberships.filter(role=Role.READER).select_related("user").order_by("user__username")
    )
    per_reader = {
        row["reader"]: row
        for row in study.reads.values("reader").annotate(
            assigned=Count("id"),
            submitted=Count("id", filter=Q(status=ReadStatus.SUBMITTED)),
            started=Count("id", filter=Q(status=ReadStatus.OPEN)),
            washout=Count("id", filter=Q(available_from__isnull=True)),
        )
    }
    cases = study.cases.annotate(
        n_reads=Count("reads"),
        n_submitted=Count("reads", filter=Q(reads__status=ReadStatus.SUBMITTED)),
    ).order_by("label")
    return render(
        request,
        "viewer/study_detail.html",
        {
            "study": study,
            "roles": roles_in(request.user, study),
            "landmarks": study.current_landmarks(),
            "readers": [(m.user, per_reader.get(m.user_id, {})) for m in readers],
            "cases": cases,
            "members": study.memberships.select_related("user").order_by("role", "user__username"),
        },
    )


@login_required
def read_page(request: HttpRequest, code: str) -> HttpResponse:
    """The reading page for one of the reader's own reads; the page loads the rest by API."""
    read = get_own_read(request.user, code)
    config = {
        "read": read_dict(read),
        "api": {
            "detail": reverse("studies-read-detail", kwargs={"code": read.code}),
            "events": reverse("studies-read-events", kwargs={"code": read.code}),
            "submit": reverse("studies-read-submit", kwargs={"code": read.code}),
            "activity": reverse("studies-read-activity", kwargs={"code": read.code}),
        },
        "home": reverse("viewer-home"),
    }
    return render(request, "viewer/read.html", {"read": read, "config": config})
