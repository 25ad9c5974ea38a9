"""The one place that decides who may see what.

Every view and API endpoint fetches studies, cases and reads through these helpers.
Someone with no role in a study gets a 404 (the study does not exist for them); a member
without the needed role gets a 403. Readers reach only their own reads.
"""

from __future__ import annotations

from collections.abc import Iterable

from django.core.exceptions import PermissionDenied, ValidationError
from django.db.models import QuerySet
from django.http import Http404

from .constants import Role
from .models import Case, Read, Study


def roles_in(user, study: Study) -> set[str]:
    """The user's roles in the study (empty for anonymous users and outsiders)."""
    if not user.is_authenticated:
        return set()
    return set(study.memberships.filter(user=user).values_list("role", flat=True))


def studies_for(user, role: str | None = None) -> QuerySet[Study]:
    """Studies in which the user has any role, or the given one."""
    if not user.is_authenticated:
        return Study.objects.none()
    members = {"memberships__user": user}
    if role:
        members["memberships__role"] = role
    return Study.objects.filter(**members).distinct()


def get_study(user, slug: str, roles: Iterable[str] = (Role.COORDINATOR,)) -> Study:
    """The study with this slug, if the user holds one of `roles` in it."""
    try:
        study = Study.objects.get(slug=slug)
    except Study.DoesNotExist:
        raise Http404("no such study") from None
    held = roles_in(user, study)
    if not held:
        raise Http404("no such study")
    if not held & set(roles):
        raise PermissionDenied("your role in this study does not allow this")
    return study


def get_case(user, code: str, roles: Iterable[str] = (Role.COORDINATOR,)) -> Case:
    """A case, for users holding one of `roles` in its study (never for readers)."""
    case = Case.objects.select_related("study").filter(code=code).first()
    if case is None:
        raise Http404("no such case")
    get_study(user, case.study.slug, roles)
    return case


def get_own_read(user, code: str) -> Read:
    """A read, only for the reader it belongs to: everyone else gets a 404."""
    if not user.is_authenticated:
        raise Http404("no such read")
    # get(), not first(): no ORDER BY to compile on this hot path (every placement).
    try:
        return Read.objects.select_related("case", "study").get(code=code, reader=user)
    except Read.DoesNotExist:
        raise Http404("no such read") from None


def get_review_case(user, study_slug: str, case_code: str) -> Case:
    """A case for the review page: the one way a non-coordinator sees every reader's points.

    Coordinators may review any case of their study. Adjudicators may review only cases with
    a flagged landmark in the latest completed analysis (studies.services.studies.add_member
    keeps adjudicators from also reading). Outsiders get a 404; readers get a 403.
    """
    from .services.adjudication import queued_cases

    study = get_study(user, study_slug, (Role.COORDINATOR, Role.ADJUDICATOR))
    try:
        case = study.cases.select_related("study").filter(code=case_code).first()
    except (ValueError, ValidationError):
        case = None
    if case is None:
        raise Http404("no such case")
    held = roles_in(user, study)
    if Role.COORDINATOR in held:
        return case
    if case.pseudonym not in queued_cases(study):
        raise Http404("this case is not in the adjudication queue")
    return case
