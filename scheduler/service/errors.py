"""Errors the service raises on purpose; the HTTP layer maps each to one status code."""

from __future__ import annotations

from rungway.scheduler.core.errors import RungwayError

__all__ = ["ServiceError", "UnknownSearch", "UnknownTeam", "NameTaken", "WrongState", "HeadStopped"]


class ServiceError(RungwayError):
    """Base class; ``status`` is the HTTP status the API answers with."""

    status = 400


class UnknownSearch(ServiceError):
    """No search of that name in the lab."""

    status = 404


class UnknownTeam(ServiceError):
    """The lab config names no such team."""

    status = 404


class NameTaken(ServiceError):
    """A search of that name already exists in the lab's store."""

    status = 409


class WrongState(ServiceError):
    """The action does not apply to the search as it stands (e.g. resuming a finished one)."""

    status = 409


class HeadStopped(ServiceError):
    """The head is shutting down and takes no new work."""

    status = 503
