"""API views: parse, fetch through the access helper, call a service, return a payload."""

from __future__ import annotations

from pathlib import Path

from django.conf import settings
from django.http import FileResponse, Http404, HttpResponse, StreamingHttpResponse
from drf_spectacular.utils import OpenApiResponse, extend_schema
from rest_framework.request import Request
from rest_framework.response import Response
from rest_framework.views import APIView

from ..access import get_own_read, roles_in, studies_for
from ..constants import ReadStatus
from ..imaging.storage import COARSE_NAME, VIEWER_NAME
from ..services import placing, reads
from . import payloads
from .serializers import (
    ActivitySerializer,
    ErrorSerializer,
    EventInputSerializer,
    EventResultSerializer,
)

_VOLUME_FILES = {"full": VIEWER_NAME, "coarse": COARSE_NAME}
_ERRORS = {
    400: OpenApiResponse(ErrorSerializer, description="Refused; nothing was stored."),
    403: OpenApiResponse(ErrorSerializer),
    404: OpenApiResponse(ErrorSerializer),
}


class StudyList(APIView):
    @extend_schema(summary="Studies in which you have a role", responses={200: dict})
    def get(self, request: Request) -> Response:
        studies = studies_for(request.user)
        return Response(
            {"studies": [payloads.study_dict(s, roles_in(request.user, s)) for s in studies]}
        )


class Worklist(APIView):
    @extend_schema(summary="Your reads available now, in your order", responses={200: dict})
    def get(self, request: Request) -> Response:
        available = reads.worklist(request.user)
        return Response({"reads": [payloads.read_dict(r) for r in available]})


class ReadDetail(APIView):
    @extend_schema(
        summary="One of your reads: protocol, your placements, volume header",
        responses={200: dict, **_ERRORS},
    )
    def get(self, request: Request, code: str) -> Response:
        read = get_own_read(request.user, code)
        if read.status != ReadStatus.SUBMITTED:
            read = reads.open_read(read, request.user)
        return Response(payloads.read_detail_dict(read))


class ReadEvents(APIView):
    @extend_schema(
        summary="Record one placement event (idempotent on client_event_id)",
        request=EventInputSerializer,
        responses={
            201: EventResultSerializer,
            200: EventResultSerializer,
            409: ErrorSerializer,
            **_ERRORS,
        },
    )
    def post(self, request: Request, code: str) -> Response:
        read = get_own_read(request.user, code)
        form = EventInputSerializer(data=request.data)
        form.is_valid(raise_exception=True)
        recorded = placing.record_event(
            read, request.user, placing.EventInput(**form.validated_data)
        )
        placement = recorded.placement
        return Response(
            {
                "created": recorded.created,
                "version": recorded.version,
                "placement": payloads.placement_dict(placement) if placement else None,
            },
            status=201 if recorded.created else 200,
        )


class ReadSubmit(APIView):
    @extend_schema(
        summary="Submit and lock a complete read", request=None, responses={200: dict, **_ERRORS}
    )
    def post(self, request: Request, code: str) -> Response:
        read = reads.submit_read(get_own_read(request.user, code), request.user)
        return Response(payloads.read_dict(read))


class ReadActivity(APIView):
    @extend_schema(
        summary="Add active reading time",
        request=ActivitySerializer,
        responses={200: dict, **_ERRORS},
    )
    def post(self, request: Request, code: str) -> Response:
        read = get_own_read(request.user, code)
        form = ActivitySerializer(data=request.data)
        form.is_valid(raise_exception=True)
        read = reads.add_active_time(read, request.user, form.validated_data["seconds"])
        return Response(payloads.read_dict(read))


class ReadVolume(APIView):
    @extend_schema(
        summary="The read's voxels: raw little-endian, i fastest (see the read's volume header)",
        responses={(200, "application/octet-stream"): bytes, **_ERRORS},
    )
    def get(self, request: Request, code: str, level: str) -> HttpResponse:
        read = get_own_read(request.user, code)
        if level not in _VOLUME_FILES:
            raise Http404("no such volume level")
        path = Path(settings.CAIRN_DATA_DIR) / read.case.data_dir / _VOLUME_FILES[level]
        return volume_response(request, path)


def volume_response(request: Request, path: Path) -> HttpResponse:
    """Send a stored zstd file as is when the client accepts zstd, else decompress it."""
    accepts = request.headers.get("Accept-Encoding", "")
    if "zstd" in accepts:
        response = FileResponse(open(path, "rb"), content_type="application/octet-stream")
        response["Content-Encoding"] = "zstd"
        response["Content-Length"] = str(path.stat().st_size)
    else:
        import zstandard

        def chunks():
            with open(path, "rb") as handle:
                reader = zstandard.ZstdDecompressor().stream_reader(handle)
                while chunk := reader.read(1 << 20):
                    yield chunk

        response = StreamingHttpResponse(chunks(), content_type="application/octet-stream")
    response["Vary"] = "Accept-Encoding"
    response["Cache-Control"] = "private, max-age=31536000, immutable"
    return response
