"""Damaged checkpoints: a truncated or bit-flipped checkpoint is skipped for the trial's
previous one (or the trial restarts), the head says so, and every result is still exactly
the objective's value (tests/run/objectives_run.value_at). Runs without Ray (InlineExecutor)."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from objectives_run import value_at  # noqa: E402
from runhelpers import spec_text  # noqa: E402

from rungway.scheduler.head.driver import SearchDriver  # noqa: E402
from rungway.scheduler.head.executor import InlineExecutor  # noqa: E402
from rungway.scheduler.spec import parse_spec  # noqa: E402


def stop_after(driver: SearchDriver, segments: int):
    return lambda: driver.segments >= segments


def test_damaged_checkpoints_fall_back_and_results_stay_exact(tmp_path: Path, caplog) -> None:
    text = spec_text("damage", trials=12, max_budget=9)
    spec = parse_spec(text)
    first = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2))
    first.run(stop_after(first, 16))  # rung 0 for all, some promoted to rung 1 (budget 3)
    folders = sorted((tmp_path / "searches" / "damage" / "checkpoints").iterdir())
    with_two = [f for f in folders if len(list(f.glob("*.ckpt"))) >= 2]
    assert with_two and len(with_two) < len(folders)
    damaged = 0
    for index, folder in enumerate(folders):
        newest = max(folder.glob("*.ckpt"), key=lambda p: float(p.name.split("-")[0]))
        data = bytearray(newest.read_bytes())
        if index % 2 == 0:
            newest.write_bytes(bytes(data[: len(data) // 2]))  # truncated
        else:
            data[len(data) // 2] ^= 0xFF  # one bit-flipped byte
            newest.write_bytes(bytes(data))
        damaged += 1
    caplog.set_level(logging.WARNING)
    second = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2))
    report = second.run()
    assert report.finished
    said = caplog.text
    assert "checksum mismatch" in said  # a resumed trial fell back to its previous checkpoint, and said so
    frame = second.files.read_measurements()
    finals = frame[frame["final"]]
    trials = second.files.read_trials().set_index("trial")
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(trials.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    assert not finals.duplicated(["trial", "rung", "metric"]).any()
    assert damaged >= 2


def test_a_trial_whose_only_checkpoint_is_damaged_restarts_and_says_so(tmp_path: Path) -> None:
    from rungway.scheduler.store import Store
    from rungway.workers.runner import SegmentOrder, run_segment

    files = Store(str(tmp_path)).search("restart")
    order = SegmentOrder(str(tmp_path), "restart", "objectives_run:resumable", "loss", trial=0, attempt=1,
                         rung=0, start_budget=0, target_budget=3, milestones=(3,), config={"x": 0.7})
    first = run_segment(order)
    assert first.outcome == "result" and first.checkpoint_budget == 3
    for path in (tmp_path / "searches" / "restart" / "checkpoints" / "0").glob("*.ckpt"):
        path.write_bytes(b"garbage")
    resumed = SegmentOrder(str(tmp_path), "restart", "objectives_run:resumable", "loss", trial=0, attempt=2,
                           rung=1, start_budget=3, target_budget=9, milestones=(9,), config={"x": 0.7})
    summary = run_segment(resumed)
    assert summary.outcome == "result", summary.reason
    assert any("restarted from budget 0" in note for note in summary.skipped_checkpoints)
    assert summary.value == pytest.approx(value_at(0.7, 9), abs=1e-12)
    assert files.load_checkpoint(0).info.budget == 9


def test_running_a_finished_search_again_is_a_no_op(tmp_path: Path) -> None:
    """A unit that restarts after its search finished must find nothing to do, not crash."""
    text = spec_text("twice", trials=6, max_budget=3)
    spec = parse_spec(text)
    first = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2)).run()
    assert first.finished
    before = SearchDriver(spec, text, str(tmp_path), InlineExecutor(cpus=2))
    again = before.run()
    assert again.finished and again.segments == first.segments
    assert len(before.files.read_trials()) == 6


def test_cpu_seconds_are_charged_from_the_workers_own_start_and_end(tmp_path: Path) -> None:
    """A segment's reservation is cpus x (ended - started) as the worker timed it, not the time
    it spent queued after submission; its CPU time is what the worker measured."""
    from rungway.workers.runner import run_segment

    def run(order):  # the real runner, with its clock stretched: each segment "ran" 10 s
        ticks = iter([1000.0, 1010.0, 1010.0, 1010.0, 1010.0, 1010.0])
        return run_segment(order, clock=lambda: next(ticks, 1010.0))

    text = spec_text("cpu", objective="objectives_run:plain", trials=3, max_budget=3)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor(cpus=1, run=run))
    report = driver.run()
    assert report.finished
    assert driver.reserved_seconds == pytest.approx(10.0 * report.segments)
    assert 0 < driver.cpu_seconds < driver.reserved_seconds  # a few ms of real CPU per "10 s" segment
