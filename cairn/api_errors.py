"""Every 4xx under /api/ is a JSON object with one `error` message.

DRF's exception handler (studies.api.errors) shapes the errors raised inside API views.
Responses made before a view runs, such as the URL resolver's 404 for a path that matches
no pattern (a read code that is not a UUID), come from Django as HTML; this middleware
turns those into the same JSON shape, quoting the offending path.
"""

from __future__ import annotations

from collections.abc import Callable
from http import HTTPStatus

from django.http import HttpRequest, HttpResponse, JsonResponse

API_PREFIX = "/api/"
#: Longest part of a refused path quoted back in the message.
QUOTE_MAX = 200


class ApiErrorShapeMiddleware:
    """Replace a non-JSON 4xx response under /api/ by {"error": "..."} with the same status."""

    def __init__(self, get_response: Callable[[HttpRequest], HttpResponse]) -> None:
        self.get_response = get_response

    def __call__(self, request: HttpRequest) -> HttpResponse:
        response = self.get_response(request)
        if not request.path.startswith(API_PREFIX) or not 400 <= response.status_code < 500:
            return response
        if response.get("Content-Type", "").startswith("application/json"):
            return response
        return JsonResponse(
            {"error": message_for(response.status_code, request.path)},
            status=response.status_code,
        )


def message_for(status: int, path: str) -> str:
    quoted = path if len(path) <= QUOTE_MAX else path[:QUOTE_MAX] + "..."
    if status == HTTPStatus.NOT_FOUND:
        return f"no API endpoint or object at {quoted!r}"
    try:
        phrase = HTTPStatus(status).phrase.lower()
    except ValueError:
        phrase = "refused"
    return f"{phrase}: {quoted!r}"
