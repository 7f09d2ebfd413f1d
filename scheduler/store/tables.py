"""Measurements, trials and failures tables on shared storage.

Measurements are append-only: each write is one new part file, so concurrent workers never
touch the same file. Compaction folds many parts into one block and records, in the
block's Parquet key-value metadata (``rungway.merged_parts``), the names of the parts it
holds. That record is what makes compaction crash-safe: a part named by a block is
skipped by readers and deleted by the next compaction, so a crash between writing the
block and deleting its parts never shows a row twice. Reads also drop duplicate keys
(trial, rung, attempt, seq, metric), as a second line of defence.

Every file is checked when read (:mod:`.checksums`): parts, blocks and failure records are
named after the SHA-256 of their bytes, the trials table carries its own; a damaged file is a
``StorageCorrupt`` that says which file, what it held and what moving it aside costs.
Compaction deletes the parts an earlier block already holds only after checking that block.
"""

from __future__ import annotations

import datetime as dt
import json
import posixpath
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd
import pyarrow as pa

from .checksums import check_named, check_sealed_parquet, parquet_bytes, sealed_parquet_bytes, sha256_hex
from .errors import InvalidRows, StorageCorrupt, StorageError
from .fs import Volume
from .layout import SearchLayout, block_number, is_block, is_part
from .schemas import (
    FAILURES_SCHEMA,
    MEASUREMENT_KEY,
    MEASUREMENTS_SCHEMA,
    SPACE_PREFIX,
    TRIALS_BASE_SCHEMA,
    rows_to_table,
    trials_to_table,
)

__all__ = [
    "MERGED_PARTS_KEY",
    "write_measurements",
    "read_measurements",
    "compact_measurements",
    "write_trials",
    "read_trials",
    "record_failure",
    "read_failures",
]

MERGED_PARTS_KEY = b"rungway.merged_parts"
_READ_TRIES = 8
_SEGMENT_PART = re.compile(r"part-t(\d+)-r(\d+)-a(\d+)-")
_BATCH_PART = re.compile(r"part-batch-n(\d+)-")


def _aside(path: str) -> str:
    folder, _ = posixpath.split(path)
    search = posixpath.dirname(folder)
    return f"move it out of {folder}/ (for example into {search}/damaged/) and resume the search"


def _measurements_remedy(path: str) -> str:
    """What moving a damaged measurements file aside costs, from what its name says it held."""
    name = posixpath.basename(path)
    kept = ("rung results the head already accepted stay in the journal and trials.parquet, and a "
            "segment that had not finished when the head stopped is run again from its checkpoint, "
            "so nothing is counted twice")
    if (segment := _SEGMENT_PART.match(name)) is not None:
        held = f"trial {segment[1]}'s reports at rung {segment[2]}, attempt {segment[3]}"
    elif (batch := _BATCH_PART.match(name)) is not None:
        held = f"the rung results of {batch[1]} segments"
    else:
        held = ("the rows of every part this block merged (those parts were deleted once it was written; "
                "any still in the folder count again)")
    return f"{_aside(path)}; the measurements table loses what it held ({held}); {kept}"


def _check_measurements(path: str, data: bytes) -> None:
    check_named(path, data, _measurements_remedy(path))


def _check_failure(path: str, data: bytes) -> None:
    check_named(path, data, f"{_aside(path)}; only that failed attempt's error record is lost "
                            "(the trial's state is in the journal)")


_TRIALS_REMEDY = ("move it aside: the head writes it again, from its snapshot and journal, the next time it "
                  "runs this search (the measurements and the journal do not depend on it)")


def check_file(path: str, data: bytes) -> None:
    """The store's check of a Parquet file's bytes (:attr:`Volume.check`): raises StorageCorrupt,
    saying what the file held and what to do, if they do not match their checksum."""
    folder, name = posixpath.split(path)
    kind = posixpath.basename(folder)
    if name == "trials.parquet":
        check_sealed_parquet(path, data, f"{kind}/{name}", _TRIALS_REMEDY)
    elif kind == "measurements":
        _check_measurements(path, data)
    elif kind == "failures":
        _check_failure(path, data)
    else:
        check_named(path, data, _aside(path))


def _conforms(table: pa.Table, schema: pa.Schema, path: str) -> pa.Table:
    if not table.schema.equals(schema, check_metadata=False):
        raise StorageCorrupt(
            f"{path} does not have the expected columns ({table.schema.names} instead of "
            f"{schema.names}); move it out of the search folder and resume",
            path=path,
        )
    return table.replace_schema_metadata(None)


# -- measurements ---------------------------------------------------------------------


def write_measurements(volume: Volume, layout: SearchLayout, rows: Sequence[Mapping[str, Any]]) -> str:
    """Write ``rows`` as one new part file; return its path.

    A worker writes one trial segment's measurements per call; the head writes the final rows
    of many segments at once (each loop of the head is one part file, not one per segment).
    """
    table = rows_to_table(rows, MEASUREMENTS_SCHEMA)
    if table.num_rows == 0:
        raise InvalidRows("no rows to write")
    segments = {
        (row["trial"], row["rung"], row["attempt"])
        for row in table.select(["trial", "rung", "attempt"]).to_pylist()
    }
    data = parquet_bytes(table)
    digest = sha256_hex(data)
    path = layout.part(*segments.pop(), digest) if len(segments) == 1 else layout.batch_part(len(segments), digest)
    volume.write_bytes(path, data)
    return path


def _merged_parts(schema: pa.Schema, path: str) -> set[str]:
    raw = (schema.metadata or {}).get(MERGED_PARTS_KEY)
    if raw is None:
        return set()
    try:
        names = json.loads(raw)
        if not isinstance(names, list) or not all(isinstance(name, str) for name in names):
            raise ValueError(f"not a list of file names: {raw[:80]!r}")
    except ValueError as exc:
        raise StorageCorrupt(f"{path} has an unreadable part list ({exc}); {_measurements_remedy(path)}",
                             path=path) from exc
    return set(names)


def _read_listing(volume: Volume, folder: str, files: list[str]) -> list[pa.Table] | None:
    """Blocks, then the parts no block holds; None if a file vanished since the listing."""
    tables: list[pa.Table] = []
    covered: set[str] = set()
    for name in (f for f in files if is_block(f)):
        path = posixpath.join(folder, name)
        table = volume.read_table(path)
        if table is None:
            return None
        covered |= _merged_parts(table.schema, path)
        tables.append(_conforms(table, MEASUREMENTS_SCHEMA, path))
    for name in (f for f in files if is_part(f) and f not in covered):
        path = posixpath.join(folder, name)
        table = volume.read_table(path)
        if table is None:  # merged into a block and deleted after we listed
            return None
        tables.append(_conforms(table, MEASUREMENTS_SCHEMA, path))
    return tables


def _read_measurement_tables(volume: Volume, layout: SearchLayout) -> list[pa.Table]:
    folder = layout.measurements
    for _ in range(_READ_TRIES):
        tables = _read_listing(volume, folder, volume.list_files(folder))
        if tables is not None:
            return tables
    raise StorageError(
        f"measurements under {folder} kept changing while being read; try again", path=folder
    )


def read_measurements(volume: Volume, layout: SearchLayout) -> pd.DataFrame:
    """All measurements of the search, one row per key, sorted by the key."""
    tables = _read_measurement_tables(volume, layout)
    table = pa.concat_tables(tables) if tables else MEASUREMENTS_SCHEMA.empty_table()
    frame = table.to_pandas()
    key = list(MEASUREMENT_KEY)
    frame = frame.sort_values(key, kind="stable").drop_duplicates(subset=key, keep="first")
    return frame.reset_index(drop=True)


@dataclass(frozen=True)
class CompactionPlan:
    """What one compaction will do, worked out from a single listing."""

    pending: list[str]  # parts no block holds yet, to merge
    leftovers: list[str]  # parts a block already holds (an earlier compaction stopped early)
    next_block: int
    holders: list[str]  # the blocks that hold the leftovers: checked before the leftovers go


def plan_compaction(volume: Volume, layout: SearchLayout) -> CompactionPlan:
    """List the measurements folder once and sort its parts into pending and leftovers."""
    folder = layout.measurements
    files = volume.list_files(folder)
    covered: dict[str, str] = {}
    numbers = [0]
    for name in files:
        number = block_number(name)
        if number is None:
            continue
        numbers.append(number)
        path = posixpath.join(folder, name)
        try:
            schema = volume.read_schema(path)
            if schema is not None:
                covered.update(dict.fromkeys(_merged_parts(schema, path), name))
        except StorageCorrupt:
            data = volume.read_bytes(path)
            if data is not None:
                _check_measurements(path, data)  # a damaged block: say so, and what moving it aside costs
            raise
    parts = [name for name in files if is_part(name)]
    leftovers = [name for name in parts if name in covered]
    return CompactionPlan(
        pending=[name for name in parts if name not in covered],
        leftovers=leftovers,
        next_block=max(numbers) + 1,
        holders=sorted({covered[name] for name in leftovers}),
    )


def _check_holders(volume: Volume, layout: SearchLayout, blocks: Sequence[str]) -> None:
    """Check the blocks whose record makes parts leftovers: the parts are deleted on their word."""
    for name in blocks:
        path = posixpath.join(layout.measurements, name)
        data = volume.read_bytes(path)
        if data is not None:
            _check_measurements(path, data)


def write_block(volume: Volume, layout: SearchLayout, parts: Sequence[str], number: int) -> tuple[str, list[str]]:
    """Merge ``parts`` into block ``number``; return (block path, the part names it holds)."""
    folder = layout.measurements
    tables: list[pa.Table] = []
    merged: list[str] = []
    for name in parts:
        path = posixpath.join(folder, name)
        table = volume.read_table(path)
        if table is None:  # another compactor took it; its block holds the rows
            continue
        tables.append(_conforms(table, MEASUREMENTS_SCHEMA, path))
        merged.append(name)
    if not merged:
        return layout.block(number), []
    table = pa.concat_tables(tables).replace_schema_metadata({MERGED_PARTS_KEY: json.dumps(merged).encode()})
    data = parquet_bytes(table)
    block = layout.block(number, sha256_hex(data))
    volume.write_bytes(block, data)
    return block, merged


def delete_parts(volume: Volume, layout: SearchLayout, parts: Sequence[str]) -> int:
    """Delete the named part files; returns how many this call removed."""
    return sum(volume.delete(posixpath.join(layout.measurements, name)) for name in parts)


def compact_measurements(volume: Volume, layout: SearchLayout, min_parts: int = 64) -> int:
    """Merge part files into one block once at least ``min_parts`` are waiting.

    Only parts present in this call's listing are merged and deleted, so parts written
    meanwhile survive to the next call. Parts an interrupted compaction already merged are
    deleted whatever ``min_parts`` says. Returns the number of part files removed.
    """
    if isinstance(min_parts, bool) or not isinstance(min_parts, int) or min_parts < 1:
        raise ValueError(f"min_parts must be an int >= 1, got {min_parts!r}")
    plan = plan_compaction(volume, layout)
    _check_holders(volume, layout, plan.holders)
    removed = delete_parts(volume, layout, plan.leftovers)
    if len(plan.pending) >= min_parts:
        _, merged = write_block(volume, layout, plan.pending, plan.next_block)
        removed += delete_parts(volume, layout, merged)
    return removed


# -- trials ---------------------------------------------------------------------------


def write_trials(
    volume: Volume, layout: SearchLayout, rows: Sequence[Mapping[str, Any]], parameter_names: Sequence[str]
) -> None:
    """Replace the trials table with ``rows`` (one per trial) in one atomic write."""
    table = trials_to_table(rows, parameter_names)
    trials = table.column("trial").to_pylist()
    if len(set(trials)) != len(trials):
        raise InvalidRows("each trial appears once in the trials table", column="trial")
    label = layout.label(layout.trials)
    volume.write_with(layout.trials, lambda out: out.write(sealed_parquet_bytes(table, label)))


def read_trials(volume: Volume, layout: SearchLayout) -> pd.DataFrame:
    """The trials table; empty (base columns only) before the first write."""
    table = volume.read_table(layout.trials)
    if table is None:
        return TRIALS_BASE_SCHEMA.empty_table().to_pandas()
    head = pa.schema(list(table.schema)[: len(TRIALS_BASE_SCHEMA)])
    if not head.equals(TRIALS_BASE_SCHEMA) or not all(
        name.startswith(SPACE_PREFIX) for name in table.schema.names[len(TRIALS_BASE_SCHEMA):]
    ):
        raise StorageCorrupt(
            f"{layout.trials} does not have the trials columns (found {table.schema.names}); "
            f"move it aside and let the head rewrite it",
            path=layout.trials,
        )
    return table.to_pandas()


# -- failures -------------------------------------------------------------------------


def record_failure(
    volume: Volume,
    layout: SearchLayout,
    trial: int,
    rung: int,
    attempt: int,
    error_type: str,
    message: str,
    traceback_text: str,
    node: str | None = None,
) -> str:
    """Keep one failed attempt's error for later inspection; returns the file written."""
    row = {
        "trial": trial,
        "rung": rung,
        "attempt": attempt,
        "error_type": error_type,
        "message": message,
        "traceback": traceback_text,
        "node": node,
        "recorded_at": dt.datetime.now(dt.timezone.utc),
    }
    data = parquet_bytes(rows_to_table([row], FAILURES_SCHEMA))
    path = layout.failure(trial, rung, attempt, sha256_hex(data))
    volume.write_bytes(path, data)
    return path


def read_failures(volume: Volume, layout: SearchLayout) -> pd.DataFrame:
    """Every recorded failure, oldest first within each trial."""
    folder = layout.failures
    tables = []
    for name in volume.list_files(folder):
        if not name.endswith(".parquet"):
            continue
        path = posixpath.join(folder, name)
        table = volume.read_table(path)
        if table is not None:
            tables.append(_conforms(table, FAILURES_SCHEMA, path))
    table = pa.concat_tables(tables) if tables else FAILURES_SCHEMA.empty_table()
    frame = table.to_pandas().sort_values(["trial", "rung", "attempt", "recorded_at"], kind="stable")
    return frame.reset_index(drop=True)
