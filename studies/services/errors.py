"""Errors the service layer raises; views turn them into 4xx responses with the message."""

from __future__ import annotations


class ServiceError(ValueError):
    """A request that cannot be carried out as asked; nothing was changed."""

    status_code = 400


class ConflictError(ServiceError):
    """The request is based on a stale state (another tab or machine changed the read)."""

    status_code = 409


class NotAllowed(ServiceError):
    """The user may see the object but not do this to it."""

    status_code = 403
