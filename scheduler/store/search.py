"""The store's front door: :class:`Store` for a root, :class:`SearchFiles` for one search.

Both are thin: they hold where things are and delegate to the modules that know how.
Objects are cheap and hold no open files or data, so every worker and the head make their
own from the same root string.
"""

from __future__ import annotations

import posixpath

from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd
import pyarrow.fs as pafs

from . import checkpoints, tables
from .checkpoints import CheckpointInfo, LoadedCheckpoint
from .fs import Volume, resolve_root
from .layout import SEARCH_NAME, SearchLayout, searches_dir, validate_search_name

__all__ = ["Store", "SearchFiles"]


class Store:
    """All searches under one root: a local or NFS path, or a URI pyarrow understands."""

    def __init__(self, root: str) -> None:
        self.root = root
        fs, self.base = resolve_root(root)
        self.volume = Volume(fs)

    @property
    def filesystem(self) -> pafs.FileSystem:
        """The pyarrow file system the root resolved to (for reading files directly)."""
        return self.volume.fs

    def search(self, name: str) -> SearchFiles:
        """The files of search ``name`` (created lazily, on first write)."""
        validate_search_name(name)
        return SearchFiles(self, name)

    def list_searches(self) -> list[str]:
        """Names of the searches that have a folder under this root, sorted."""
        names = self.volume.list_dirs(searches_dir(self.base))
        return [name for name in names if SEARCH_NAME.fullmatch(name)]

    def __repr__(self) -> str:
        return f"Store({self.root!r})"


class SearchFiles:
    """Reads and writes one search's spec, tables, checkpoints and failure records."""

    def __init__(self, store: Store, name: str) -> None:
        self.store = store
        self.name = validate_search_name(name)
        self.layout = SearchLayout(f"{searches_dir(store.base)}/{name}")
        self._volume = store.volume

    @property
    def path(self) -> str:
        """This search's folder, as a path on :attr:`Store.filesystem`."""
        return self.layout.base

    @property
    def journal_dir(self) -> str:
        """The head's own files (its snapshot, later its journal); written only by the head."""
        return self.layout.journal

    def exists(self) -> bool:
        """Whether anything has been written for this search."""
        return self._volume.exists(self.layout.base)

    # -- spec -----------------------------------------------------------------------------

    def write_spec(self, text: str) -> None:
        """Keep the spec text as written, so the search can be resumed and audited."""
        if not isinstance(text, str):
            raise TypeError(f"spec text must be str, got {type(text).__name__}")
        self._volume.write_bytes(self.layout.spec, text.encode("utf-8"))

    def read_spec(self) -> str | None:
        """The stored spec text, or None if none was written."""
        data = self._volume.read_bytes(self.layout.spec)
        return None if data is None else data.decode("utf-8")

    # -- the head's state -----------------------------------------------------------------

    def write_head_state(self, name: str, text: str) -> None:
        """Replace the head's state file ``journal/<name>`` atomically (the head's snapshot)."""
        self._volume.write_bytes(self._head_path(name), text.encode("utf-8"))

    def read_head_state(self, name: str) -> str | None:
        """The head's state file ``journal/<name>``, or None if the head never wrote it."""
        data = self._volume.read_bytes(self._head_path(name))
        return None if data is None else data.decode("utf-8")

    def _head_path(self, name: str) -> str:
        if "/" in name or name.startswith("."):
            raise ValueError(f"a head state name is a plain file name (got {name!r})")
        return posixpath.join(self.layout.journal, name)

    # -- checkpoints ----------------------------------------------------------------------

    def save_checkpoint(self, trial: int, budget: float, attempt: int, data: bytes) -> CheckpointInfo:
        """Store opaque checkpoint bytes for ``trial`` at ``budget`` (see :mod:`.checkpoints`)."""
        return checkpoints.save_checkpoint(self._volume, self.layout, trial, budget, attempt, data)

    def load_checkpoint(self, trial: int) -> LoadedCheckpoint | None:
        """The newest checkpoint of ``trial`` that verifies, with the damaged ones skipped."""
        return checkpoints.load_checkpoint(self._volume, self.layout, trial)

    def prune_checkpoints(self, trial: int, keep: int = 2) -> list[str]:
        """Keep the ``keep`` newest valid checkpoints of ``trial``; returns deleted paths."""
        return checkpoints.prune_checkpoints(self._volume, self.layout, trial, keep)

    # -- measurements ---------------------------------------------------------------------

    def write_measurements(self, rows: Sequence[Mapping[str, Any]]) -> str:
        """Write one segment's measurements as a new part file; returns its path."""
        return tables.write_measurements(self._volume, self.layout, rows)

    def read_measurements(self) -> pd.DataFrame:
        """All measurements, each key once, sorted by (trial, rung, attempt, seq, metric)."""
        return tables.read_measurements(self._volume, self.layout)

    def compact_measurements(self, min_parts: int = 64) -> int:
        """Merge waiting part files into a block; returns how many part files went away."""
        return tables.compact_measurements(self._volume, self.layout, min_parts)

    # -- trials ---------------------------------------------------------------------------

    def write_trials(self, rows: Sequence[Mapping[str, Any]], parameter_names: Sequence[str]) -> None:
        """Replace the trials table (one row per trial) atomically."""
        tables.write_trials(self._volume, self.layout, rows, parameter_names)

    def read_trials(self) -> pd.DataFrame:
        """The trials table, or an empty frame with the base columns before the first write."""
        return tables.read_trials(self._volume, self.layout)

    # -- failures -------------------------------------------------------------------------

    def record_failure(
        self,
        trial: int,
        rung: int,
        attempt: int,
        error_type: str,
        message: str,
        traceback_text: str,
        node: str | None = None,
    ) -> str:
        """Keep one failed attempt's error and traceback; returns the file written."""
        return tables.record_failure(
            self._volume, self.layout, trial, rung, attempt, error_type, message, traceback_text, node
        )

    def read_failures(self) -> pd.DataFrame:
        """Every recorded failure."""
        return tables.read_failures(self._volume, self.layout)

    def __repr__(self) -> str:
        return f"SearchFiles({self.store.root!r}, {self.name!r})"
