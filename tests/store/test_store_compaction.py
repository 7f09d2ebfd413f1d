"""Compaction: many parts become one block; reads never change and never double a row."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow.parquet as pq
import pytest

from rungway.scheduler.store import MEASUREMENTS_SCHEMA, SearchFiles, Store
from rungway.scheduler.store import tables
from rungway.scheduler.store.tables import MERGED_PARTS_KEY


def segment(trial: int, rung: int = 0, attempt: int = 0, n: int = 3) -> list[dict[str, Any]]:
    return [
        dict(trial=trial, rung=rung, attempt=attempt, seq=i, budget=float(rung + 1), metric="loss",
             value=1.0 / (i + trial + 1), final=i == n - 1, node=f"n{trial % 4}")
        for i in range(n)
    ]


@pytest.fixture
def files(tmp_path: Path) -> SearchFiles:
    return Store(str(tmp_path)).search("s")


def names(files: SearchFiles) -> list[str]:
    return sorted(p.name for p in Path(files.layout.measurements).iterdir())


def test_two_hundred_parts_become_one_block_and_reads_do_not_change(files: SearchFiles) -> None:
    for trial in range(200):
        files.write_measurements(segment(trial))
    before = files.read_measurements()
    assert len(before) == 600

    assert files.compact_measurements(min_parts=64) == 200
    after = names(files)
    assert len(after) == 1 and after[0].startswith("block-000001-")
    block = Path(files.layout.measurements) / after[0]
    assert pq.read_schema(block).equals(MEASUREMENTS_SCHEMA, check_metadata=False)
    assert len(json.loads(pq.read_schema(block).metadata[MERGED_PARTS_KEY])) == 200
    pd.testing.assert_frame_equal(files.read_measurements(), before)


def test_below_min_parts_nothing_is_merged(files: SearchFiles) -> None:
    for trial in range(3):
        files.write_measurements(segment(trial))
    assert files.compact_measurements(min_parts=4) == 0
    assert all(name.startswith("part-") for name in names(files)) and len(names(files)) == 3


def test_later_compactions_add_numbered_blocks(files: SearchFiles) -> None:
    for trial in range(4):
        files.write_measurements(segment(trial))
    files.compact_measurements(min_parts=2)
    for trial in range(4, 7):
        files.write_measurements(segment(trial))
    assert files.compact_measurements(min_parts=2) == 3
    blocks = names(files)
    assert [name[:12] for name in blocks] == ["block-000001", "block-000002"]
    assert sorted(set(files.read_measurements()["trial"])) == list(range(7))
    assert len(files.read_measurements()) == 21


def test_crash_between_block_write_and_part_deletion(files: SearchFiles) -> None:
    for trial in range(10):
        files.write_measurements(segment(trial))
    before = files.read_measurements()

    # Run compaction's steps by hand and "crash" before deleting the parts.
    plan = tables.plan_compaction(files._volume, files.layout)
    assert len(plan.pending) == 10 and plan.leftovers == []
    block, merged = tables.write_block(files._volume, files.layout, plan.pending, plan.next_block)
    assert len(merged) == 10 and Path(block).exists()
    assert len(names(files)) == 11  # the block plus all ten parts it already holds

    # Every read still sees each row once.
    pd.testing.assert_frame_equal(files.read_measurements(), before)

    # A new part arrives before the next compaction; min_parts is not reached.
    files.write_measurements(segment(99))
    plan = tables.plan_compaction(files._volume, files.layout)
    assert len(plan.leftovers) == 10 and len(plan.pending) == 1
    assert files.compact_measurements(min_parts=64) == 10
    remaining = names(files)
    assert len(remaining) == 2 and remaining[0] == Path(block).name and remaining[1].startswith("part-t99-")
    assert len(files.read_measurements()) == len(before) + 3


def test_duplicate_rows_across_files_are_read_once(files: SearchFiles) -> None:
    # E.g. a block whose metadata was lost, next to the parts it came from.
    part = files.write_measurements(segment(1))
    copy = Path(files.layout.measurements) / "block-000007-0123abcd.parquet"
    copy.write_bytes(Path(part).read_bytes())
    frame = files.read_measurements()
    assert len(frame) == 3 and frame["seq"].tolist() == [0, 1, 2]


def test_parts_written_during_compaction_are_kept(files: SearchFiles) -> None:
    for trial in range(5):
        files.write_measurements(segment(trial))
    plan = tables.plan_compaction(files._volume, files.layout)
    late = Path(files.write_measurements(segment(50)))  # lands after the listing
    _, merged = tables.write_block(files._volume, files.layout, plan.pending, plan.next_block)
    tables.delete_parts(files._volume, files.layout, merged)
    assert late.exists()
    assert sorted(set(files.read_measurements()["trial"])) == [0, 1, 2, 3, 4, 50]


def test_read_lists_again_when_a_part_vanishes_under_it(files: SearchFiles, monkeypatch: pytest.MonkeyPatch) -> None:
    for trial in range(3):
        files.write_measurements(segment(trial))
    expected = files.read_measurements()
    real_read = files._volume.read_table
    compacted = []

    def read_then_compact(path: str) -> Any:
        # The first time a part is opened, a compactor merges and deletes all parts first.
        if not compacted and "/part-" in path:
            compacted.append(0)
            compacted[0] = tables.compact_measurements(files._volume, files.layout, min_parts=1)
        return real_read(path)

    monkeypatch.setattr(files._volume, "read_table", read_then_compact)
    pd.testing.assert_frame_equal(files.read_measurements(), expected)
    assert compacted == [3]


@pytest.mark.parametrize("bad", [0, -5, 2.0, True])
def test_min_parts_must_be_a_positive_int(files: SearchFiles, bad: object) -> None:
    with pytest.raises(ValueError, match="min_parts"):
        files.compact_measurements(min_parts=bad)  # type: ignore[arg-type]
