"""The tables' schemas, in one place, and the conversion of caller rows into Arrow tables.

Rows are checked here, before anything is written, so that a bad row fails in the process
that made it with an error naming the column, instead of surfacing later as an unreadable
or silently coerced file. Checks are strict on purpose: an int column refuses floats
(Arrow would truncate 1.5 to 1) and bools, and timestamps must carry a time zone
(workers run on machines with different local zones).
"""

from __future__ import annotations

import datetime as dt
import numbers
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from .errors import InvalidRows

__all__ = [
    "TIMESTAMP",
    "MEASUREMENTS_SCHEMA",
    "MEASUREMENT_KEY",
    "TRIALS_BASE_SCHEMA",
    "SPACE_PREFIX",
    "FAILURES_SCHEMA",
    "trials_schema",
    "rows_to_table",
    "trials_to_table",
]

TIMESTAMP = pa.timestamp("us", tz="UTC")

MEASUREMENTS_SCHEMA = pa.schema(
    [
        pa.field("trial", pa.int64(), nullable=False),
        pa.field("rung", pa.int32(), nullable=False),
        pa.field("attempt", pa.int32(), nullable=False),
        pa.field("seq", pa.int32(), nullable=False),
        pa.field("budget", pa.float64(), nullable=False),
        pa.field("metric", pa.string(), nullable=False),
        pa.field("value", pa.float64(), nullable=False),
        pa.field("final", pa.bool_(), nullable=False),
        pa.field("node", pa.string()),
        pa.field("started_at", TIMESTAMP),
        pa.field("ended_at", TIMESTAMP),
    ]
)

#: Identifies one measurement; reads keep one row per key.
MEASUREMENT_KEY = ("trial", "rung", "attempt", "seq", "metric")

TRIALS_BASE_SCHEMA = pa.schema(
    [
        pa.field("trial", pa.int64(), nullable=False),
        pa.field("status", pa.string(), nullable=False),
        pa.field("rung", pa.int32(), nullable=False),
        pa.field("budget_reached", pa.float64()),
        pa.field("latest_value", pa.float64()),
        pa.field("record_value", pa.float64()),
        pa.field("attempts", pa.int32(), nullable=False),
        pa.field("failures", pa.int32(), nullable=False),
    ]
)

SPACE_PREFIX = "space_"

FAILURES_SCHEMA = pa.schema(
    [
        pa.field("trial", pa.int64(), nullable=False),
        pa.field("rung", pa.int32(), nullable=False),
        pa.field("attempt", pa.int32(), nullable=False),
        pa.field("error_type", pa.string(), nullable=False),
        pa.field("message", pa.string(), nullable=False),
        pa.field("traceback", pa.string(), nullable=False),
        pa.field("node", pa.string()),
        pa.field("recorded_at", TIMESTAMP, nullable=False),
    ]
)


def trials_schema(parameter_types: Mapping[str, pa.DataType]) -> pa.Schema:
    """The trials table's schema for parameters of the given Arrow types, in that order."""
    fields = list(TRIALS_BASE_SCHEMA)
    fields += [pa.field(SPACE_PREFIX + name, kind) for name, kind in parameter_types.items()]
    return pa.schema(fields)


# -- value checks -----------------------------------------------------------------------


def _int(value: Any) -> Any:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise TypeError("an integer")
    return int(value)


def _float(value: Any) -> Any:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise TypeError("a number")
    return float(value)


def _bool(value: Any) -> Any:
    if not isinstance(value, (bool, np.bool_)):
        raise TypeError("a bool")
    return bool(value)


def _str(value: Any) -> Any:
    if not isinstance(value, str):
        raise TypeError("a string")
    return value


def _timestamp(value: Any) -> Any:
    if not isinstance(value, dt.datetime):
        raise TypeError("a time-zone-aware datetime")
    if value != value:  # pandas.NaT
        return None
    if value.tzinfo is None or value.utcoffset() is None:
        raise TypeError("a time-zone-aware datetime (naive datetimes are ambiguous across machines)")
    return value.astimezone(dt.timezone.utc)


def _checker(kind: pa.DataType) -> Callable[[Any], Any]:
    if pa.types.is_integer(kind):
        return _int
    if pa.types.is_floating(kind):
        return _float
    if pa.types.is_boolean(kind):
        return _bool
    if pa.types.is_string(kind):
        return _str
    if pa.types.is_timestamp(kind):
        return _timestamp
    raise AssertionError(f"no row check for Arrow type {kind}")  # pragma: no cover


def _is_null(value: Any) -> bool:
    return value is None or value is pd.NA or value is pd.NaT


def _column(rows: Sequence[Mapping[str, Any]], field: pa.Field, values: list[Any] | None = None) -> pa.Array:
    check = _checker(field.type)
    source = values if values is not None else [row.get(field.name) for row in rows]
    cleaned: list[Any] = []
    for index, value in enumerate(source):
        if not _is_null(value):
            try:
                value = check(value)
            except TypeError as exc:
                raise InvalidRows(
                    f"row {index}: expected {exc}, got {type(value).__name__} {value!r}", column=field.name
                ) from None
        if value is None and not field.nullable:
            raise InvalidRows(f"row {index}: a value is required (got none)", column=field.name)
        cleaned.append(value)
    try:
        return pa.array(cleaned, type=field.type)
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError) as exc:
        raise InvalidRows(f"value does not fit {field.type}: {exc}", column=field.name) from None


def _check_mappings(rows: Sequence[Mapping[str, Any]]) -> None:
    if isinstance(rows, Mapping) or not isinstance(rows, Sequence):
        raise InvalidRows(f"rows must be a sequence of mappings, got {type(rows).__name__}")
    for index, row in enumerate(rows):
        if not isinstance(row, Mapping):
            raise InvalidRows(f"row {index} must be a mapping, got {type(row).__name__}")


def rows_to_table(rows: Sequence[Mapping[str, Any]], schema: pa.Schema) -> pa.Table:
    """Check ``rows`` against ``schema`` and build the table; nullable columns may be omitted."""
    _check_mappings(rows)
    known = set(schema.names)
    for index, row in enumerate(rows):
        unknown = sorted(set(row) - known, key=str)
        if unknown:
            raise InvalidRows(
                f"row {index}: unknown column (the columns are {', '.join(schema.names)})",
                column=str(unknown[0]),
            )
    arrays = [_column(rows, field) for field in schema]
    return pa.Table.from_arrays(arrays, schema=schema)


def _parameter_array(name: str, values: list[Any]) -> pa.Array:
    """Infer one parameter column's type; mixed types fall back to their text form."""
    try:
        # from_pandas: NaN means "absent" here, as it does in the frame read_trials returns.
        return pa.array(values, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        text = [None if _is_null(value) or value != value else str(value) for value in values]
        return pa.array(text, type=pa.string())


def trials_to_table(rows: Sequence[Mapping[str, Any]], parameter_names: Sequence[str]) -> pa.Table:
    """Check trial rows and build the trials table.

    A row gives its configuration either as ``params`` (a mapping of name to value) or as
    ``space_<name>`` keys (the shape :func:`read_trials` returns). Parameters a row lacks
    (conditional ones) become null. Each parameter column's type is inferred from its
    values: all-null columns have Arrow's null type; values of mixed, incompatible types
    (say 3 and "auto") are stored as their ``str()``.
    """
    _check_mappings(rows)
    if isinstance(parameter_names, str):
        raise InvalidRows("parameter_names must be a sequence of names, not one string")
    names = list(parameter_names)
    for name in names:
        if not isinstance(name, str) or not name:
            raise InvalidRows(f"parameter names must be non-empty strings, got {name!r}")
    if len(set(names)) != len(names):
        raise InvalidRows(f"parameter names repeat: {names}")
    allowed = set(names)
    base = set(TRIALS_BASE_SCHEMA.names)
    parameters_per_row: list[dict[str, Any]] = []
    for index, row in enumerate(rows):
        params: dict[str, Any] = {}
        nested = row.get("params")
        if nested is not None:
            if not isinstance(nested, Mapping):
                raise InvalidRows(f"row {index}: params must be a mapping", column="params")
            params.update(nested)
        for key, value in row.items():
            if key == "params" or key in base:
                continue
            if isinstance(key, str) and key.startswith(SPACE_PREFIX):
                params[key[len(SPACE_PREFIX):]] = value
            else:
                raise InvalidRows(
                    f"row {index}: unknown column (the columns are {', '.join(TRIALS_BASE_SCHEMA.names)}, "
                    f"params or space_<name>)",
                    column=str(key),
                )
        stray = sorted(set(params) - allowed, key=str)
        if stray:
            raise InvalidRows(f"row {index}: parameter {stray[0]!r} is not in parameter_names {names}",
                              column=SPACE_PREFIX + str(stray[0]))
        parameters_per_row.append(params)
    arrays = [_column(rows, field) for field in TRIALS_BASE_SCHEMA]
    parameter_arrays = [_parameter_array(name, [params.get(name) for params in parameters_per_row]) for name in names]
    schema = trials_schema({name: array.type for name, array in zip(names, parameter_arrays)})
    return pa.Table.from_arrays(arrays + parameter_arrays, schema=schema)
