"""Export and detector API: reference set, events, analysis tables, archive, predictions.

Exports carry the coordinator-side case labels, so only coordinators may fetch them.
"""

from __future__ import annotations

from django.http import Http404, HttpResponse
from drf_spectacular.utils import OpenApiResponse, extend_schema, extend_schema_field
from rest_framework import serializers
from rest_framework.parsers import FormParser, MultiPartParser
from rest_framework.request import Request
from rest_framework.response import Response
from rest_framework.views import APIView

from audit import log as audit

from ..access import get_study
from ..constants import Role
from ..services import analysis_runs, exports, predictions
from ..services.errors import ServiceError
from .serializers import ErrorSerializer

_ERRORS = {
    403: OpenApiResponse(ErrorSerializer),
    404: OpenApiResponse(ErrorSerializer),
    409: OpenApiResponse(ErrorSerializer, description="No completed analysis yet."),
}
_CSV = "text/csv; charset=utf-8"


def _download(
    request: Request,
    study,
    data: bytes,
    content_type: str,
    name: str,
) -> HttpResponse:
    """An attachment download, recorded in the audit log as an export."""
    response = HttpResponse(data, content_type=content_type)
    response["Cache-Control"] = "no-store"
    return audit.export_download(request, study, response, name)


class ReferenceSetExport(APIView):
    @extend_schema(
        summary="The reference set (final point per case x landmark), CSV or JSON",
        responses={(200, "text/csv"): bytes, (200, "application/json"): dict, **_ERRORS},
    )
    def get(self, request: Request, slug: str, fmt: str) -> HttpResponse:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        if fmt not in ("csv", "json"):
            raise Http404("use reference_set.csv or reference_set.json")
        run = exports.completed_run(study)
        table = exports.reference_set(study, run)
        if fmt == "csv":
            return _download(
                request,
                study,
                table.to_csv(index=False, lineterminator="\n").encode(),
                _CSV,
                f"{slug}-reference_set.csv",
            )
        return _download(
            request,
            study,
            exports.reference_json(study, run, table),
            "application/json",
            f"{slug}-reference_set.json",
        )


class EventsExport(APIView):
    @extend_schema(
        summary="Every placement event (or, with kind=adjudication, every "
        "adjudication decision) as CSV",
        responses={(200, "text/csv"): bytes, **_ERRORS},
    )
    def get(self, request: Request, slug: str) -> HttpResponse:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        if request.query_params.get("kind") == "adjudication":
            table, stem = exports.adjudication_events_table(study), "adjudication_events"
        else:
            table, stem = exports.events_table(study), "events"
        return _download(
            request,
            study,
            table.to_csv(index=False, lineterminator="\n").encode(),
            _CSV,
            f"{slug}-{stem}.csv",
        )


class AnalysisTableExport(APIView):
    @extend_schema(
        summary="One result table of the latest completed analysis as CSV",
        responses={(200, "text/csv"): bytes, **_ERRORS},
    )
    def get(self, request: Request, slug: str, name: str) -> HttpResponse:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        run = exports.completed_run(study)
        if name not in run.tables:
            raise Http404(f"no table {name!r}; this run has {', '.join(run.tables)}")
        table = analysis_runs.frame_of(run.tables[name])
        return _download(
            request,
            study,
            table.to_csv(index=False, lineterminator="\n").encode(),
            _CSV,
            f"{slug}-{name}.csv",
        )


class ArchiveExport(APIView):
    @extend_schema(
        summary="The study archive: every export, manifest.json with SHA-256 "
        "checksums, parameters and code version (zip)",
        responses={(200, "application/zip"): bytes, **_ERRORS},
    )
    def get(self, request: Request, slug: str) -> HttpResponse:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        return _download(
            request, study, exports.archive_bytes(study), "application/zip", f"{slug}-archive.zip"
        )


@extend_schema_field({"type": "string", "format": "binary"})
class UploadedFileField(serializers.FileField):
    """A file sent as a multipart part; documented as binary (a plain FileField reads as a URI,
    its shape in responses)."""


class PredictionsUploadSerializer(serializers.Serializer):
    file = UploadedFileField()
    name = serializers.CharField(required=False, allow_blank=True, max_length=100)


def detector_run_dict(run) -> dict:
    return {
        "code": str(run.code),
        "name": run.name,
        "status": run.status,
        "uploaded_by": run.uploaded_by.username,
        "uploaded_at": run.uploaded_at.isoformat(),
        "n_rows": run.n_rows,
        "headline": run.summary.get("headline", {}),
        "tables": run.tables,
    }


class PredictionsUpload(APIView):
    parser_classes = [MultiPartParser, FormParser]

    @extend_schema(
        summary="Scored detector uploads of the study, newest first",
        responses={200: dict, **_ERRORS},
    )
    def get(self, request: Request, slug: str) -> Response:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        runs = study.detector_runs.select_related("uploaded_by")[:20]
        return Response({"detector_runs": [detector_run_dict(r) for r in runs]})

    @extend_schema(
        summary="Upload a detector's predictions CSV (case, landmark, x_mm, y_mm, "
        "z_mm [, detector]); every bad row is reported, nothing is stored "
        "then",
        request={"multipart/form-data": PredictionsUploadSerializer},
        responses={
            201: dict,
            400: OpenApiResponse(
                dict, description="error plus row_errors: [{row, column, message}]"
            ),
            **_ERRORS,
        },
    )
    def post(self, request: Request, slug: str) -> Response:
        study = get_study(request.user, slug, (Role.COORDINATOR,))
        form = PredictionsUploadSerializer(data=request.data)
        form.is_valid(raise_exception=True)
        upload = form.validated_data["file"]
        try:
            if upload.size > predictions.MAX_UPLOAD_BYTES:
                raise predictions.PredictionsError(
                    [
                        predictions.RowError(
                            0,
                            "",
                            f"the file is {upload.size} bytes; the limit is "
                            f"{predictions.MAX_UPLOAD_BYTES}",
                        )
                    ]
                )
            run = predictions.upload_predictions(
                study,
                request.user,
                upload.read(),
                name=form.validated_data.get("name", ""),
                file_name=upload.name or "",
            )
        except predictions.PredictionsError as error:
            return Response(
                {"error": str(error), "row_errors": [e.as_dict() for e in error.row_errors]},
                status=400,
            )
        except ServiceError as error:
            return Response({"error": str(error), "row_errors": []}, status=error.status_code)
        return Response(detector_run_dict(run), status=201)
