"""Every API error is a JSON object with one `error` message and a proper status code."""

from __future__ import annotations

from rest_framework.response import Response
from rest_framework.views import exception_handler as drf_exception_handler

from ..services.errors import ServiceError


def _message(detail) -> str:
    if isinstance(detail, dict):
        parts = []
        for field, value in detail.items():
            text = _message(value)
            parts.append(text if field == "non_field_errors" else f"{field}: {text}")
        return "; ".join(parts)
    if isinstance(detail, list):
        return "; ".join(_message(item) for item in detail)
    return str(detail)


def exception_handler(exc, context):
    if isinstance(exc, ServiceError):
        return Response({"error": str(exc)}, status=exc.status_code)
    response = drf_exception_handler(exc, context)
    if response is not None:
        data = response.data
        if isinstance(data, dict) and set(data) == {"detail"}:
            data = data["detail"]
        response.data = {"error": _message(data)}
    return response
