"""Adjudication API: the queue, one case x landmark under review, decisions, review voxels.

Every case is fetched through studies.access.get_review_case, the only path by which a
non-coordinator sees all readers' points.
"""

from __future__ import annotations

from pathlib import Path

from django.conf import settings
from django.http import Http404, HttpResponse
from django.urls import reverse
from drf_spectacular.utils import OpenApiResponse, extend_schema
from rest_framework import serializers
from rest_framework.request import Request
from rest_framework.response import Response
from rest_framework.views import APIView

from ..access import get_review_case, get_study, roles_in
from ..constants import AdjudicationDecision, Role
from ..imaging.storage import COARSE_NAME, VIEWER_NAME
from ..services import adjudication
from ..services.errors import ServiceError
from . import payloads
from .serializers import ErrorSerializer

REVIEW_ROLES = (Role.COORDINATOR, Role.ADJUDICATOR)
_VOLUME_FILES = {"full": VIEWER_NAME, "coarse": COARSE_NAME}
_ERRORS = {
    400: OpenApiResponse(ErrorSerializer, description="Refused; nothing was stored."),
    403: OpenApiResponse(ErrorSerializer),
    404: OpenApiResponse(ErrorSerializer),
}


class DecisionInputSerializer(serializers.Serializer):
    client_event_id = serializers.UUIDField()
    decision = serializers.ChoiceField(choices=AdjudicationDecision.choices)
    reason = serializers.CharField(max_length=500, allow_blank=True)
    source_read = serializers.CharField(required=False, allow_null=True, allow_blank=True)
    x_mm = serializers.FloatField(required=False, allow_null=True)
    y_mm = serializers.FloatField(required=False, allow_null=True)
    z_mm = serializers.FloatField(required=False, allow_null=True)
    run = serializers.CharField(
        required=False,
        allow_null=True,
        allow_blank=True,
        help_text="The analysis run the page showed (stale: 409).",
    )


CONSENSUS_FIELDS = (
    "method",
    "x_mm",
    "y_mm",
    "z_mm",
    "se_mm",
    "n_readers",
    "n_absent",
    "flagged",
    "reasons",
    "note",
)


def review_dict(case, landmark_code: str, show_label: bool) -> dict:
    """Everything the review page shows for one case x landmark.

    `consensus` and `analysis_run` are null when no completed analysis covers the case yet
    (coordinators may open any case; a decision is then refused by the service).
    """
    landmark = adjudication.review_landmark(case, landmark_code)
    run = adjudication.latest_completed_run(case.study)
    consensus = None
    if run is not None:
        try:
            row = adjudication.consensus_row(run, case, landmark)
        except ServiceError:  # the case was added after the latest analysis
            row = None
        consensus = None if row is None else {k: row[k] for k in CONSENSUS_FIELDS}
    slug = case.study.slug
    return {
        "study": slug,
        "case": case.pseudonym,
        "case_code": str(case.code),
        "case_label": case.label if show_label else None,
        "landmark": payloads.landmark_dict(landmark),
        "analysis_run": str(run.code) if run else None,
        "consensus": consensus,
        "readers": [
            payloads.reader_point_dict(p) for p in adjudication.reader_placements(case, landmark)
        ],
        "decisions": [
            payloads.decision_dict(e) for e in adjudication.decision_history(case, landmark)
        ],
        "volume": payloads.case_volume_dict(case, slug),
        "api": {
            "decisions": reverse(
                "studies-review-decisions",
                kwargs={"slug": slug, "case": case.code, "landmark": landmark.code},
            )
        },
    }


class AdjudicationQueue(APIView):
    @extend_schema(
        summary="Flagged case x landmark pairs of the latest analysis, worst first",
        responses={200: dict, **_ERRORS},
    )
    def get(self, request: Request, slug: str) -> Response:
        study = get_study(request.user, slug, REVIEW_ROLES)
        items = adjudication.adjudication_queue(study)
        run = adjudication.latest_completed_run(study)
        return Response(
            {
                "analysis_run": str(run.code) if run else None,
                "items": [payloads.queue_item_dict(item, slug) for item in items],
            }
        )


class ReviewDetail(APIView):
    @extend_schema(
        summary="One case x landmark under review: every reader's point, the "
        "consensus, the decisions so far, the volume header",
        responses={200: dict, **_ERRORS},
    )
    def get(self, request: Request, slug: str, case: str, landmark: str) -> Response:
        found = get_review_case(request.user, slug, case)
        show_label = Role.COORDINATOR in roles_in(request.user, found.study)
        return Response(review_dict(found, landmark, show_label))


class ReviewDecisions(APIView):
    @extend_schema(
        summary="Record an adjudication decision (idempotent on client_event_id)",
        request=DecisionInputSerializer,
        responses={201: dict, 200: dict, 409: ErrorSerializer, **_ERRORS},
    )
    def post(self, request: Request, slug: str, case: str, landmark: str) -> Response:
        found = get_review_case(request.user, slug, case)
        form = DecisionInputSerializer(data=request.data)
        form.is_valid(raise_exception=True)
        event, created = adjudication.record_decision(
            found, landmark, request.user, adjudication.DecisionInput(**form.validated_data)
        )
        return Response(
            {"created": created, "decision": payloads.decision_dict(event)},
            status=201 if created else 200,
        )


class ReviewVolume(APIView):
    @extend_schema(
        summary="A reviewed case's voxels: raw little-endian, i fastest",
        responses={(200, "application/octet-stream"): bytes, **_ERRORS},
    )
    def get(self, request: Request, slug: str, case: str, level: str) -> HttpResponse:
        from .views import volume_response

        found = get_review_case(request.user, slug, case)
        if level not in _VOLUME_FILES:
            raise Http404("no such volume level")
        path = Path(settings.CAIRN_DATA_DIR) / found.data_dir / _VOLUME_FILES[level]
        return volume_response(request, path)
