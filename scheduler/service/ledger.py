"""The CPU ledger: what every segment used and held, charged to its team, search and trial.

Theory of operation. The head appends one row per finished segment (the CPU time it used,
the CPUs and memory it reserved, from when to when by the worker's clock, how it ended) to
Parquet files under ``<store root>/_ledger/``; usage reports and allowances are sums over
those rows. Two figures per row: ``cpu_seconds``, the CPU time the objective's threads and
child processes used (measured by the worker, ``workers/cpu.py``; null when nobody could
measure it), which is what CPU-hours and allowances count; and ``reserved_cpu_seconds``,
``cpus * (ended - started)``, what the segment held. A sum counts a row whose CPU time is
unknown at its reservation. Files written before rows carried both (no
``reserved_cpu_seconds`` column) held the reservation in ``cpu_seconds``: readers take it as
the reservation, with the CPU time unknown (:func:`_conform`). Each
:meth:`Ledger.append` writes one new part file, atomically (temporary name, then rename,
through the store's :class:`~rungway.scheduler.store.fs.Volume`), so any root the store
takes works here too and a reader never sees half a file.

Compaction folds the parts into a block and records, in the block's Parquet key-value
metadata (``rungway.ledger.sources``), the name and row count of every file it holds. A
file named by any block is *covered*: readers skip it and the next compaction deletes it.
So a crash between writing the block and deleting its inputs shows no row twice, and a
crash before the block is renamed into place leaves only the inputs. The row counts let a
reader take, from a block whose sources overlap an earlier block's (two compactors that ran
at once), only the rows of the sources nobody else holds. Blocks are merged into one once
there are :data:`BLOCK_FAN_IN` of them, so the number of files stays small.

A row is charged to the period in which its segment *ended*; rows carry no key that must be
unique (a segment may be charged in several rows), so nothing is ever de-duplicated by value.
See ``docs/storage.md``, "The CPU ledger", for the columns.

Every file is named after the SHA-256 of its bytes (``part-<sha>.parquet``, the store's
:mod:`~rungway.scheduler.store.checksums`) and checked whenever it is read, so a damaged file
is a ``StorageCorrupt`` naming it, never a changed sum. A block's list of sources is believed
for deleting its leftovers only once the block itself has been checked.
"""

from __future__ import annotations

import json
import math
import posixpath
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from rungway.scheduler.store.checksums import check_named, parquet_bytes, sha256_hex
from rungway.scheduler.store.errors import InvalidRows, StorageCorrupt, StorageError
from rungway.scheduler.store.fs import Volume, resolve_root
from rungway.scheduler.store.schemas import rows_to_table

__all__ = [
    "LEDGER_SCHEMA",
    "LEDGER_DIR",
    "OUTCOMES",
    "SOURCES_KEY",
    "BLOCK_FAN_IN",
    "LedgerRow",
    "Ledger",
]

LEDGER_DIR = "_ledger"
OUTCOMES: tuple[str, ...] = ("result", "yielded", "lost", "crashed", "stopped", "other")
SOURCES_KEY = b"rungway.ledger.sources"
BLOCK_FAN_IN = 16
_PART, _BLOCK, _PARQUET = "part-", "block-", ".parquet"
_READ_TRIES = 8

LEDGER_SCHEMA = pa.schema(
    [
        pa.field("team", pa.string(), nullable=False),
        pa.field("search", pa.string(), nullable=False),
        pa.field("trial", pa.int64(), nullable=False),
        pa.field("attempt", pa.int64(), nullable=False),
        pa.field("rung", pa.int32(), nullable=False),
        pa.field("node", pa.string()),
        pa.field("started", pa.float64(), nullable=False),
        pa.field("ended", pa.float64(), nullable=False),
        pa.field("cpus", pa.float64(), nullable=False),
        pa.field("reserved_cpu_seconds", pa.float64(), nullable=False),
        pa.field("cpu_seconds", pa.float64()),
        pa.field("memory_mb", pa.int64(), nullable=False),
        pa.field("memory_mb_seconds", pa.float64(), nullable=False),
        pa.field("outcome", pa.string(), nullable=False),
        pa.field("preempted", pa.bool_(), nullable=False),
    ]
)
_RESERVED = "reserved_cpu_seconds"
# Files of the first ledger format have no reserved_cpu_seconds (their cpu_seconds is it).
_REQUIRED = [f.name for f in LEDGER_SCHEMA if not f.nullable and f.name != _RESERVED]
_ORDER = ["ended", "started", "team", "search", "trial", "rung", "attempt"]


@dataclass(frozen=True, slots=True)
class LedgerRow:
    """One segment's charge. ``started``/``ended``: Unix seconds on the worker's clock (both
    from one clock, so their difference holds whatever the head's clock says).

    ``cpu_seconds``: the CPU time the segment used, as measured; None when it is unknown.
    ``reserved_cpu_seconds`` and ``memory_mb_seconds`` are filled in from the others when left
    out; when given, :meth:`Ledger.append` checks that they agree with them."""

    team: str
    search: str
    trial: int
    attempt: int
    rung: int
    node: str | None
    started: float
    ended: float
    cpus: float
    memory_mb: int
    outcome: str
    preempted: bool = False
    cpu_seconds: float | None = None
    memory_mb_seconds: float | None = None
    reserved_cpu_seconds: float | None = None

    def __post_init__(self) -> None:
        if all(_is_number(v) for v in (self.started, self.ended, self.cpus, self.memory_mb)):
            ran = self.ended - self.started
            if self.reserved_cpu_seconds is None:
                object.__setattr__(self, "reserved_cpu_seconds", float(self.cpus * ran))
            if self.memory_mb_seconds is None:
                object.__setattr__(self, "memory_mb_seconds", float(self.memory_mb * ran))


def _check(rows: Sequence[LedgerRow]) -> list[dict[str, Any]]:
    """Rows as mappings with the derived columns, after the checks types alone cannot make."""
    if isinstance(rows, (str, bytes)) or not isinstance(rows, Sequence):
        raise InvalidRows(f"rows must be a sequence of LedgerRow, got {type(rows).__name__}")
    out: list[dict[str, Any]] = []
    for index, row in enumerate(rows):
        if not isinstance(row, LedgerRow):
            raise InvalidRows(f"row {index} must be a LedgerRow, got {type(row).__name__}")
        for name in ("started", "ended", "cpus", "memory_mb"):
            value = getattr(row, name)
            if not _is_number(value) or (name == "memory_mb" and not isinstance(value, int)):
                kind = "an integer" if name == "memory_mb" else "a number"
                raise InvalidRows(f"row {index}: expected {kind}, got {type(value).__name__} {value!r}", column=name)
            if not math.isfinite(value):
                raise InvalidRows(f"row {index}: must be finite, got {value!r}", column=name)
        if row.outcome not in OUTCOMES:
            raise InvalidRows(f"row {index}: must be one of {', '.join(OUTCOMES)}, got {row.outcome!r}", column="outcome")
        if row.cpus < 0:
            raise InvalidRows(f"row {index}: must be >= 0, got {row.cpus!r}", column="cpus")
        if row.memory_mb < 0:
            raise InvalidRows(f"row {index}: must be >= 0, got {row.memory_mb!r}", column="memory_mb")
        if row.ended < row.started:
            # Both come from one worker clock; a step backwards (NTP) is the caller's to clamp.
            raise InvalidRows(f"row {index}: ended ({row.ended!r}) is before started ({row.started!r})", column="ended")
        values = asdict(row)
        used = row.cpu_seconds
        if used is not None and (not _is_number(used) or not math.isfinite(used) or used < 0):
            raise InvalidRows(f"row {index}: the CPU time used must be a finite number >= 0, or None when unknown, "
                              f"got {used!r}", column="cpu_seconds")
        ran = row.ended - row.started
        for name, amount in ((_RESERVED, row.cpus), ("memory_mb_seconds", row.memory_mb)):
            given, expected = values[name], float(amount * ran)
            if not _is_number(given) or not math.isclose(given, expected, rel_tol=1e-9, abs_tol=1e-9):
                what = "cpus" if name == _RESERVED else "memory_mb"
                raise InvalidRows(f"row {index}: must be {what} * (ended - started) = {expected!r}, got {given!r}",
                                  column=name)
            values[name] = expected  # one rule for every row, whatever rounding the caller did
        out.append(values)
    return out


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _charged(table: pa.Table) -> pa.Table:
    """``table`` with a column ``charged``: the CPU time used, or the reservation where unknown."""
    charged = pc.coalesce(table["cpu_seconds"], table[_RESERVED])
    return table.append_column("charged", charged)


@dataclass
class _Listing:
    """One listing of the ledger folder, sorted into what a reader takes and what it skips."""

    parts: list[str]  # live parts, read whole
    blocks: list[tuple[str, list[tuple[int, int]] | None]]  # live blocks; row ranges, None = whole
    leftovers: list[str]  # covered: named by some block, so skipped and deleted by compaction


def _sources(schema: pa.Schema, path: str) -> list[tuple[str, int]]:
    raw = (schema.metadata or {}).get(SOURCES_KEY)
    if raw is None:
        raise StorageCorrupt(f"{path} is a ledger block without its source list; move it aside", path=path)
    try:
        return [(str(name), int(rows)) for name, rows in json.loads(raw)]
    except (ValueError, TypeError) as exc:
        raise StorageCorrupt(f"{path} has an unreadable source list ({exc}); move it aside", path=path) from exc


def _conform(table: pa.Table, path: str) -> pa.Table:
    """One file's rows with the ledger's columns, in order; a file without them is foreign.

    A file of the first format (no ``reserved_cpu_seconds``) held the reservation in
    ``cpu_seconds``: it becomes ``reserved_cpu_seconds``, and the CPU time used is unknown."""
    folder = posixpath.dirname(path)
    if _RESERVED not in table.schema.names and "cpu_seconds" in table.schema.names:
        reserved = table["cpu_seconds"]
        table = table.drop_columns(["cpu_seconds"]).append_column(_RESERVED, reserved)
    for name in _REQUIRED + [_RESERVED]:
        if name not in table.schema.names or table[name].null_count:
            raise StorageCorrupt(
                f"a file under {folder} lacks ledger column {name!r} ({posixpath.basename(path)}); move files "
                "that are not rungway's out of the ledger folder",
                path=path,
            )
    columns = [table[f.name] if f.name in table.schema.names else pa.nulls(table.num_rows, f.type)
               for f in LEDGER_SCHEMA]
    try:
        return pa.Table.from_arrays(columns, names=LEDGER_SCHEMA.names).cast(LEDGER_SCHEMA)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
        raise StorageCorrupt(f"{path} has ledger columns of other types ({exc}); move it out of {folder}",
                             path=path) from None


def _check_file(path: str, data: bytes) -> None:
    """Raise StorageCorrupt if a ledger file's bytes do not match the checksum in its name."""
    name = posixpath.basename(path)
    held = "the segments charged in every part it merged" if name.startswith(_BLOCK) else "the segments it charged"
    check_named(path, data, f"move it out of {posixpath.dirname(path)}/ and the ledger goes on without "
                            f"{held}: usage reports and allowances no longer count them, and nothing is "
                            "counted twice")


class Ledger:
    """The CPU ledger under ``<root>/_ledger/``; ``root`` is a store root (path or URI).

    Cheap to make and holds no open files; the head and a report tool each make their own.
    Appends may come from several processes at once; run :meth:`compact` from one (the head).
    """

    def __init__(self, root: str) -> None:
        self.root = root
        fs, base = resolve_root(root)
        self.volume = Volume(fs, check=_check_file)
        self.folder = posixpath.join(base, LEDGER_DIR)

    def __repr__(self) -> str:
        return f"Ledger({self.root!r})"

    # -- writing ----------------------------------------------------------------------------

    def append(self, rows: Sequence[LedgerRow]) -> None:
        """Write ``rows`` as one new part file (nothing for no rows). Checks every row first,
        so a bad one (``InvalidRows``, naming the column) writes nothing."""
        table = rows_to_table(_check(rows), LEDGER_SCHEMA)
        if table.num_rows:
            self._write(_PART, table)

    def _write(self, prefix: str, table: pa.Table) -> str:
        """Write ``table`` as one file named after its bytes' SHA-256; returns the name."""
        data = parquet_bytes(table)
        name = f"{prefix}{sha256_hex(data)[:32]}{_PARQUET}"
        self.volume.write_bytes(posixpath.join(self.folder, name), data)
        return name

    # -- reading ----------------------------------------------------------------------------

    def read(self, since: float | None = None, until: float | None = None) -> pd.DataFrame:
        """Rows whose ``ended`` is in [since, until) (None: unbounded), ordered by ``ended``;
        an empty frame with the ledger's columns when there are none."""
        frame = self._table(since, until).to_pandas()
        return frame.sort_values(_ORDER, kind="stable").reset_index(drop=True)

    def cpu_seconds_by_team(self, since: float | None = None) -> dict[str, float]:
        """CPU-seconds used per team over the rows that ended at or after ``since`` (a row whose
        CPU time is unknown counts its reservation)."""
        table = _charged(self._table(since, None, ["team", "cpu_seconds", _RESERVED]))
        grouped = table.group_by("team").aggregate([("charged", "sum")])
        return dict(zip(grouped["team"].to_pylist(), grouped["charged_sum"].to_pylist()))

    def usage(
        self, since: float | None = None, until: float | None = None
    ) -> tuple[dict[str, dict[str, float]], list[dict[str, Any]]]:
        """Usage over [since, until): per team ``{"cpu_hours", "reserved_cpu_hours",
        "memory_mb_hours", "segments"}``, and per (team, search) a dict with the fields of
        ``models.SearchUsage``, sorted by team then search. ``cpu_hours`` is CPU time used (a
        row whose CPU time is unknown counts its reservation); segments count ledger rows."""
        table = _charged(self._table(since, until, ["team", "search", "cpu_seconds", _RESERVED, "memory_mb_seconds"]))
        sums = [("charged", "sum"), (_RESERVED, "sum"), ("memory_mb_seconds", "sum"), ("team", "count")]
        teams: dict[str, dict[str, float]] = {}
        for row in table.group_by("team").aggregate(sums).to_pylist():
            teams[row["team"]] = {
                "cpu_hours": row["charged_sum"] / 3600,
                "reserved_cpu_hours": row[f"{_RESERVED}_sum"] / 3600,
                "memory_mb_hours": row["memory_mb_seconds_sum"] / 3600,
                "segments": row["team_count"],
            }
        searches = [
            {"team": row["team"], "search": row["search"], "cpu_hours": row["charged_sum"] / 3600,
             "reserved_cpu_hours": row[f"{_RESERVED}_sum"] / 3600, "segments": row["team_count"]}
            for row in table.group_by(["team", "search"]).aggregate(sums).to_pylist()
        ]
        searches.sort(key=lambda s: (s["team"], s["search"]))
        return dict(sorted(teams.items())), searches

    def files(self) -> list[str]:
        """Base names of the finished part and block files now in the ledger folder."""
        return [name for name in self.volume.list_files(self.folder) if name.endswith(_PARQUET)]

    def _table(self, since: float | None, until: float | None, columns: list[str] | None = None) -> pa.Table:
        where = None
        if since is not None:
            where = ds.field("ended") >= float(since)
        if until is not None:
            upper = ds.field("ended") < float(until)
            where = upper if where is None else where & upper
        for _ in range(_READ_TRIES):
            listing = self._listing()
            tables = self._read(listing, where, columns)
            if tables is not None:
                schema = LEDGER_SCHEMA if columns is None else pa.schema([LEDGER_SCHEMA.field(c) for c in columns])
                return pa.concat_tables(tables) if tables else schema.empty_table()
        raise StorageError(f"the ledger under {self.folder} kept changing while being read; try again", path=self.folder)

    def _listing(self) -> _Listing:
        for _ in range(_READ_TRIES):
            listing = self._list_once()
            if listing is not None:
                return listing
        raise StorageError(f"the ledger under {self.folder} kept changing while being listed; try again", path=self.folder)

    def _list_once(self) -> _Listing | None:
        """None when a block vanished (merged into a newer one): the listing is stale."""
        names = self.files()
        blocks = sorted(n for n in names if n.startswith(_BLOCK))
        sources: dict[str, list[tuple[str, int]]] = {}
        for name in blocks:
            path = posixpath.join(self.folder, name)
            try:
                schema = self.volume.read_schema(path)  # the footer only
                if schema is None:
                    return None
                sources[name] = _sources(schema, path)
            except StorageCorrupt:
                data = self.volume.read_bytes(path)
                if data is not None:
                    _check_file(path, data)  # a damaged file: say so, and what moving it aside costs
                raise
        covered = {src for held in sources.values() for src, _ in held}
        listing = _Listing(
            parts=[n for n in names if n.startswith(_PART) and n not in covered],
            blocks=[],
            leftovers=[n for n in names if n in covered],
        )
        kept: set[str] = set()
        for name in (b for b in blocks if b not in covered):
            held = sources[name]
            if kept.isdisjoint(src for src, _ in held):
                listing.blocks.append((name, None))
            else:  # a concurrent compactor's twin: only the sources no earlier block holds
                ranges, offset = [], 0
                for src, rows in held:
                    if src not in kept:
                        ranges.append((offset, rows))
                    offset += rows
                listing.blocks.append((name, ranges))
            kept.update(src for src, _ in held)
        return listing

    def _read(self, listing: _Listing, where: Any, columns: list[str] | None) -> list[pa.Table] | None:
        """The rows of the live files; None when one vanished (a compaction), to list again.

        Each file is read whole in one request and checked (:func:`_check_file`) before its
        rows count."""
        tables: list[pa.Table] = []
        for name, ranges in [(name, None) for name in listing.parts] + listing.blocks:
            table = self.volume.read_table(posixpath.join(self.folder, name))
            if table is None:
                return None
            tables.append(self._slice(table, posixpath.join(self.folder, name), ranges, where, columns))
        return tables

    @staticmethod
    def _slice(table: pa.Table, path: str, ranges: list[tuple[int, int]] | None, where: Any,
               columns: list[str] | None) -> pa.Table:
        table = _conform(table, path)
        if ranges is not None:
            pieces = [table.slice(start, rows) for start, rows in ranges]
            table = pa.concat_tables(pieces) if pieces else LEDGER_SCHEMA.empty_table()
        if where is not None:
            table = table.filter(where)
        return table.select(columns) if columns is not None else table

    # -- compaction -------------------------------------------------------------------------

    def compact(self, min_parts: int = 64) -> int:
        """Merge the part files into one block once at least ``min_parts`` are live; merge the
        blocks too once there are :data:`BLOCK_FAN_IN` (or two overlap). Files a block already
        holds (left by a compaction that stopped early) are deleted whatever ``min_parts``
        says. Returns the number of files removed.

        Order, for crash safety: delete leftovers; write the new block naming its sources;
        delete the sources. Parts written meanwhile are not in the listing and stay.
        """
        if isinstance(min_parts, bool) or not isinstance(min_parts, int) or min_parts < 1:
            raise ValueError(f"min_parts must be an int >= 1, got {min_parts!r}")
        listing = self._listing()
        # Leftovers go first: once a block becomes a source of a newer block and is deleted,
        # nothing may remain that only it says is covered. They go on the blocks' word, so the
        # blocks are checked first (a damaged one stops the compaction, naming it).
        if listing.leftovers:
            for name, _ in listing.blocks:
                path = posixpath.join(self.folder, name)
                data = self.volume.read_bytes(path)
                if data is not None:
                    _check_file(path, data)
        removed = self._delete(listing.leftovers)
        if len(listing.parts) < min_parts:
            return removed
        blocks = listing.blocks
        if len(blocks) < BLOCK_FAN_IN and all(ranges is None for _, ranges in blocks):
            blocks = []
        merged = self._write_block(listing.parts, blocks)
        return removed + self._delete(merged)

    def _write_block(self, parts: Sequence[str], blocks: Sequence[tuple[str, list[tuple[int, int]] | None]]) -> list[str]:
        """Merge ``blocks`` (their live ranges) and ``parts`` into a new block; the names it holds."""
        tables: list[pa.Table] = []
        held: list[tuple[str, int]] = []
        for name, ranges in blocks:
            path = posixpath.join(self.folder, name)
            table = self.volume.read_table(path)
            if table is not None:  # else another compactor took it: its block holds the rows
                table = self._slice(table, path, ranges, None, None)
                tables.append(table)
                held.append((name, table.num_rows))
        for name in parts:
            path = posixpath.join(self.folder, name)
            table = self.volume.read_table(path)
            if table is None:
                return []  # another compaction is taking these parts; leave them to it
            tables.append(self._slice(table, path, None, None, None))
            held.append((name, tables[-1].num_rows))
        if not held:
            return []
        table = pa.concat_tables(tables).replace_schema_metadata({SOURCES_KEY: json.dumps(held).encode()})
        self._write(_BLOCK, table)
        return [name for name, _ in held]

    def _delete(self, names: Iterable[str]) -> int:
        return sum(self.volume.delete(posixpath.join(self.folder, name)) for name in names)

    def statistics(self) -> dict[str, int]:
        """Files in the ledger folder now: live parts, live blocks, and covered leftovers."""
        listing = self._listing()
        return {"parts": len(listing.parts), "blocks": len(listing.blocks), "leftovers": len(listing.leftovers)}

