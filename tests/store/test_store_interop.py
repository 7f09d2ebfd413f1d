"""The files are plain Parquet: pandas, pyarrow.dataset and duckdb read them directly.

These mirror the snippets in docs/storage.md.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow.dataset as ds
import pytest

from rungway.scheduler.store import MEASUREMENTS_SCHEMA, SearchFiles, Store


def segment(trial: int, n: int = 3) -> list[dict[str, Any]]:
    return [
        dict(trial=trial, rung=0, attempt=0, seq=i, budget=1.0, metric="loss", value=float(trial + i),
             final=i == n - 1, node="n1")
        for i in range(n)
    ]


@pytest.fixture
def files(tmp_path: Path) -> SearchFiles:
    files = Store(str(tmp_path)).search("demo")
    for trial in range(4):
        files.write_measurements(segment(trial))
    files.compact_measurements(min_parts=2)  # one block ...
    files.write_measurements(segment(10))  # ... plus one part
    files.write_trials(
        [dict(trial=t, status="done", rung=0, budget_reached=1.0, latest_value=float(t), record_value=float(t), attempts=1, failures=0,
              params={"lr": 0.1 * (t + 1)}) for t in (0, 1, 2, 3, 10)],
        ["lr"],
    )
    return files


def test_pandas_reads_the_measurements_folder(files: SearchFiles) -> None:
    frame = pd.read_parquet(f"{files.path}/measurements")
    assert len(frame) == 15
    assert sorted(frame["trial"].unique()) == [0, 1, 2, 3, 10]
    trials = pd.read_parquet(f"{files.path}/trials.parquet")
    assert trials.set_index("trial").loc[10, "space_lr"] == pytest.approx(1.1)


def test_pyarrow_dataset_reads_with_the_schema(files: SearchFiles) -> None:
    dataset = ds.dataset(f"{files.path}/measurements", format="parquet", schema=MEASUREMENTS_SCHEMA)
    table = dataset.to_table(filter=ds.field("final"))
    assert table.num_rows == 5
    assert table.schema.equals(MEASUREMENTS_SCHEMA)


def test_duckdb_reads_the_glob(files: SearchFiles) -> None:
    con = duckdb.connect()
    final = con.execute(
        f"""
        SELECT trial, value
        FROM read_parquet('{files.path}/measurements/*.parquet')
        WHERE final AND metric = 'loss'
        ORDER BY trial
        """
    ).fetchall()
    assert final == [(0, 2.0), (1, 3.0), (2, 4.0), (3, 5.0), (10, 12.0)]
    joined = con.execute(
        f"""
        SELECT t.space_lr, min(m.value) AS best
        FROM read_parquet('{files.path}/measurements/*.parquet') m
        JOIN read_parquet('{files.path}/trials.parquet') t USING (trial)
        GROUP BY t.space_lr ORDER BY best
        """
    ).fetchall()
    assert len(joined) == 5 and joined[0][1] == 0.0


def test_duckdb_dedup_query_matches_read_measurements(files: SearchFiles) -> None:
    # Leave a crash-window duplicate: a part next to a block that already holds it.
    part = Path(files.write_measurements(segment(20)))
    block = Path(files.layout.measurements) / "block-000099-00000000.parquet"
    block.write_bytes(part.read_bytes())
    con = duckdb.connect()
    raw = con.execute(f"SELECT count(*) FROM read_parquet('{files.path}/measurements/*.parquet')").fetchone()
    deduped = con.execute(
        f"""
        SELECT count(*) FROM (
          SELECT * FROM read_parquet('{files.path}/measurements/*.parquet')
          QUALIFY row_number() OVER (PARTITION BY trial, rung, attempt, seq, metric) = 1
        )
        """
    ).fetchone()
    assert raw == (21,) and deduped == (18,)
    assert len(files.read_measurements()) == 18
