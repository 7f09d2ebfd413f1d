"""Round-trips and row checks for the measurements, trials and failures tables and the spec."""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from rungway.scheduler.store import (
    FAILURES_SCHEMA,
    MEASUREMENTS_SCHEMA,
    TRIALS_BASE_SCHEMA,
    InvalidRows,
    SearchFiles,
    StorageCorrupt,
    Store,
    trials_schema,
)

T0 = dt.datetime(2024, 5, 1, 12, 0, 0, 123456, tzinfo=dt.timezone.utc)


def measurement(**overrides: Any) -> dict[str, Any]:
    row: dict[str, Any] = dict(
        trial=1, rung=0, attempt=0, seq=0, budget=1.0, metric="loss", value=0.5, final=False,
        node="n1", started_at=T0, ended_at=T0 + dt.timedelta(seconds=2),
    )
    row.update(overrides)
    return row


@pytest.fixture
def files(tmp_path: Path) -> SearchFiles:
    return Store(str(tmp_path)).search("s")


# -- measurements -----------------------------------------------------------------------


def test_measurements_round_trip_with_the_documented_schema(files: SearchFiles) -> None:
    plus_two = dt.timezone(dt.timedelta(hours=2))
    rows = [
        measurement(seq=0, value=float("nan")),
        measurement(seq=1, value=float("inf"), node=None, started_at=None, ended_at=None),
        measurement(seq=2, value=-float("inf"), final=True, budget=np.float64(3.0), trial=np.int64(1)),
        measurement(seq=2, metric="acc", value=1, final=True, started_at=T0.astimezone(plus_two)),
    ]
    path = files.write_measurements(rows)
    assert pq.read_schema(path).equals(MEASUREMENTS_SCHEMA)

    frame = files.read_measurements()
    assert list(frame.columns) == MEASUREMENTS_SCHEMA.names
    assert frame.dtypes.to_dict() == MEASUREMENTS_SCHEMA.empty_table().to_pandas().dtypes.to_dict()
    assert len(frame) == 4
    # Sorted by the key: (seq 2, "acc") precedes (seq 2, "loss").
    assert list(zip(frame["seq"], frame["metric"])) == [(0, "loss"), (1, "loss"), (2, "acc"), (2, "loss")]
    values = frame["value"].tolist()
    assert math.isnan(values[0]) and values[1] == math.inf and values[2] == 1.0 and values[3] == -math.inf
    assert frame["final"].tolist() == [False, False, True, True]
    assert pd.isna(frame.loc[1, "node"]) and pd.isna(frame.loc[1, "started_at"])
    # Time zones are normalised to UTC, microseconds kept.
    assert frame.loc[2, "started_at"] == pd.Timestamp(T0)
    assert str(frame["started_at"].dtype) == "datetime64[us, UTC]"


def test_read_measurements_of_an_empty_search_has_the_columns(files: SearchFiles) -> None:
    frame = files.read_measurements()
    assert frame.empty and list(frame.columns) == MEASUREMENTS_SCHEMA.names


@pytest.mark.parametrize(
    ("overrides", "column", "says"),
    [
        (dict(trial=1.5), "trial", "expected an integer"),
        (dict(rung=True), "rung", "expected an integer"),
        (dict(value="0.3"), "value", "expected a number"),
        (dict(final=1), "final", "expected a bool"),
        (dict(metric=None), "metric", "a value is required"),
        (dict(seq=2**40), "seq", "does not fit int32"),
        (dict(started_at=dt.datetime(2024, 1, 1)), "started_at", "naive"),
        (dict(started_at="2024-01-01"), "started_at", "time-zone-aware"),
        (dict(colour="red"), "colour", "unknown column"),
    ],
)
def test_bad_measurement_rows_name_the_column(
    files: SearchFiles, overrides: dict[str, Any], column: str, says: str
) -> None:
    with pytest.raises(InvalidRows, match=says) as caught:
        files.write_measurements([measurement(), measurement(**{"seq": 1, **overrides})])
    assert caught.value.column == column
    assert f"column {column!r}" in str(caught.value)
    assert "row 1" in str(caught.value) or column == "seq"  # range errors come from Arrow, per column
    assert files.read_measurements().empty


def test_missing_required_column_is_named(files: SearchFiles) -> None:
    row = measurement()
    del row["budget"]
    with pytest.raises(InvalidRows, match="required") as caught:
        files.write_measurements([row])
    assert caught.value.column == "budget"


def test_a_write_of_several_segments_is_one_batch_part(files: SearchFiles) -> None:
    path = files.write_measurements([measurement(), measurement(attempt=1)])
    assert path.rsplit("/", 1)[1].startswith("part-batch-n2-")
    assert len(files.read_measurements()) == 2
    single = files.write_measurements([measurement(attempt=2)])
    assert "-a2-" in single.rsplit("/", 1)[1]


def test_an_empty_write_is_refused(files: SearchFiles) -> None:
    with pytest.raises(InvalidRows, match="no rows"):
        files.write_measurements([])
    assert files.read_measurements().empty


def test_rows_must_be_mappings(files: SearchFiles) -> None:
    with pytest.raises(InvalidRows, match="row 0 must be a mapping"):
        files.write_measurements([("trial", 1)])  # type: ignore[list-item]
    with pytest.raises(InvalidRows, match="sequence of mappings"):
        files.write_measurements(measurement())  # type: ignore[arg-type]


def test_a_foreign_file_in_measurements_is_reported_as_corrupt(files: SearchFiles) -> None:
    files.write_measurements([measurement()])
    stray = Path(files.layout.measurements) / "part-t9-r0-a0-deadbeef.parquet"
    pq.write_table(pa.table({"x": [1]}), stray)
    with pytest.raises(StorageCorrupt, match="expected columns") as caught:
        files.read_measurements()
    assert caught.value.path == str(stray)


def test_a_damaged_part_is_reported_as_corrupt_with_its_path(files: SearchFiles) -> None:
    path = Path(files.write_measurements([measurement()]))
    path.write_bytes(path.read_bytes()[:20])
    with pytest.raises(StorageCorrupt, match="move it out") as caught:
        files.read_measurements()
    assert caught.value.path == str(path)


# -- trials -----------------------------------------------------------------------------


def trial_row(trial: int, **extra: Any) -> dict[str, Any]:
    row: dict[str, Any] = dict(
        trial=trial, status="running", rung=0, budget_reached=1.0, latest_value=0.25, record_value=0.2, attempts=1, failures=0
    )
    row.update(extra)
    return row


def test_trials_round_trip_with_inferred_parameter_types(files: SearchFiles) -> None:
    rows = [
        trial_row(0, params={"lr": 0.1, "depth": 3, "kernel": "rbf", "gamma": 0.5, "shrink": True}),
        trial_row(1, status="stopped", latest_value=None, record_value=None, params={"lr": 0.01, "depth": 5, "kernel": "linear",
                                                               "shrink": False}),
        trial_row(2, space_lr=1e-3, space_depth=7, space_kernel="rbf", space_gamma=2.0),
    ]
    names = ["lr", "depth", "kernel", "gamma", "shrink", "never"]
    files.write_trials(rows, names)
    expected = trials_schema(
        {"lr": pa.float64(), "depth": pa.int64(), "kernel": pa.string(), "gamma": pa.float64(),
         "shrink": pa.bool_(), "never": pa.null()}
    )
    assert pq.read_schema(files.layout.trials).equals(expected)

    frame = files.read_trials()
    assert list(frame.columns) == expected.names
    assert pa.Table.from_pandas(frame, schema=expected, preserve_index=False).schema.equals(expected)
    assert frame["trial"].tolist() == [0, 1, 2]
    assert frame["status"].tolist() == ["running", "stopped", "running"]
    assert pd.isna(frame.loc[1, "latest_value"])
    assert pd.isna(frame.loc[1, "space_gamma"])  # conditional parameter absent -> null
    assert frame["space_depth"].tolist() == [3, 5, 7]
    assert frame.loc[2, "space_lr"] == pytest.approx(1e-3)


def test_trials_frame_written_back_gives_the_same_table(files: SearchFiles) -> None:
    files.write_trials([trial_row(0, params={"a": 1.5}), trial_row(1, params={})], ["a"])
    first = pq.read_table(files.layout.trials)
    records = files.read_trials().to_dict("records")
    files.write_trials(records, ["a"])
    assert pq.read_table(files.layout.trials).equals(first)


def test_trials_with_mixed_type_space_fall_back_to_text(files: SearchFiles) -> None:
    files.write_trials([trial_row(0, params={"c": 3}), trial_row(1, params={"c": "auto"})], ["c"])
    frame = files.read_trials()
    assert frame["space_c"].tolist() == ["3", "auto"]


def test_trials_replace_the_whole_table(files: SearchFiles) -> None:
    files.write_trials([trial_row(0), trial_row(1)], [])
    files.write_trials([trial_row(5)], [])
    assert files.read_trials()["trial"].tolist() == [5]


def test_read_trials_before_any_write_has_the_base_columns(files: SearchFiles) -> None:
    frame = files.read_trials()
    assert frame.empty and list(frame.columns) == TRIALS_BASE_SCHEMA.names


@pytest.mark.parametrize(
    ("row", "names", "column"),
    [
        (trial_row(0, params={"unlisted": 1}), ["lr"], "space_unlisted"),
        (trial_row(0, colour="red"), [], "colour"),
        (trial_row(0, attempts=None), [], "attempts"),
        (trial_row(0, status=3), [], "status"),
    ],
)
def test_bad_trial_rows_name_the_column(files: SearchFiles, row: dict[str, Any], names: list[str], column: str) -> None:
    with pytest.raises(InvalidRows) as caught:
        files.write_trials([row], names)
    assert caught.value.column == column
    assert not Path(files.layout.trials).exists()


def test_duplicate_trials_are_refused(files: SearchFiles) -> None:
    with pytest.raises(InvalidRows, match="once"):
        files.write_trials([trial_row(0), trial_row(0)], [])


# -- failures and spec ------------------------------------------------------------------


def test_failures_round_trip(files: SearchFiles) -> None:
    assert files.read_failures().empty
    path = files.record_failure(4, 1, 0, "MemoryError", "out of memory", "Traceback (most recent call last):\n  ...")
    files.record_failure(4, 1, 1, "ValueError", "bad value", "tb", node="n7")
    assert pq.read_schema(path).equals(FAILURES_SCHEMA)
    frame = files.read_failures()
    assert list(frame.columns) == FAILURES_SCHEMA.names
    assert frame["attempt"].tolist() == [0, 1]
    assert frame.loc[0, "traceback"].startswith("Traceback")
    assert frame.loc[1, "node"] == "n7" and pd.isna(frame.loc[0, "node"])
    assert str(frame["recorded_at"].dtype) == "datetime64[us, UTC]"


def test_spec_round_trip(files: SearchFiles) -> None:
    assert files.read_spec() is None
    text = 'name = "s"\n# ünïcödé comment\n'
    files.write_spec(text)
    assert files.read_spec() == text
    files.write_spec("replaced\n")
    assert files.read_spec() == "replaced\n"


def test_a_foreign_trials_file_is_reported_as_corrupt(files: SearchFiles) -> None:
    Path(files.path).mkdir(parents=True)
    pq.write_table(pa.table({"trial": [1], "colour": ["red"]}), files.layout.trials)
    with pytest.raises(StorageCorrupt, match="trials columns"):
        files.read_trials()
