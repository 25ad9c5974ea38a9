"""The coordinator's analysis endpoint: the latest run's state (polled for the progress bar)
and a request to run the analysis now."""

from __future__ import annotations

from drf_spectacular.utils import OpenApiResponse, extend_schema, inline_serializer
from rest_framework import serializers
from rest_framework.request import Request
from rest_framework.response import Response
from rest_framework.views import APIView

from ..access import get_study
from ..constants import Role
from ..reporting.report import run_status
from ..services.analysis_runs import request_analysis
from .serializers import ErrorSerializer

RunStatusSerializer = inline_serializer(
    name="AnalysisRunStatus",
    fields={
        "code": serializers.UUIDField(required=False),
        "status": serializers.ChoiceField(
            choices=["none", "pending", "running", "completed", "failed"]),
        "progress": serializers.FloatField(help_text="0 to 1"),
        "message": serializers.CharField(),
        "reason": serializers.CharField(required=False),
        "n_reads": serializers.IntegerField(required=False),
        "n_placements": serializers.IntegerField(required=False),
        "requested_at": serializers.DateTimeField(required=False),
        "finished_at": serializers.DateTimeField(required=False, allow_null=True),
    },
)
_ERRORS = {403: OpenApiResponse(ErrorSerializer), 404: OpenApiResponse(ErrorSerializer)}


class StudyAnalysis(APIView):
    """The latest analysis run of a study (coordinators only)."""

    @extend_schema(summary="The latest analysis run of a study and its progress",
                   responses={200: RunStatusSerializer, **_ERRORS})
    def get(self, request: Request, slug: str) -> Response:
        study = get_study(request.user, slug, [Role.COORDINATOR])
        return Response(run_status(study))

    @extend_schema(summary="Run the analysis of the study's submitted reads now",
                   request=None, responses={202: RunStatusSerializer, **_ERRORS})
    def post(self, request: Request, slug: str) -> Response:
        study = get_study(request.user, slug, [Role.COORDINATOR])
        request_analysis(study)
        return Response(run_status(study), status=202)
