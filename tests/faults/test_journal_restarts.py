"""The journal across restarts in a row: a clean stop (its snapshot covers the whole journal,
which is then deleted), a restart, then a kill before the restarted head's first snapshot,
then another restart. The second restart must replay exactly what the first restarted head
did (its entries are numbered after the snapshot's, not from 1 again) and finish with every
result equal to the objective's (tests/run/objectives_run.value_at). Runs without Ray."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from objectives_run import value_at  # noqa: E402
from runhelpers import spec_text  # noqa: E402

from rungway.scheduler.head.driver import SearchDriver  # noqa: E402
from rungway.scheduler.head.executor import InlineExecutor  # noqa: E402
from rungway.scheduler.head.journal import Journal  # noqa: E402
from rungway.scheduler.spec import parse_spec  # noqa: E402


def test_a_kill_after_a_clean_stop_and_restart_replays_exactly(tmp_path: Path) -> None:
    text = spec_text("again", trials=30, max_budget=9)
    spec = parse_spec(text)
    first = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2))
    first.run(lambda: first.segments >= 8)  # a clean stop: snapshot, then the journal is rotated away
    covered = first.journal.seq
    journal_dir = tmp_path / "searches" / "again" / "journal"
    assert Journal(journal_dir).files() == []

    second = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2), persist_seconds=3600)
    second.begin()
    target = second.segments + 3
    for _ in range(10_000):  # bounded: a drained search stops counting
        if second.segments >= target or second.over:
            break
        second.step()
    assert second.segments >= target, "the restarted search ended before it could be killed"
    # Killed here: no end(), no snapshot since the restart; only its journal entries remain.
    numbers = [entry["n"] for entry in Journal(journal_dir).entries_after(0)]
    assert numbers and min(numbers) == covered + 1, "the restarted head numbered its entries from 1 again"
    second.journal.close()

    third = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2))
    assert third.replayed == len(numbers)
    report = third.run()
    assert report.finished
    frame = third.files.read_measurements()
    finals = frame[frame["final"]]
    assert not finals.duplicated(["trial", "rung", "metric"]).any()
    table = third.files.read_trials().set_index("trial")
    assert len(table) == 30
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)


def test_a_file_left_with_only_a_torn_first_entry_is_started_over(tmp_path: Path) -> None:
    journal = Journal(tmp_path)
    journal.resume_after(41)
    (tmp_path / "events-000000000042.jsonl").write_bytes(b'{"e":"seg","t":3,')  # a head died mid-write
    journal.append([{"e": "stop"}])
    again = Journal(tmp_path)
    assert [(e["n"], e["e"]) for e in again.entries_after(0)] == [(42, "stop")]
    assert again.seq == 42
