"""Pages for adjudication, exports and detector uploads.

Each page fetches through studies.access (the review page through get_review_case, the only
path by which a non-coordinator sees every reader's points) and acts through services.
"""

from __future__ import annotations

import math
import uuid

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.http import Http404, HttpRequest, HttpResponse
from django.shortcuts import redirect, render
from django.urls import reverse

from studies.access import get_review_case, get_study, roles_in
from studies.api.adjudication import REVIEW_ROLES, review_dict
from studies.api.payloads import queue_item_dict
from studies.constants import AdjudicationDecision, Role
from studies.services import adjudication, exports, predictions
from studies.services.errors import ServiceError


@login_required
def adjudication_queue(request: HttpRequest, slug: str) -> HttpResponse:
    """The flagged case x landmark pairs of the latest analysis, worst first."""
    study = get_study(request.user, slug, REVIEW_ROLES)
    items = [queue_item_dict(i, slug) for i in adjudication.adjudication_queue(study)]
    return render(
        request,
        "viewer/adjudication.html",
        {
            "study": study,
            "run": adjudication.latest_completed_run(study),
            "items": items,
            "open": sum(1 for i in items if i["decision"] is None),
            "is_coordinator": Role.COORDINATOR in roles_in(request.user, study),
        },
    )


def _number(text: str | None) -> float | None:
    try:
        value = float(text) if text not in (None, "") else None
    except ValueError:
        raise ServiceError(f"not a number: {text!r}") from None
    if value is not None and not math.isfinite(value):
        raise ServiceError(f"not a finite number: {text!r}")
    return value


def _decision_from(post) -> adjudication.DecisionInput:
    choice = post.get("choice", "")
    source = None
    if choice.startswith("read:"):
        decision, source = AdjudicationDecision.TAKE_READER, choice.removeprefix("read:")
    else:
        decision = choice
    try:
        event_id = uuid.UUID(post.get("client_event_id", ""))
    except ValueError:
        raise ServiceError("the form is incomplete; reload the page") from None
    is_new = decision == AdjudicationDecision.NEW_POINT
    return adjudication.DecisionInput(
        decision=decision,
        reason=post.get("reason", ""),
        client_event_id=event_id,
        source_read=source,
        run=post.get("run") or None,
        x_mm=_number(post.get("x_mm")) if is_new else None,
        y_mm=_number(post.get("y_mm")) if is_new else None,
        z_mm=_number(post.get("z_mm")) if is_new else None,
    )


@login_required
def review(request: HttpRequest, slug: str, case: uuid.UUID, landmark: str) -> HttpResponse:
    """One case x landmark under review: every reader's point, the consensus, a decision."""
    found = get_review_case(request.user, slug, str(case))
    status = 200
    if request.method == "POST":
        try:
            adjudication.record_decision(
                found, landmark, request.user, _decision_from(request.POST)
            )
        except ServiceError as error:
            messages.error(request, str(error))
            status = error.status_code
        else:
            messages.success(request, f"Decision recorded for {landmark} on {found.pseudonym}.")
            return redirect("viewer-adjudication", slug=slug)
    show_label = Role.COORDINATOR in roles_in(request.user, found.study)
    try:
        detail = review_dict(found, landmark, show_label)
    except ServiceError:
        raise Http404(f"landmark {landmark!r} is not in this study's protocol") from None
    config = {
        "api": {
            "detail": reverse(
                "studies-review-detail",
                kwargs={"slug": slug, "case": found.code, "landmark": landmark},
            )
        },
        "queue": reverse("viewer-adjudication", kwargs={"slug": slug}),
    }
    return render(
        request,
        "viewer/adjudication_review.html",
        {
            "study": found.study,
            "detail": detail,
            "config": config,
            "client_event_id": uuid.uuid4(),
            "form": request.POST if status != 200 else {},
        },
        status=status,
    )


@login_required
def exports_page(request: HttpRequest, slug: str) -> HttpResponse:
    """Download links for the reference set, events, analysis tables and the archive."""
    study = get_study(request.user, slug, (Role.COORDINATOR,))
    run = adjudication.latest_completed_run(study)
    return render(
        request,
        "viewer/adjudication_exports.html",
        {
            "study": study,
            "run": run,
            "tables": list(run.tables) if run else [],
            "n_decisions": study.adjudications.count(),
            "command": f"python manage.py export_reference {study.slug} --out DIR",
            "no_analysis": None
            if run
            else str(
                exports.NoAnalysisError(f"study {study.slug!r} has no completed analysis yet")
            ),
        },
    )


def _cell(value: object) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    if isinstance(value, float):
        return f"{value:.3f}"
    return str(value)


@login_required
def predictions_page(request: HttpRequest, slug: str) -> HttpResponse:
    """Upload a detector's predictions CSV; every bad row is listed, nothing stored then."""
    study = get_study(request.user, slug, (Role.COORDINATOR,))
    row_errors, status = [], 200
    if request.method == "POST":
        upload = request.FILES.get("file")
        try:
            if upload is None:
                raise ServiceError("choose a CSV file to upload")
            if upload.size > predictions.MAX_UPLOAD_BYTES:
                raise ServiceError(
                    f"the file is {upload.size} bytes; the limit is {predictions.MAX_UPLOAD_BYTES}"
                )
            run = predictions.upload_predictions(
                study,
                request.user,
                upload.read(),
                name=request.POST.get("name", ""),
                file_name=upload.name or "",
            )
        except predictions.PredictionsError as error:
            messages.error(request, str(error))
            row_errors, status = [e.as_dict() for e in error.row_errors], 400
        except ServiceError as error:
            messages.error(request, str(error))
            status = error.status_code
        else:
            messages.success(request, f"Detector {run.name!r} scored on {run.n_rows} rows.")
            return redirect("viewer-predictions", slug=slug)
    runs = list(study.detector_runs.select_related("uploaded_by")[:10])
    return render(
        request,
        "viewer/adjudication_predictions.html",
        {
            "study": study,
            "runs": runs,
            "row_errors": row_errors,
            "latest": {
                name: {
                    "columns": list(frame.columns),
                    "rows": [[_cell(v) for v in row] for row in frame.values.tolist()],
                }
                for name, frame in predictions.latest_detector_tables(study).items()
            },
        },
        status=status,
    )
