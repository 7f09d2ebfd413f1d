"""The core's failure limits: the cap on a trial's losses and the stop of a search that can
only fail.

The rules are our own (docs/spec-files.md, ``[limits]``; docs/scheduling.md, "Failures"), so
there is no outside figure: each property is checked against a few lines of plain Python that
restate the documented rule (the reference models below), over event sequences hypothesis
draws.
"""

from __future__ import annotations

import json

from hypothesis import given, settings
from hypothesis import strategies as st

from rungway.scheduler.core.events import Crashed, Drained, Failed, Idle, Lost, Requeued, Resume, Segment
from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.core.states import ACTIVE, FAILED
from rungway.scheduler.testing import CountingSampler


def core_of(**plan: object) -> SearchCore:
    defaults: dict[str, object] = {"mode": "asha", "min_budget": 1, "max_budget": 9, "eta": 3}
    defaults.update(plan)
    return SearchCore(SearchPlan(**defaults), CountingSampler())  # type: ignore[arg-type]


def segment(core: SearchCore) -> Segment:
    out = core.ask()
    assert isinstance(out, Segment), out
    return out


# ---- the loss cap ---------------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(max_losses=st.integers(0, 4), events=st.lists(st.sampled_from(["counted", "uncounted", "crash"]), max_size=14),
       max_crashes=st.integers(0, 3))
def test_a_trial_fails_on_its_first_counted_loss_beyond_max_losses(max_losses, events, max_crashes) -> None:
    """Reference model: counted losses and crashes are counted separately; the trial is
    requeued until one count exceeds its limit, and then fails, a loss saying "lost N times".
    Uncounted losses (the head's own stops) never count."""
    core = core_of(max_losses=max_losses, max_crashes=max_crashes, max_trials=1)
    losses = crashes = 0
    for kind in events:
        seg = segment(core)
        assert seg.trial == 0
        if kind == "crash":
            crashes += 1
            out = core.apply(Crashed(0, seg.attempt, "boom"))
            expected_fail = crashes > max_crashes
            reason = "boom"
        else:
            counted = kind == "counted"
            losses += counted
            out = core.apply(Lost(0, seg.attempt, counted=counted))
            expected_fail = counted and losses > max_losses
            reason = f"lost {losses} time" + ("s" if losses > 1 else "")
        view = core.trial(0)
        assert (view.losses, view.crashes) == (losses, crashes)
        if expected_fail:
            assert out == Failed(0, reason)
            assert view.state == FAILED and core.active == 0
            assert core.ask() == Drained()  # the only trial is over
            return
        assert out == Requeued(0, 0)
    assert len(core) == 0 or core.trial(0).state != FAILED


def test_losses_survive_a_snapshot_and_an_older_snapshot_counts_none() -> None:
    core = core_of(max_losses=2)
    for _ in range(2):
        seg = segment(core)
        core.lost(seg.trial, seg.attempt)
    snap = json.loads(json.dumps(core.snapshot()))
    again = SearchCore.restore(snap, CountingSampler())
    assert again.trial(0).losses == 2
    seg = segment(again)
    assert again.lost(seg.trial, seg.attempt) == Failed(0, "lost 3 times")
    # A snapshot written before losses were counted restores with none counted.
    del snap["trials"]["losses"], snap["streak"]
    older = SearchCore.restore(snap, CountingSampler())
    assert older.trial(0).losses == 0
    seg = segment(older)
    assert isinstance(older.lost(seg.trial, seg.attempt), Requeued)


def test_a_trial_failed_by_losses_leaves_a_synchronous_barrier() -> None:
    """Successive halving waits at a barrier for every trial of the rung; a trial failed by
    its losses has no result and must not hold the barrier (as a crashed one does not)."""
    core = core_of(mode="sync-halving", sync_trials=3, max_losses=0)
    segs = [segment(core) for _ in range(3)]
    assert core.ask() == Idle()  # the barrier: three running
    core.report(segs[0].trial, segs[0].attempt, 0, 1.0)
    core.report(segs[1].trial, segs[1].attempt, 0, 2.0)
    assert core.apply(Lost(segs[2].trial, segs[2].attempt)) == Failed(segs[2].trial, "lost 1 time")
    nxt = core.ask()  # floor(2 / 3) = 0 promoted: the bracket is over, nothing left
    assert nxt == Drained()


# ---- the search that can only fail ------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(limit=st.integers(0, 5), outcomes=st.lists(st.booleans(), max_size=30))
def test_the_search_stops_after_max_consecutive_failures_at_the_first_rung(limit, outcomes) -> None:
    """Reference model: walk the first-rung outcomes (True: a result, False: the trial
    failed); a result resets the run of failures; the search is failing as soon as the run
    reaches the limit (never for 0), and from then on no segment is handed out."""
    core = core_of(max_consecutive_failures=limit, max_crashes=0)
    run = 0
    for ok in outcomes:
        seg = segment(core)
        while seg.rung > 0:  # a promotion: its result is not at the first rung and counts for nothing
            core.report(seg.trial, seg.attempt, seg.rung, 0.5)
            seg = segment(core)
        if ok:
            core.report(seg.trial, seg.attempt, 0, float(seg.trial))
            run = 0
        else:
            assert isinstance(core.apply(Crashed(seg.trial, seg.attempt, "boom")), Failed)
            run += 1
        if limit and run >= limit:
            assert core.failing == f"{run} trials in a row failed at their first rung (limits.max_consecutive_failures = {limit})"
            assert core.ask() == Drained() and core.backlog(10) == 0
            # A new run of the search starts the count over.
            core.apply(Resume())
            assert core.failing is None and isinstance(core.ask(), Segment)
            return
        assert core.failing is None
    assert core.failing is None


def test_failures_above_the_first_rung_do_not_count_towards_the_stop() -> None:
    core = core_of(max_consecutive_failures=2, max_crashes=0)
    for value in (1.0, 2.0, 3.0):  # three results at rung 0: the best is promotable
        seg = segment(core)
        core.report(seg.trial, seg.attempt, 0, value)
    promoted = segment(core)
    assert promoted.rung == 1
    core.crashed(promoted.trial, promoted.attempt, "boom at rung 1")
    seg = segment(core)
    core.crashed(seg.trial, seg.attempt, "boom at rung 0")
    assert core.failing is None  # one failure at the first rung, one above it
    seg = segment(core)
    core.crashed(seg.trial, seg.attempt, "boom at rung 0")
    assert core.failing is not None and core.failing.startswith("2 trials in a row")


def test_a_running_trial_is_left_to_finish_when_the_search_turns_failing() -> None:
    core = core_of(max_consecutive_failures=1, max_crashes=0)
    a, b = segment(core), segment(core)
    core.crashed(a.trial, a.attempt)
    assert core.failing is not None
    assert core.ask() == Idle()  # b still runs: nothing new, but not drained either
    core.report(b.trial, b.attempt, 0, 1.0)  # its result is still taken...
    assert core.failing is None  # ...and a first-rung result ends the run of failures
    assert core.trial(b.trial).state != ACTIVE


def test_a_search_whose_every_trial_failed_is_failing_once_no_trial_can_start() -> None:
    core = core_of(max_trials=4, max_crashes=0, max_consecutive_failures=0)  # the run limit off
    segs = [segment(core) for _ in range(4)]
    for seg in segs[:-1]:
        core.crashed(seg.trial, seg.attempt)
    assert core.failing is None  # one still runs
    core.crashed(segs[-1].trial, segs[-1].attempt)
    assert core.ask() == Drained()
    assert core.failing == "every trial failed (4 of 4)"
    again = SearchCore.restore(json.loads(json.dumps(core.snapshot())), CountingSampler())
    assert again.failing == "every trial failed (4 of 4)"


def test_a_cancelled_trial_means_not_every_trial_failed() -> None:
    core = core_of(max_trials=2, max_crashes=0, max_consecutive_failures=0)
    a, b = segment(core), segment(core)
    core.crashed(a.trial, a.attempt)
    core.cancel(b.trial)
    assert core.ask() == Drained()
    assert core.failing is None
