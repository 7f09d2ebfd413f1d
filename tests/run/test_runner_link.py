"""What a segment asks the head over its link. Asking whether to yield is a local read (the
link's beat thread brings the head's answer, see workers/link.py), and the runner still asks
only where the answer changes the outcome: a resumable objective that returned short of its
target budget. Runs without Ray (a recording link, and the relay's class called directly)."""

from __future__ import annotations

from pathlib import Path

import pytest

from rungway.workers.runner import SegmentOrder, run_segment


class RecordingLink:
    """A ``HeadLink`` that counts ``asked_to_yield`` calls and answers ``yield_answer``."""

    def __init__(self, yield_answer: bool = False) -> None:
        self.yield_answer = yield_answer
        self.yield_asks = 0
        self.beats: list[tuple[int, int, float]] = []

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> bool:
        return True

    def asked_to_yield(self, trial: int, attempt: int) -> bool:
        self.yield_asks += 1
        return self.yield_answer

    def beat(self, trial: int, attempt: int, budget: float) -> None:
        self.beats.append((trial, attempt, budget))


def order(root: Path, objective: str, start: int = 0, target: int = 3) -> SegmentOrder:
    return SegmentOrder(
        store_root=str(root), search="links", objective=objective, metric="loss", trial=0, attempt=0,
        rung=0, start_budget=start, target_budget=target, milestones=(target,), config={"x": 0.4},
    )


@pytest.mark.parametrize("objective", ["objectives_run:plain", "objectives_run:noop", "objectives_run:resumable"])
def test_a_segment_that_reaches_its_target_never_asks_whether_to_yield(tmp_path: Path, objective: str) -> None:
    link = RecordingLink(yield_answer=True)  # even a pending request cannot change a finished segment
    summary = run_segment(order(tmp_path, objective), link)
    assert summary.outcome == "result", summary
    assert summary.budget == 3
    assert link.yield_asks == 0


def test_a_resumable_segment_that_returns_early_after_a_yield_request_yields(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("RUNGWAY_TEST_SLEEP", "0")
    link = RecordingLink(yield_answer=True)
    summary = run_segment(order(tmp_path, "objectives_run:yielding_slow", target=9), link, yield_poll_seconds=3600)
    assert summary.outcome == "yielded", summary
    assert summary.budget == 1  # saved after the first unit, then returned
    assert link.yield_asks == 1  # the objective's check; the runner reused its answer


def test_a_resumable_segment_that_runs_on_without_a_yield_request_reports(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("RUNGWAY_TEST_SLEEP", "0")
    link = RecordingLink(yield_answer=False)
    summary = run_segment(order(tmp_path, "objectives_run:yielding_slow", target=4), link, yield_poll_seconds=3600)
    assert summary.outcome == "result", summary
    assert summary.budget == 4
    assert link.yield_asks == 1  # the objective's first check; the runner itself did not need to


def test_the_relay_answers_a_beat_with_the_segments_yield_request_and_its_verdicts_once() -> None:
    """The relay's side of the mailbox, without Ray: a beat's answer is (asked to yield, the
    verdicts decided since the last beat); a verdict is handed over once, a request to yield
    on every beat; other segments' mail stays theirs."""
    from rungway.workers.link import Relay

    relay = Relay.__ray_actor_class__()
    assert relay.beat("s", 1, 0, 2) == (False, {})
    relay.milestone("s", 1, 0, 0, 0.5)
    relay.decide([("s", 1, 0, 0, True), ("s", 2, 0, 0, False), ("t", 1, 0, 0, False)])
    relay.ask_to_yield("s", 2, 0)
    assert relay.beat("s", 1, 0, -1) == (False, {0: True})
    assert relay.beat("s", 1, 0, -1) == (False, {})
    assert relay.beat("s", 2, 0, 1) == (True, {0: False})
    assert relay.beat("s", 2, 0, 1) == (True, {})
    posts = relay.drain()
    assert posts["milestones"] == [("s", 1, 0, 0, 0.5)]
    assert posts["beats"] == {("s", 1, 0): (2, ""), ("s", 2, 0): (1, "")}  # -1 keeps the last known budget
    relay.forget("t", 1, 0)
    assert relay.beat("t", 1, 0, 1) == (False, {})
