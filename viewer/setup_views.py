"""The coordinator's set-up pages: create and edit a study, its protocol, members, preview.

Every page fetches its study through `studies.access.get_study` with the coordinator
role (outsiders get 404, other members 403) and changes state only through the services
in `studies.services`. A refused change shows the service's message and stores nothing;
a successful one redirects (POST-redirect-GET).

Who may create a study: staff users, and anyone who already coordinates a study (the
first study of a site is created by staff, in these pages or the admin).
"""

from __future__ import annotations

from django import forms
from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.db import transaction
from django.http import Http404, HttpRequest, HttpResponse
from django.shortcuts import redirect, render
from django.views.decorators.http import require_POST, require_safe

from audit import log as audit
from studies.access import get_study, studies_for
from studies.analysis.planning import (
    PlanningInputError,
    design_preview,
    expected_consensus_mre,
)
from studies.constants import Role, StudyStatus
from studies.models import Study
from studies.services import protocol_io
from studies.services import studies as study_services
from studies.services.errors import ServiceError

from .forms import (
    DesignForm,
    LandmarkFormSet,
    MemberForm,
    NewStudyForm,
    NewVersionForm,
    PreviewForm,
    ProtocolImportForm,
    StudyEditForm,
)

COORDINATOR = [Role.COORDINATOR]
EXPORT_TYPES = {"csv": "text/csv; charset=utf-8", "json": "application/json"}


def can_create_studies(user) -> bool:
    """Staff, and coordinators of any study, may create studies."""
    return bool(
        user.is_authenticated and (user.is_staff or studies_for(user, Role.COORDINATOR).exists())
    )


def _design_initial(study: Study | None = None) -> dict:
    if study is None:
        return {name: Study._meta.get_field(name).default for name in DesignForm.base_fields}
    return {name: getattr(study, name) for name in DesignForm.base_fields}


def _posted(request: HttpRequest):
    """The POST data of a POST (even an empty one, which must fail validation), else None."""
    return request.POST if request.method == "POST" else None


def _sentence(error: Exception) -> str:
    """A service message as a sentence that says nothing was stored."""
    text = str(error).rstrip(".")
    return f"{text[:1].upper()}{text[1:]}. Nothing was changed."


def _refused(form, error: ServiceError) -> None:
    form.add_error(None, _sentence(error))


@login_required
def study_new(request: HttpRequest) -> HttpResponse:
    """Create a draft study; the creator becomes its first coordinator."""
    if not can_create_studies(request.user):
        raise PermissionDenied("only staff and study coordinators can create studies")
    form = NewStudyForm(_posted(request), initial=_design_initial())
    if request.method == "POST" and form.is_valid():
        try:
            study = study_services.create_study(
                name=form.cleaned_data["name"],
                slug=form.cleaned_data["slug"],
                description=form.cleaned_data["description"],
                coordinator=request.user,
                **form.design(),
            )
        except ServiceError as error:
            _refused(form, error)
        else:
            messages.success(request, f"Study {study.name!r} created. Next: its landmark protocol.")
            return redirect("viewer-study-protocol", slug=study.slug)
    status = 400 if form.is_bound else 200
    return render(request, "viewer/setup_study_form.html", {"form": form}, status=status)


@login_required
def study_edit(request: HttpRequest, slug: str) -> HttpResponse:
    """Name and description in any status; the design only while the study is a draft."""
    study = get_study(request.user, slug, COORDINATOR)
    draft = study.status == StudyStatus.DRAFT
    initial = {"name": study.name, "description": study.description, **_design_initial(study)}
    form = StudyEditForm(_posted(request), initial=initial, design_editable=draft)
    if request.method == "POST" and form.is_valid():
        try:
            with transaction.atomic():
                study_services.update_details(
                    study,
                    name=form.cleaned_data["name"],
                    description=form.cleaned_data["description"],
                )
                if draft:
                    study_services.update_design(study, **form.design())
        except ServiceError as error:
            study.refresh_from_db()
            _refused(form, error)
        else:
            messages.success(request, "Study saved.")
            return redirect("viewer-study", slug=study.slug)
    context = {
        "form": form,
        "study": study,
        "design_editable": draft,
        "n_readers": study.memberships.filter(role=Role.READER).count(),
    }
    status = 400 if form.is_bound else 200
    return render(request, "viewer/setup_study_form.html", context, status=status)


def _protocol_context(study: Study, formset=None, import_form=None, errors=()) -> dict:
    current = protocol_io.landmark_items(study.current_landmarks())
    versions = sorted(set(study.landmarks.values_list("protocol_version", flat=True)))
    return {
        "study": study,
        "landmarks": current,
        "formset": formset or LandmarkFormSet(initial=current, prefix="lm"),
        "import_form": import_form or ProtocolImportForm(prefix="imp"),
        "editable": study.status != StudyStatus.CLOSED,
        "needs_version": study.status == StudyStatus.OPEN,
        "next_version": study.protocol_version + 1,
        "versions": versions,
        "errors": list(errors),
    }


def _protocol_items(request: HttpRequest, study: Study, action: str):
    """(items, formset, import_form, errors) from a protocol POST; items None when refused."""
    formset = import_form = None
    errors: list[str] = []
    if study.status == StudyStatus.OPEN:
        version = NewVersionForm(request.POST, prefix="ver", current_version=study.protocol_version)
        if not version.is_valid():
            errors += version.non_field_errors()
    if action == "import":
        import_form = ProtocolImportForm(request.POST, request.FILES, prefix="imp")
        if import_form.is_valid() and not errors:
            try:
                fmt, text = import_form.format_and_text()
                return protocol_io.parse_protocol(text, fmt), None, import_form, errors
            except ServiceError as error:
                errors.append(_sentence(error))
            except forms.ValidationError as error:
                errors += error.messages
        errors += [e for field in import_form.errors.values() for e in field]
    else:
        formset = LandmarkFormSet(request.POST, prefix="lm")
        if formset.is_valid() and not errors:
            return formset.items(), formset, None, errors
        errors += [str(e) for e in formset.non_form_errors()]
    return None, formset, import_form, errors


@login_required
def study_protocol(request: HttpRequest, slug: str) -> HttpResponse:
    """Edit or import the landmark protocol; an open study needs an explicit new version."""
    study = get_study(request.user, slug, COORDINATOR)
    if request.method != "POST":
        return render(request, "viewer/setup_protocol.html", _protocol_context(study))
    if study.status == StudyStatus.CLOSED:
        context = _protocol_context(
            study, errors=["This study is closed: its protocol cannot change. Nothing was changed."]
        )
        return render(request, "viewer/setup_protocol.html", context, status=400)
    action = request.POST.get("action", "save")
    items, formset, import_form, errors = _protocol_items(request, study, action)
    if items is not None:
        try:
            landmarks = study_services.set_protocol(study, items)
        except ServiceError as error:
            errors.append(_sentence(error))
        else:
            study.refresh_from_db()
            messages.success(
                request,
                f"Protocol version {study.protocol_version} saved with {len(landmarks)} landmarks.",
            )
            return redirect("viewer-study-protocol", slug=study.slug)
    study.refresh_from_db()
    if not any("Nothing was changed" in error for error in errors):
        errors.append("Nothing was changed.")
    context = _protocol_context(study, formset, import_form, errors)
    return render(request, "viewer/setup_protocol.html", context, status=400)


@login_required
@require_safe
def study_protocol_export(request: HttpRequest, slug: str, fmt: str) -> HttpResponse:
    """Download a protocol version (the current one unless ?version=N) as CSV or JSON.

    The download is recorded in the audit log as an export.
    """
    study = get_study(request.user, slug, COORDINATOR)
    if fmt not in EXPORT_TYPES:
        raise Http404("no such export format")
    raw = request.GET.get("version", str(study.protocol_version))
    if not raw.isdigit():
        raise Http404("no such protocol version")
    version = int(raw)
    items = protocol_io.landmark_items(study.landmarks.filter(protocol_version=version))
    if not items:
        raise Http404("no such protocol version")
    if fmt == "csv":
        body = protocol_io.protocol_to_csv(items)
    else:
        body = protocol_io.protocol_to_json(items, study=study.slug, protocol_version=version)
    response = HttpResponse(body, content_type=EXPORT_TYPES[fmt])
    return audit.export_download(request, study, response,
                                 f"{study.slug}-protocol-v{version}.{fmt}")


@login_required
def study_members(request: HttpRequest, slug: str) -> HttpResponse:
    """The study's members and their roles; add an existing user with a role."""
    study = get_study(request.user, slug, COORDINATOR)
    form = MemberForm(_posted(request))
    if request.method == "POST" and form.is_valid():
        user, role = form.cleaned_data["username"], form.cleaned_data["role"]
        try:
            study_services.add_member(study, user, role, by=request.user)
        except ServiceError as error:
            _refused(form, error)
        else:
            messages.success(request, f"{user.get_username()} added as {role}.")
            return redirect("viewer-study-members", slug=study.slug)
    members = list(study.memberships.select_related("user").order_by("role", "user__username"))
    _mark_kept_roles(study, members)
    context = {
        "study": study,
        "form": form,
        "members": members,
        "n_readers": sum(1 for m in members if m.role == Role.READER),
    }
    return render(
        request, "viewer/setup_members.html", context, status=400 if form.is_bound else 200
    )


def _mark_kept_roles(study: Study, members: list) -> None:
    """Set `keeps_role` on members whose role cannot be taken away now, with the reason
    (the service decides; these are hints so the page offers no button that must fail)."""
    opened = set(study.reads.filter(opened_at__isnull=False).values_list("reader_id", flat=True))
    closed_with_reads = (set(study.reads.values_list("reader_id", flat=True))
                         if study.status == StudyStatus.CLOSED else set())
    coordinators = sum(1 for m in members if m.role == Role.COORDINATOR)
    for m in members:
        m.keeps_role = ""
        if m.role == Role.COORDINATOR and coordinators == 1:
            m.keeps_role = "the only coordinator"
        elif m.role == Role.READER and m.user_id in opened:
            m.keeps_role = "has opened reads"
        elif m.role == Role.READER and m.user_id in closed_with_reads:
            m.keeps_role = "the study is closed"


@login_required
@require_POST
def study_member_remove(request: HttpRequest, slug: str) -> HttpResponse:
    """Take one role away from one member (the service says when it cannot)."""
    study = get_study(request.user, slug, COORDINATOR)
    username, role = request.POST.get("username", ""), request.POST.get("role", "")
    membership = (study.memberships.select_related("user")
                  .filter(user__username=username, role=role).first())
    if membership is None:
        messages.error(request, f"{username!r} is not {role or 'a member'} in this study. "
                                "Nothing was changed.")
        return redirect("viewer-study-members", slug=study.slug)
    try:
        dropped = study_services.remove_member(study, membership.user, role, by=request.user)
    except ServiceError as error:
        messages.error(request, _sentence(error))
    else:
        moved = f" Their {dropped} unopened reads went to other readers." if dropped else ""
        messages.success(request, f"{username} is no longer {role}.{moved}")
    return redirect("viewer-study-members", slug=study.slug)


def _open_blockers(study: Study, n_cases: int, n_readers: int) -> list[str]:
    """Plain reasons the study cannot open yet (the service decides; these are hints)."""
    blockers = []
    if not study.current_landmarks().exists():
        blockers.append("Define the landmark protocol.")
    if n_cases == 0:
        blockers.append("Import at least one case.")
    if study.readers_per_case > n_readers:
        blockers.append(
            f"Readers per case is {study.readers_per_case} but the study has {n_readers} "
            "readers: add readers or lower k."
        )
    return blockers


@login_required
@require_safe
def study_preview(request: HttpRequest, slug: str) -> HttpResponse:
    """Reads per reader, reading load and expected consensus error for the study's design."""
    study = get_study(request.user, slug, COORDINATOR)
    form = PreviewForm(request.GET or None)
    assumptions = {name: field.initial for name, field in form.fields.items()}
    if form.is_bound and form.is_valid():
        assumptions = form.cleaned_data
    n_cases = study.cases.count()
    n_readers = study.memberships.filter(role=Role.READER).count()
    preview, problem = None, None
    try:
        preview = design_preview(
            n_cases,
            n_readers,
            study.readers_per_case,
            study.repeat_fraction,
            assumptions["minutes_per_read"],
            assumptions["sd_axis_mm"],
        )
    except PlanningInputError as error:
        problem = str(error)
    top_k = max(study.readers_per_case, n_readers, 2)
    by_k = [
        {
            "k": k,
            "mre_mm": expected_consensus_mre(assumptions["sd_axis_mm"], k),
            "chosen": k == study.readers_per_case,
        }
        for k in range(1, min(top_k, 12) + 1)
    ]
    context = {
        "study": study,
        "form": form,
        "n_cases": n_cases,
        "n_readers": n_readers,
        "preview": preview,
        "problem": problem,
        "by_k": by_k,
        "blockers": _open_blockers(study, n_cases, n_readers),
    }
    return render(
        request,
        "viewer/setup_preview.html",
        context,
        status=400 if form.is_bound and not form.is_valid() else 200,
    )


@login_required
@require_POST
def study_open(request: HttpRequest, slug: str) -> HttpResponse:
    """Open a draft study: freezes protocol and design and creates every reader's reads."""
    study = get_study(request.user, slug, COORDINATOR)
    try:
        study_services.open_study(study)
    except ServiceError as error:
        messages.error(request, f"The study was not opened: {error}. Nothing was changed.")
        return redirect("viewer-study-preview", slug=study.slug)
    messages.success(request, "The study is open; readers can start.")
    return redirect("viewer-study", slug=study.slug)


@login_required
@require_POST
def study_close(request: HttpRequest, slug: str) -> HttpResponse:
    """Close an open study: no new reads; submitted work and analyses stay."""
    study = get_study(request.user, slug, COORDINATOR)
    try:
        study_services.close_study(study)
    except ServiceError as error:
        messages.error(request, f"The study was not closed: {error}. Nothing was changed.")
    else:
        messages.success(request, "The study is closed; no more reading.")
    return redirect("viewer-study", slug=study.slug)
