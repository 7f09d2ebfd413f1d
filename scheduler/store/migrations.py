"""The store's format version, and the chain of steps that brings an older store up to it.

Theory of operation. A store's root holds ``store-format.json`` (``{"format": N}``). A root
with searches but no such file was written by rungway 0.1.0: format 1. :func:`open_store`,
the way in for the head and every command (workers never migrate), reads the version and
runs each step from it up to :data:`STORE_FORMAT`, in order.

A step is journaled so that a kill -9 anywhere in it is safe: it first writes its intent
(``<root>/_migrations/to-<N>.json``); each change it makes is one atomic replacement of one
file and is idempotent (a file already in the new shape is left alone), so a step that was
cut short simply runs again at the next open; only when every file is done is the version
file replaced (atomically), and then the intent removed. A store of a newer format than this
rungway knows is refused, never downgraded.

Adding a step: write ``_to_<N>(volume, base)`` (idempotent, one atomic write per file),
append it to :data:`_STEPS`, raise :data:`STORE_FORMAT`, commit a small store of the old
format under ``tests/store/fixtures/format-<N-1>/`` and a test that opens it
(``tests/store/test_store_migrations.py``), and note the change in CHANGELOG.md.
"""

from __future__ import annotations

import json
import logging
import posixpath
import re
import tomllib
from collections.abc import Callable

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from . import checksums
from .errors import StorageCorrupt
from .fs import Volume
from .layout import SEARCH_NAME, SearchLayout, searches_dir
from .schemas import SPACE_PREFIX, trials_schema, TRIALS_BASE_SCHEMA
from .search import Store

__all__ = ["STORE_FORMAT", "FORMAT_FILE", "RENAMED_IN_FORMAT_2", "open_store", "store_format", "renamed"]

log = logging.getLogger(__name__)

STORE_FORMAT = 3
"""The format this rungway writes."""

FORMAT_FILE = "store-format.json"
MIGRATIONS_DIR = "_migrations"

#: Surface names that format 2 (rungway 0.2.0) replaced: old name -> what to write now.
#: Nothing else in the tree may use the old names (tests/test_surface_names.py); the spec
#: reader and the workers' ``Context`` use this table to answer an old name with its new one.
RENAMED_IN_FORMAT_2: dict[str, str] = {
    "direction": 'better (direction = "maximize" is now better = "higher", "minimize" is better = "lower")',
    "param_": "space_ (the trials table's column of parameter <name> is space_<name>)",
    "best_value": "latest_value and record_value (trials table) or leader_value (a search's summary)",
    "best_trial": "leader",
    "TrialStopped": "TrialCulled",
    "should_yield": "asked_to_yield",
}


def renamed(name: str) -> str | None:
    """What to write instead of ``name`` if it is a surface name that format 2 replaced."""
    return RENAMED_IN_FORMAT_2.get(name)


# -- format 1 -> 2: the surface renames ------------------------------------------------------

_OLD_PARAMETER = "param_"
_OLD_LATEST = "best_value"
_OLD_KEY = re.compile(r'^direction(\s*=\s*)"(maximize|minimize)"', re.MULTILINE)
_NEW_VALUE = {"maximize": "higher", "minimize": "lower"}


def _spec_to_2(volume: Volume, layout: SearchLayout) -> bool | None:
    """Rewrite the stored spec's ``direction`` key as ``better``; returns whether higher is
    better (None if the search has no spec)."""
    data = volume.read_bytes(layout.spec)
    if data is None:
        return None
    text = data.decode("utf-8")
    new = _OLD_KEY.sub(lambda m: f'better{m.group(1)}"{_NEW_VALUE[m.group(2)]}"', text, count=1)
    if new != text:
        volume.write_bytes(layout.spec, new.encode("utf-8"))
    try:
        return tomllib.loads(new).get("better") == "higher"
    except tomllib.TOMLDecodeError as exc:
        raise StorageCorrupt(
            f"{layout.spec}: the stored spec does not parse ({exc}); restore it from the file the search "
            "was started with, then open the store again", path=layout.spec,
        ) from None


def _record_values(volume: Volume, layout: SearchLayout, metric: str | None, higher: bool) -> pd.Series:
    """Each trial's best rung result, from the stored measurements (the final rows)."""
    from . import tables

    rows = tables.read_measurements(volume, layout)
    rows = rows[rows["final"]]
    if metric is not None:
        rows = rows[rows["metric"] == metric]
    grouped = rows.groupby("trial")["value"]
    return grouped.max() if higher else grouped.min()


def _trials_to_2(volume: Volume, layout: SearchLayout, higher: bool) -> None:
    """Rename the trials table's columns; ``record_value`` is each trial's best final row."""
    table = volume.read_table(layout.trials)
    if table is None or _OLD_LATEST not in table.schema.names:
        return  # no table yet, or already migrated
    spec = volume.read_bytes(layout.spec)
    metric = tomllib.loads(spec.decode("utf-8")).get("metric") if spec is not None else None
    frame = table.to_pandas()
    records = _record_values(volume, layout, metric, higher)
    latest = frame[_OLD_LATEST]
    record = frame["trial"].map(records).where(latest.notna())
    base = {name: frame[name] for name in TRIALS_BASE_SCHEMA.names if name in frame}
    base["latest_value"] = latest
    base["record_value"] = record
    arrays = [pa.array(base[f.name], type=f.type, from_pandas=True) for f in TRIALS_BASE_SCHEMA]
    parameters = [name for name in table.schema.names if name.startswith(_OLD_PARAMETER)]
    schema = trials_schema({name[len(_OLD_PARAMETER):]: table.schema.field(name).type for name in parameters})
    new = pa.Table.from_arrays(arrays + [table.column(name) for name in parameters], schema=schema)
    assert all(name.startswith(SPACE_PREFIX) for name in new.schema.names[len(TRIALS_BASE_SCHEMA):])
    volume.write_table(layout.trials, new)


def _to_2(volume: Volume, base: str) -> None:
    for name in volume.list_dirs(searches_dir(base)):
        if SEARCH_NAME.fullmatch(name) is None:
            continue
        layout = SearchLayout(f"{searches_dir(base)}/{name}")
        higher = _spec_to_2(volume, layout)
        _trials_to_2(volume, layout, bool(higher))


# -- format 2 -> 3: checksums -----------------------------------------------------------------

_HEAD_STATE = "head-state.json"  # the head's snapshot (head.driver.HEAD_STATE), under journal/


def _to_3(volume: Volume, base: str) -> None:
    """Give each search's files of a fixed name their checksum (:mod:`.checksums`): the spec its
    ``spec.toml.sha256``, the trials table and the head's snapshot their embedded digest. A file
    that has one is left as it is; each change is one atomic write. Nothing else is rewritten:
    parts, blocks, failure records and the CPU ledger keep their names (read unverified), and
    the head's old journal files (``events-<n>.jsonl``, read unverified) are deleted at its next
    snapshot. What a file holds now is what its checksum vouches for from here on."""
    for name in volume.list_dirs(searches_dir(base)):
        if SEARCH_NAME.fullmatch(name) is None:
            continue
        layout = SearchLayout(f"{searches_dir(base)}/{name}")
        spec = volume.read_bytes(layout.spec)
        if spec is not None and not volume.exists(layout.spec_checksum):
            volume.write_bytes(layout.spec_checksum,
                               checksums.sidecar_text([checksums.sha256_hex(spec)], posixpath.basename(layout.spec)))
        trials = volume.read_bytes(layout.trials)
        if trials is not None:
            try:
                parquet = pq.ParquetFile(pa.BufferReader(trials))
                if checksums.EMBEDDED_KEY not in (parquet.metadata.metadata or {}):
                    table = parquet.read()
                    sealed = checksums.sealed_parquet_bytes(table, layout.label(layout.trials))
                    volume.write_bytes(layout.trials, sealed)
            except (pa.ArrowException, OSError) as exc:  # left as it is: reading it says what is wrong
                log.warning("%s cannot be read (%s); it stays without a checksum", layout.trials, exc)
        state_path = posixpath.join(layout.journal, _HEAD_STATE)
        state = volume.read_bytes(state_path)
        if state is not None and not state.startswith(b'{"sha256":'):
            try:
                sealed = checksums.seal_json(state.decode("utf-8"), layout.label(state_path))
            except ValueError as exc:  # left as it is: the head says what is wrong with it
                log.warning("%s cannot be read (%s); it stays without a checksum", state_path, exc)
            else:
                volume.write_bytes(state_path, sealed)


_STEPS: dict[int, Callable[[Volume, str], None]] = {2: _to_2, 3: _to_3}
"""Step N brings a store of format N-1 to format N."""


# -- the chain ---------------------------------------------------------------------------------


def store_format(store: Store) -> int:
    """The format of the store at ``store``'s root: 1 for a root written before versions."""
    path = posixpath.join(store.base, FORMAT_FILE)
    data = store.volume.read_bytes(path)
    if data is None:
        return 1 if store.volume.exists(searches_dir(store.base)) else STORE_FORMAT
    try:
        found = json.loads(data.decode("utf-8"))["format"]
        if not isinstance(found, int) or isinstance(found, bool) or found < 1:
            raise ValueError(found)
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        raise StorageCorrupt(
            f'{path} is damaged; it should read {{"format": N}}. If the store was last opened by this '
            f'rungway, write {{"format": {STORE_FORMAT}}} into it', path=path,
        ) from None
    return found


def open_store(root: str, *, create: bool = False) -> Store:
    """The store at ``root``, brought up to :data:`STORE_FORMAT` first if it is older. A
    writer passes ``create=True``, which marks a new root with the current format (a reader
    leaves a missing root missing)."""
    store = Store(root)
    found = store_format(store)
    if found > STORE_FORMAT:
        raise StorageCorrupt(
            f"the store at {root} has format {found}, newer than this rungway knows ({STORE_FORMAT}); "
            "upgrade rungway to open it", path=root,
        )
    volume, base = store.volume, store.base
    for target in range(found + 1, STORE_FORMAT + 1):
        intent = posixpath.join(base, MIGRATIONS_DIR, f"to-{target}.json")
        volume.write_bytes(intent, json.dumps({"from": target - 1, "to": target}).encode())
        log.warning("migrating the store at %s from format %d to %d", root, target - 1, target)
        _STEPS[target](volume, base)
        volume.write_bytes(posixpath.join(base, FORMAT_FILE), json.dumps({"format": target}).encode())
        volume.delete(intent)
    if create and found == STORE_FORMAT and not volume.exists(posixpath.join(base, FORMAT_FILE)):
        volume.write_bytes(posixpath.join(base, FORMAT_FILE), json.dumps({"format": STORE_FORMAT}).encode())
    return store
