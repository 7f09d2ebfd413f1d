"""Storage adapter: checkpoints, measurements, trials and failures on shared storage.

Workers on many machines write here concurrently (one writer per trial segment) and the
head reads; every write is atomic, so no reader ever sees half a file. See
``docs/storage.md`` for the layout, schemas and how to read the files with other tools.

    store = Store("/shared/rungway")          # or "file:///shared/rungway", "s3://bucket/x"
    files = store.search("lr-sweep")
    files.write_measurements([...])
    frame = files.read_measurements()
"""

from __future__ import annotations

from .checkpoints import CheckpointInfo, LoadedCheckpoint
from .errors import InvalidRows, StorageCorrupt, StorageError, StorageFull, StoragePermission
from .schemas import (
    FAILURES_SCHEMA,
    MEASUREMENT_KEY,
    MEASUREMENTS_SCHEMA,
    SPACE_PREFIX,
    TRIALS_BASE_SCHEMA,
    trials_schema,
)
from .migrations import STORE_FORMAT, open_store
from .search import SearchFiles, Store

__all__ = [
    "Store",
    "open_store",
    "STORE_FORMAT",
    "SearchFiles",
    "CheckpointInfo",
    "LoadedCheckpoint",
    "MEASUREMENTS_SCHEMA",
    "MEASUREMENT_KEY",
    "TRIALS_BASE_SCHEMA",
    "FAILURES_SCHEMA",
    "SPACE_PREFIX",
    "trials_schema",
    "StorageError",
    "StorageFull",
    "StoragePermission",
    "StorageCorrupt",
    "InvalidRows",
]
