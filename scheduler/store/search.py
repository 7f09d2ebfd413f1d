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

from . import checkpoints, checksums, tables
from .errors import StorageCorrupt
from .checkpoints import CheckpointInfo, LoadedCheckpoint
from .fs import Volume, resolve_root
from .layout import SEARCH_NAME, SearchLayout, searches_dir, validate_search_name

__all__ = ["Store", "SearchFiles"]


class Store:
    """All searches under one root: a local or NFS path, or a URI pyarrow understands."""

    def __init__(self, root: str) -> None:
        self.root = root
        fs, self.base = resolve_root(root)
        self.volume = Volume(fs, check=tables.check_file)

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

    def case_twin(self, name: str) -> str | None:
        """A search already here whose name differs from ``name`` only in letter case: the two
        would share one folder on a case-insensitive file system (macOS, Windows shares)."""
        folded = name.casefold()
        return next((n for n in self.list_searches() if n != name and n.casefold() == folded), None)

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
        """Keep the spec text as written, so the search can be resumed and audited; its SHA-256
        goes first into ``spec.toml.sha256`` (:mod:`.checksums`)."""
        if not isinstance(text, str):
            raise TypeError(f"spec text must be str, got {type(text).__name__}")
        path, sidecar = self.layout.spec, self.layout.spec_checksum
        data = text.encode("utf-8")
        digests = [checksums.sha256_hex(data)]
        current = self._volume.read_bytes(path)
        if current is not None and checksums.sha256_hex(current) != digests[0]:
            digests.append(checksums.sha256_hex(current))  # until the new text is in place
        name = posixpath.basename(path)
        self._volume.write_bytes(sidecar, checksums.sidecar_text(digests, name))
        self._volume.write_bytes(path, data)
        if len(digests) > 1:
            self._volume.write_bytes(sidecar, checksums.sidecar_text(digests[:1], name))

    def read_spec(self) -> str | None:
        """The stored spec text as written, or None if none was written. A spec that does not
        match its checksum is a :class:`~.errors.StorageCorrupt`."""
        path, sidecar = self.layout.spec, self.layout.spec_checksum
        data = self._volume.read_bytes(path)
        if data is None:
            return None
        listed = self._volume.read_bytes(sidecar)
        remedy = (f"Put back the spec it was submitted with (the same text) at {path}, then resume the search; "
                  f"if this text is right after all, delete {sidecar} to have it read unchecked")
        if listed is not None:  # else a spec written before checksums: read as it is
            digests = checksums.sidecar_digests(listed, posixpath.basename(path))
            if digests is None:
                raise StorageCorrupt(f"{sidecar}, the spec's checksum, is damaged; {remedy}", path=sidecar)
            if checksums.sha256_hex(data) not in digests:
                raise StorageCorrupt(f"{path} is damaged or was edited: it does not match its checksum in "
                                     f"{sidecar}; {remedy}", path=path)
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise StorageCorrupt(f"{path} is not UTF-8 text ({exc}); {remedy}", path=path) from None

    # -- the head's state -----------------------------------------------------------------

    def write_head_state(self, name: str, text: str) -> None:
        """Replace the head's state file ``journal/<name>`` (the text of a JSON object: the head's
        snapshot) atomically, with its checksum as the object's first member."""
        path = self._head_path(name)
        self._volume.write_bytes(path, checksums.seal_json(text, self.layout.label(path)))

    def read_head_state(self, name: str) -> str | None:
        """The head's state file ``journal/<name>`` as written (checked against its checksum), or
        None if the head never wrote it. A damaged one is a :class:`~.errors.StorageCorrupt`."""
        path = self._head_path(name)
        data = self._volume.read_bytes(path)
        if data is None:
            return None
        remedy = ("the search's saved state is damaged, so the search cannot be resumed from it. Its "
                  "results so far stay readable (trials.parquet, measurements/). Put back a copy of the "
                  "file if you have one; otherwise run the spec again under another name")
        return checksums.open_json(data, self.layout.label(path), path, remedy)

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
