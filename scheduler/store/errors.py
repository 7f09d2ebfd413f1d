"""Errors raised by the storage adapter.

Storage faults (a full disk, a read-only mount, a damaged file) are translated into these
at one boundary (:func:`rungway.scheduler.store.fs.translate`) so callers handle three
situations instead of every ``OSError`` errno and pyarrow exception::

    StorageError (RuntimeError)   something below us failed; the message says the path
    ├── StorageFull               ENOSPC / EDQUOT: free space, then resume
    ├── StoragePermission         EACCES / EPERM / EROFS: make the path writable, then resume
    └── StorageCorrupt            a file exists but cannot be read as what it should be

    InvalidRows (ValueError)      the caller handed rows that do not fit a table's schema;
                                  ``column`` names the offending column

Invalid search names are the user's input and raise the core's ``SpecError``.
"""

from __future__ import annotations

from rungway.scheduler.core.errors import RungwayError

__all__ = [
    "StorageError",
    "StorageFull",
    "StoragePermission",
    "StorageCorrupt",
    "InvalidRows",
]


class StorageError(RungwayError, RuntimeError):
    """The storage below the search failed. ``path`` is the file or folder involved."""

    def __init__(self, message: str, *, path: str) -> None:
        self.path = path
        super().__init__(message)


class StorageFull(StorageError):
    """No space (or quota) left where ``path`` lives; nothing existing was damaged."""


class StoragePermission(StorageError):
    """This process may not write (or read) ``path``: permissions or a read-only mount."""


class StorageCorrupt(StorageError):
    """``path`` exists but cannot be read (damaged, truncated, or not one of our files)."""


class InvalidRows(RungwayError, ValueError):
    """Rows handed to a table writer do not match its schema; ``column`` names which part."""

    def __init__(self, message: str, *, column: str | None = None) -> None:
        self.column = column
        super().__init__(f"column {column!r}: {message}" if column else message)
