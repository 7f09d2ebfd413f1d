"""The CPU ledger (rungway.scheduler.service.ledger)."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from rungway.scheduler.service.ledger import BLOCK_FAN_IN, LEDGER_SCHEMA, Ledger, LedgerRow
from rungway.scheduler.service.models import SearchUsage
from rungway.scheduler.store.errors import InvalidRows, StorageCorrupt

DOC = Path(__file__).resolve().parents[2] / "docs" / "storage.md"


def row(team: str = "acoustics", search: str = "lr-sweep", trial: int = 0, *, ended: float = 1_000.0,
        seconds: float = 10.0, cpus: float = 2.0, memory_mb: int = 512, **more: Any) -> LedgerRow:
    fields: dict[str, Any] = dict(attempt=0, rung=0, node="node-1", outcome="result", preempted=False)
    fields.update(more)
    return LedgerRow(team=team, search=search, trial=trial, started=ended - seconds, ended=ended, cpus=cpus,
                     memory_mb=memory_mb, **fields)


def fill(ledger: Ledger, parts: int, rows_per_part: int = 3, start: int = 0) -> None:
    """Rows of both kinds: most with the CPU time they used, every third with it unknown."""
    for p in range(start, start + parts):
        ledger.append([
            row(("acoustics", "optics")[r % 2], f"s{p % 3}", trial=p, attempt=r, ended=1_000.0 + p + r / 10,
                seconds=1.0 + r, cpus=0.5 * (1 + r % 3), cpu_seconds=None if (p + r) % 3 == 0 else 0.25 * (1 + r))
            for r in range(rows_per_part)
        ])


def totals(ledger: Ledger) -> dict[str, float]:
    return ledger.cpu_seconds_by_team()


# -- writing and reading ------------------------------------------------------------------


def test_round_trip(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    rows = [row(trial=1, ended=2_000.0, seconds=30.0, cpus=4.0, memory_mb=1024, node=None, outcome="yielded",
                preempted=True, attempt=2, rung=3, cpu_seconds=97.5),
            row("optics", "blur", trial=7, ended=1_500.0, seconds=0.0)]
    ledger.append(rows)
    ledger.append([])  # no rows: no file
    assert len(ledger.files()) == 1
    frame = ledger.read()
    assert list(frame.columns) == LEDGER_SCHEMA.names
    first, second = frame.to_dict("records")  # ordered by ended
    assert (second["team"], second["trial"], second["attempt"], second["rung"]) == ("acoustics", 1, 2, 3)
    assert pd.isna(second["node"]) and second["outcome"] == "yielded" and bool(second["preempted"])
    # CPU time used as measured; reserved: cpus x (ended - started).
    assert second["cpu_seconds"] == 97.5 and second["reserved_cpu_seconds"] == 4.0 * 30.0
    assert second["memory_mb_seconds"] == 1024 * 30.0
    assert (first["team"], first["search"], first["reserved_cpu_seconds"]) == ("optics", "blur", 0.0)
    assert pd.isna(first["cpu_seconds"])  # not measured: unknown
    assert rows[0].reserved_cpu_seconds == 120.0 and rows[0].memory_mb_seconds == 1024 * 30.0


def test_derived_columns_may_be_given_when_they_agree(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    ledger.append([row(seconds=3.0, cpus=0.1, memory_mb=7, reserved_cpu_seconds=0.1 * 3.0, memory_mb_seconds=21.0)])
    assert ledger.read()[["reserved_cpu_seconds", "memory_mb_seconds"]].values.tolist() == [[0.1 * 3.0, 21.0]]


def test_empty_ledger_reads_as_empty_frame(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path / "nothing-yet"))
    frame = ledger.read()
    assert frame.empty and list(frame.columns) == LEDGER_SCHEMA.names
    assert frame.dtypes.to_dict() == LEDGER_SCHEMA.empty_table().to_pandas().dtypes.to_dict()
    assert ledger.cpu_seconds_by_team() == {} and ledger.usage() == ({}, [])


def _documented_columns() -> list[tuple[str, str, bool]]:
    text = DOC.read_text()
    section = text.split("## The CPU ledger", 1)[1].split("\n## ", 1)[0]
    found = re.findall(r"^\| `(\w+)`\s*\| (\w+)\s*\| (yes|no)\s*\|", section, re.M)
    return [(name, kind, null == "yes") for name, kind, null in found]


def test_files_have_the_documented_columns(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    ledger.append([row()])
    documented = _documented_columns()
    assert len(documented) == 15
    schema = pq.read_schema(tmp_path / "_ledger" / ledger.files()[0])
    # The doc names types as pyarrow's aliases do (float64 for what pyarrow prints as double).
    assert [(f.name, f.type, f.nullable) for f in schema] == [
        (name, pa.type_for_alias(kind), null) for name, kind, null in documented]
    assert schema.equals(LEDGER_SCHEMA)


@pytest.mark.parametrize(
    ("bad", "column"),
    [
        (dict(outcome="finished"), "outcome"),
        (dict(seconds=-1.0), "ended"),
        (dict(cpus=-1.0), "cpus"),
        (dict(memory_mb=1.5), "memory_mb"),
        (dict(trial=True), "trial"),
        (dict(team=None), "team"),
        (dict(cpus=float("inf")), "cpus"),
        (dict(reserved_cpu_seconds=1.0), "reserved_cpu_seconds"),  # given, but not cpus * (ended - started) = 20
        (dict(cpu_seconds=-1.0), "cpu_seconds"),
        (dict(cpu_seconds=float("nan")), "cpu_seconds"),
        (dict(memory_mb_seconds=-5.0), "memory_mb_seconds"),
    ],
)
def test_bad_rows_write_nothing(tmp_path: Path, bad: dict[str, Any], column: str) -> None:
    ledger = Ledger(str(tmp_path))
    with pytest.raises(InvalidRows) as info:
        ledger.append([row(), row(**bad)])
    assert info.value.column == column and "row 1" in str(info.value)
    assert ledger.files() == []


def test_period_filter(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    ledger.append([row(trial=1, ended=100.0), row(trial=2, ended=200.0), row("optics", trial=3, ended=300.0)])
    ledger.append([row(trial=4, ended=199.999)])
    # [since, until): a row ending exactly at `until` belongs to the next period.
    assert ledger.read(since=100.0, until=200.0)["trial"].tolist() == [1, 4]
    assert ledger.read(since=200.0)["trial"].tolist() == [2, 3]
    assert ledger.read(until=100.0).empty
    # Unknown CPU time counts the reservation (2 CPUs x 10 s); a measured one counts as measured.
    assert ledger.cpu_seconds_by_team(since=200.0) == {"acoustics": 20.0, "optics": 20.0}
    assert ledger.cpu_seconds_by_team() == {"acoustics": 60.0, "optics": 20.0}
    ledger.append([row("optics", trial=5, ended=400.0, cpu_seconds=7.5)])
    assert ledger.cpu_seconds_by_team(since=200.0) == {"acoustics": 20.0, "optics": 27.5}


def test_usage_report(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    ledger.append([row(search="a", seconds=3600.0, cpus=2.0, memory_mb=1000, cpu_seconds=5400.0),
                   row(search="b", seconds=1800.0, cpus=1.0, memory_mb=0),
                   row("optics", "c", seconds=7200.0, cpus=0.5, memory_mb=2000, ended=9_000.0, cpu_seconds=720.0)])
    ledger.append([row(search="a", seconds=3600.0, cpus=1.0, memory_mb=0, ended=50_000.0)])
    teams, searches = ledger.usage(since=0.0, until=10_000.0)
    # CPU-hours: the CPU time used (b's is unknown: its reservation); reserved: cpus x hours.
    assert teams == {
        "acoustics": {"cpu_hours": 2.0, "reserved_cpu_hours": 2.5, "memory_mb_hours": 1000.0, "segments": 2},
        "optics": {"cpu_hours": 0.2, "reserved_cpu_hours": 1.0, "memory_mb_hours": 4000.0, "segments": 1},
    }
    assert [SearchUsage(**s) for s in searches] == [
        SearchUsage(team="acoustics", search="a", cpu_hours=1.5, reserved_cpu_hours=2.0, segments=1),
        SearchUsage(team="acoustics", search="b", cpu_hours=0.5, reserved_cpu_hours=0.5, segments=1),
        SearchUsage(team="optics", search="c", cpu_hours=0.2, reserved_cpu_hours=1.0, segments=1),
    ]
    assert ledger.usage()[0]["acoustics"]["cpu_hours"] == 3.0


def test_uri_root(tmp_path: Path) -> None:
    ledger = Ledger(f"file://{tmp_path}")
    fill(ledger, 3)
    assert (tmp_path / "_ledger").is_dir()
    assert len(ledger.read()) == 9
    assert ledger.compact(min_parts=2) == 3 and len(ledger.read()) == 9


def test_a_foreign_file_is_reported(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    ledger.append([row()])
    pq.write_table(pa.table({"x": [1]}), tmp_path / "_ledger" / "part-foreign.parquet")
    with pytest.raises(StorageCorrupt, match="lacks ledger column"):
        ledger.read()


# -- compaction ---------------------------------------------------------------------------


def test_compaction_keeps_every_row_once(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 70)
    before = ledger.read()
    assert ledger.compact(min_parts=71) == 0 and len(ledger.files()) == 70  # not enough parts yet
    assert ledger.compact(min_parts=64) == 70
    assert len(ledger.files()) == 1 and ledger.files()[0].startswith("block-")
    pd.testing.assert_frame_equal(ledger.read(), before)
    fill(ledger, 2, start=70)
    assert len(ledger.read()) == len(before) + 6
    assert ledger.statistics() == {"parts": 2, "blocks": 1, "leftovers": 0}


class Crash(Exception):
    """Stands for the process dying at that point."""


def test_crash_after_the_block_is_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 10)
    before, sums = ledger.read(), totals(ledger)

    def die(path: str) -> bool:
        raise Crash(path)

    monkeypatch.setattr(ledger.volume, "delete", die)
    with pytest.raises(Crash):
        ledger.compact(min_parts=5)
    monkeypatch.undo()
    # The block and all ten parts are on disk; the parts are covered, so nothing counts twice.
    assert len(ledger.files()) == 11
    assert ledger.statistics() == {"parts": 0, "blocks": 1, "leftovers": 10}
    pd.testing.assert_frame_equal(ledger.read(), before)
    assert totals(ledger) == sums
    # The next compaction only clears the leftovers, whatever min_parts says.
    assert ledger.compact(min_parts=1_000) == 10
    assert len(ledger.files()) == 1
    pd.testing.assert_frame_equal(ledger.read(), before)


def test_crash_halfway_through_the_deletions(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 10)
    before = ledger.read()
    real, deleted = ledger.volume.delete, []

    def some_then_die(path: str) -> bool:
        if len(deleted) == 4:
            raise Crash(path)
        deleted.append(path)
        return real(path)

    monkeypatch.setattr(ledger.volume, "delete", some_then_die)
    with pytest.raises(Crash):
        ledger.compact(min_parts=5)
    monkeypatch.undo()
    assert ledger.statistics() == {"parts": 0, "blocks": 1, "leftovers": 6}
    pd.testing.assert_frame_equal(ledger.read(), before)
    fill(ledger, 5, start=10)  # new parts after the crash are merged by the next compaction
    expected = ledger.read()
    assert ledger.compact(min_parts=5) == 6 + 5
    pd.testing.assert_frame_equal(ledger.read(), expected)
    assert ledger.statistics() == {"parts": 0, "blocks": 2, "leftovers": 0}


def test_crash_while_writing_the_block(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 10)
    before = ledger.read()
    real = ledger.volume.write_with

    def die_halfway(path: str, writer: Any) -> None:
        def broken(out: Any) -> None:
            out.write(b"PAR1 half a file")
            raise Crash(path)

        real(path, broken)

    monkeypatch.setattr(ledger.volume, "write_with", die_halfway)
    with pytest.raises(Crash):
        ledger.compact(min_parts=5)
    monkeypatch.undo()
    assert sorted(p.name for p in (tmp_path / "_ledger").iterdir()) == ledger.files()  # no temporary left
    assert ledger.statistics() == {"parts": 10, "blocks": 0, "leftovers": 0}
    pd.testing.assert_frame_equal(ledger.read(), before)


def _new_block(ledger: Ledger, parts: list[str], name: str) -> None:
    """Write a block holding ``parts`` and give it ``name`` (which sets the readers' order)."""
    old = set(ledger.files())
    ledger._write_block(parts, [])
    (made,) = set(ledger.files()) - old
    folder = Path(ledger.folder)
    (folder / made).rename(folder / name)


@pytest.mark.parametrize("larger_first", [True, False])
def test_two_compactors_at_once_do_not_double_count(tmp_path: Path, larger_first: bool) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 8)
    before = ledger.read()
    # Both listed the same parts and each wrote a block before either deleted anything;
    # the second also holds a part that was written after the first one's listing. Readers
    # take the block whose name sorts first whole: try it both ways round.
    listing = ledger._listing()
    _new_block(ledger, listing.parts, "block-b.parquet" if larger_first else "block-a.parquet")
    fill(ledger, 1, start=8)
    _new_block(ledger, ledger._listing().parts + listing.parts, "block-a.parquet" if larger_first else "block-b.parquet")
    expected = pd.concat([before, ledger.read(since=1_008.0)]).sort_values(["ended"], kind="stable")
    assert len(ledger.read()) == len(before) + 3
    pd.testing.assert_frame_equal(ledger.read(), expected.reset_index(drop=True))
    # A compaction merges the overlapping blocks into one, still without double counting.
    fill(ledger, 2, start=9)
    expected = ledger.read()
    ledger.compact(min_parts=1)
    assert ledger.statistics() == {"parts": 0, "blocks": 1, "leftovers": 0}
    pd.testing.assert_frame_equal(ledger.read(), expected)


def test_blocks_are_merged_so_files_stay_few(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    for p in range(BLOCK_FAN_IN + 3):
        fill(ledger, 1, start=p)
        ledger.compact(min_parts=1)
        assert len(ledger.files()) <= BLOCK_FAN_IN
    stats = ledger.statistics()
    assert stats["blocks"] == 3 and stats["parts"] == 0
    assert len(ledger.read()) == (BLOCK_FAN_IN + 3) * 3
    assert ledger.read()["trial"].tolist() == sorted(ledger.read()["trial"].tolist())


# -- other readers ------------------------------------------------------------------------


def test_duckdb_and_pyarrow_read_the_folder(tmp_path: Path) -> None:
    ledger = Ledger(str(tmp_path))
    fill(ledger, 6)
    ledger.compact(min_parts=4)
    fill(ledger, 2, start=6)
    expected = ledger.usage(since=1_003.0)[0]
    # The query in docs/storage.md, as written there, with its date moved to our rows' times.
    section = DOC.read_text().split("## The CPU ledger", 1)[1]
    query = re.search(r"```\n(-- duckdb:.*?)```", section, re.S).group(1)  # type: ignore[union-attr]
    assert "epoch(TIMESTAMP '2026-05-01 00:00:00')" in query
    query = query.replace("/shared/rungway", str(tmp_path)).replace(
        "epoch(TIMESTAMP '2026-05-01 00:00:00')", "epoch(TIMESTAMP '1970-01-01 00:16:43')")  # 1003 s
    got = duckdb.connect().execute(query).fetchall()
    assert {team: pytest.approx(hours) for team, hours in got} == {
        team: usage["cpu_hours"] for team, usage in expected.items()}
    dataset = ds.dataset(str(tmp_path / "_ledger"), format="parquet", schema=LEDGER_SCHEMA)
    table = dataset.to_table()
    assert table.num_rows == len(ledger.read()) == 24
    assert table.schema.equals(LEDGER_SCHEMA)
    charged = pa.compute.coalesce(table["cpu_seconds"], table["reserved_cpu_seconds"])
    assert pa.compute.sum(charged).as_py() == pytest.approx(sum(totals(ledger).values()))
    assert table["cpu_seconds"].null_count == 8  # fill() leaves every third row's CPU time unknown


def test_files_of_the_first_format_read_as_reservations(tmp_path: Path) -> None:
    """A ledger file written before rows carried both figures (its cpu_seconds was cpus x
    (ended - started), and it has no reserved_cpu_seconds) reads as a reservation whose CPU
    time is unknown, and sums count it as it was charged when written."""
    ledger = Ledger(str(tmp_path))
    ledger.append([row(trial=1, seconds=10.0, cpus=2.0, cpu_seconds=4.0)])
    new = ledger.read()
    old = pq.read_table(tmp_path / "_ledger" / ledger.files()[0])
    old = old.drop_columns(["cpu_seconds", "reserved_cpu_seconds"]).append_column(
        pa.field("cpu_seconds", pa.float64(), nullable=False), pa.array([30.0]))
    from rungway.scheduler.store.checksums import parquet_bytes, sha256_hex

    data = parquet_bytes(old)
    (tmp_path / "_ledger" / f"part-{sha256_hex(data)[:32]}.parquet").write_bytes(data)
    frame = ledger.read()
    assert len(frame) == 2 and list(frame.columns) == LEDGER_SCHEMA.names
    first_format = frame[frame["cpu_seconds"].isna()]
    assert first_format["reserved_cpu_seconds"].tolist() == [30.0]
    assert ledger.cpu_seconds_by_team() == {"acoustics": 4.0 + 30.0}
    assert new["reserved_cpu_seconds"].tolist() == [20.0]
    # Compaction writes them in the current format, with the same figures.
    ledger.compact(min_parts=1)
    assert ledger.statistics() == {"parts": 0, "blocks": 1, "leftovers": 0}
    pd.testing.assert_frame_equal(ledger.read(), frame)
