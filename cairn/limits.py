"""Refusing oversized request bodies before anything reads them.

Django limits the non-file part of a form (DATA_UPLOAD_MAX_MEMORY_SIZE) but streams file
parts to disk whatever their size; the upload service then refuses them only after they
were received. This middleware looks at Content-Length first and answers 413 with a
message, so a multi-gigabyte body is never read. Bodies without a Content-Length (chunked)
are cut by the WSGI server's own limits and by the upload service's total check.
"""

from __future__ import annotations

from collections.abc import Callable

from django.conf import settings
from django.http import HttpRequest, HttpResponse, JsonResponse


class RequestSizeLimitMiddleware:
    """Answer 413 to any request whose declared body exceeds CAIRN_REQUEST_MAX_BYTES."""

    def __init__(self, get_response: Callable[[HttpRequest], HttpResponse]) -> None:
        self.get_response = get_response

    def __call__(self, request: HttpRequest) -> HttpResponse:
        limit = int(settings.CAIRN_REQUEST_MAX_BYTES)
        raw = request.META.get("CONTENT_LENGTH") or "0"
        try:
            declared = int(raw)
        except ValueError:
            return _refuse(request, f"malformed Content-Length {raw!r}", 400)
        if declared > limit:
            return _refuse(
                request,
                f"the request body holds {declared} bytes, over the limit of {limit} bytes",
                413,
            )
        return self.get_response(request)


def _refuse(request: HttpRequest, message: str, status: int) -> HttpResponse:
    if request.path.startswith("/api/"):
        return JsonResponse({"error": message}, status=status)
    return HttpResponse(message, status=status, content_type="text/plain; charset=utf-8")
