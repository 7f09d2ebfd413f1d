"""Errors raised by the scheduling core.

The hierarchy separates who is at fault::

    RungwayError
    ├── SpecError          the user's input is invalid (a spec file, a search space, a ladder);
    │                      the message names the field and says what would be valid
    └── RejectedEvent      an event the core did not expect: a result for a segment it never
        │                  handed out, a second result for the same attempt, a stale attempt
        └── UnknownTrial   an event that names a trial the core has never created

Adapters translate their own failures (Ray's, the store's) into events before they reach
the core; the core never sees a foreign exception.
"""

from __future__ import annotations

__all__ = ["RungwayError", "SpecError", "RejectedEvent", "UnknownTrial"]


class RungwayError(Exception):
    """Base class of every error rungway raises on purpose."""


class SpecError(RungwayError, ValueError):
    """Invalid user input. ``field`` names the offending field (dotted path) when known."""

    def __init__(self, message: str, *, field: str | None = None) -> None:
        self.field = field
        super().__init__(f"{field}: {message}" if field else message)


class RejectedEvent(RungwayError):
    """The core refused an event; its state is unchanged."""


class UnknownTrial(RejectedEvent):
    """An event named a trial id the core never created."""
