"""ASHA in its promotion and stopping forms, worked by hand from Li et al., MLSys 2020."""

from __future__ import annotations

import math

import pytest

from rungway.scheduler.core.errors import RejectedEvent, UnknownTrial
from rungway.scheduler.core.events import (
    Ask,
    Cancel,
    Cancelled,
    Continue,
    Crashed,
    Culled,
    Drained,
    Failed,
    Finished,
    Idle,
    Lost,
    Parked,
    Report,
    Requeued,
    Segment,
    StopAdmitting,
)
from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.testing import CountingSampler


def asha(**kwargs) -> SearchCore:
    plan = SearchPlan(**{"mode": "asha", "min_budget": 1, "max_budget": 9, "eta": 3, **kwargs})
    return SearchCore(plan, CountingSampler())


def run_one(core: SearchCore, value: float) -> Segment:
    """Ask for work and report ``value`` for it at once (one worker, in order)."""
    segment = core.ask()
    assert isinstance(segment, Segment)
    core.report(segment.trial, segment.attempt, segment.rung, value)
    return segment


def test_hand_worked_promotion_sequence() -> None:
    """Algorithm 2 of Li et al., "A System for Massively Parallel Hyperparameter Tuning"
    (MLSys 2020), followed by hand with r = 1, R = 9, eta = 3 (rungs 1, 3, 9), minimising,
    one worker that reports each result before asking again. get_job scans rungs top-down and
    promotes the best trial of rung k that is in top_k(rung k, floor(|rung k| / eta)) and not
    yet promoted; otherwise it grows the bottom rung.

    1. rung0 empty                      -> new T0 @1,  reports 5
    2. rung0 n=1, floor(1/3)=0          -> new T1 @1,  reports 3
    3. rung0 n=2, floor(2/3)=0          -> new T2 @1,  reports 4
    4. rung0 n=3, top1 = {T1}           -> promote T1 to 3, reports 2.5
    5. rung1 n=1 -> 0; rung0 top1 = {T1} promoted already -> new T3 @1, reports 1
    6. rung1 n=1 -> 0; rung0 n=4, top1 = {T3}   -> promote T3 to 3, reports 2
    7. rung1 n=2 -> 0; rung0 top1 = {T3} done   -> new T4 @1, reports 6
    8. rung0 n=5, floor = 1, top1 = {T3} done   -> new T5 @1, reports 0.5
    9. rung0 n=6, top2 = {T5, T3}: T5 unpromoted -> promote T5 to 3, reports 3
    10. rung1 n=3, top1 = {T3}          -> promote T3 to 9 (top rung), reports 1.5: finished
    11. rung1 n=3 top1 done; rung0 n=6 top2 done -> new T6 @1
    """
    core = asha()
    steps = [5, 3, 4, 2.5, 1, 2, 6, 0.5, 3, 1.5]
    expected = [(0, 1), (1, 1), (2, 1), (1, 3), (3, 1), (3, 3), (4, 1), (5, 1), (5, 3), (3, 9)]
    got = []
    for value in steps:
        segment = run_one(core, value)
        got.append((segment.trial, segment.target_budget))
    assert got == expected
    assert core.trial(3).state == "done"
    nxt = core.ask()
    assert isinstance(nxt, Segment) and (nxt.trial, nxt.rung, nxt.start_budget) == (6, 0, 0)


def test_promoted_segment_resumes_from_the_budget_reached() -> None:
    core = asha()
    for value in (3, 2, 1):
        run_one(core, value)
    promoted = core.ask()
    assert isinstance(promoted, Segment)
    assert (promoted.trial, promoted.start_budget, promoted.target_budget, promoted.attempt) == (2, 1, 3, 2)


def test_non_finite_results_rank_worst_and_ties_go_to_the_older_trial() -> None:
    core = asha()
    for value in (math.nan, math.inf, -math.inf):
        run_one(core, value)
    # All three are "worst": the tie goes to creation order, so T0 is the one promoted.
    promoted = core.ask()
    assert isinstance(promoted, Segment) and promoted.trial == 0
    core2 = asha()
    for value in (math.nan, 7.0, 7.0):
        run_one(core2, value)
    promoted2 = core2.ask()
    assert isinstance(promoted2, Segment) and promoted2.trial == 1  # 7.0 beats NaN; T1 older than T2


def test_maximise_promotes_the_largest_value() -> None:
    core = asha(maximize=True)
    for value in (0.1, 0.9, 0.5):
        run_one(core, value)
    promoted = core.ask()
    assert isinstance(promoted, Segment) and promoted.trial == 1


def test_results_the_core_did_not_hand_out_are_refused() -> None:
    core = asha()
    seg = core.ask()
    assert isinstance(seg, Segment)
    with pytest.raises(UnknownTrial):
        core.report(99, 1, 0, 1.0)
    with pytest.raises(RejectedEvent, match="attempt"):
        core.report(seg.trial, seg.attempt + 1, 0, 1.0)
    with pytest.raises(RejectedEvent, match="rung"):
        core.report(seg.trial, seg.attempt, 1, 1.0)
    assert isinstance(core.report(seg.trial, seg.attempt, 0, 1.0), Parked)
    with pytest.raises(RejectedEvent, match="parked"):  # a second result for the same attempt
        core.report(seg.trial, seg.attempt, 0, 1.0)
    assert core.trial(seg.trial).loss == 1.0


def test_lost_segment_is_requeued_first_and_not_counted_against_the_trial() -> None:
    core = asha(max_crashes=0)
    seg = core.ask()
    assert isinstance(seg, Segment)
    assert core.apply(Lost(seg.trial, seg.attempt)) == Requeued(seg.trial, 0)
    again = core.ask()
    assert isinstance(again, Segment)
    assert (again.trial, again.attempt, again.rung) == (seg.trial, seg.attempt + 1, 0)
    with pytest.raises(RejectedEvent):  # the old attempt is stale now
        core.report(seg.trial, seg.attempt, 0, 1.0)
    assert core.trial(seg.trial).crashes == 0


def test_crashes_are_retried_then_the_trial_fails() -> None:
    core = asha(max_crashes=1)
    seg = core.ask()
    assert isinstance(seg, Segment)
    assert isinstance(core.apply(Crashed(seg.trial, seg.attempt, "boom")), Requeued)
    seg2 = core.ask()
    assert isinstance(seg2, Segment) and seg2.trial == seg.trial
    assert core.apply(Crashed(seg2.trial, seg2.attempt, "boom")) == Failed(seg.trial, "boom")
    assert core.trial(seg.trial).state == "failed"
    assert core.active == 0


def test_cancel_withdraws_a_parked_trial_from_promotion() -> None:
    core = asha()
    for value in (3, 1, 2):
        run_one(core, value)
    assert core.apply(Cancel(1)) == Cancelled(1)
    nxt = core.ask()
    # T1 was the only one in the top floor(3/3) = 1; cancelled, nobody is promotable.
    assert isinstance(nxt, Segment) and nxt.rung == 0 and nxt.trial == 3
    with pytest.raises(RejectedEvent, match="already cancelled"):
        core.apply(Cancel(1))


def test_drains_when_admissions_stop_and_nothing_is_promotable() -> None:
    core = asha(max_trials=2)
    a, b = core.ask(), core.ask()
    assert isinstance(a, Segment) and isinstance(b, Segment)
    assert core.ask() == Idle()  # limit reached, two still running
    core.report(a.trial, a.attempt, 0, 1.0)
    assert core.ask() == Idle()
    core.report(b.trial, b.attempt, 0, 2.0)
    assert core.ask() == Drained()  # floor(2/3) = 0: nothing promotable, nothing running
    assert core.ask() == Drained()


def test_stop_admitting_event() -> None:
    core = asha()
    run_one(core, 1.0)
    core.apply(StopAdmitting())
    assert core.apply(Ask()) == Drained()


def test_stopping_form_runs_on_while_in_the_top_third() -> None:
    """ASHA's stopping form: a trial reaching rung k continues if it is in the top 1/eta of the
    results recorded at rung k so far (0-based rank < n / eta), else it is stopped. Worked by
    hand with eta = 3, rungs 1, 3, 9, minimising:
    T0 @1 = 5: n=1, rank 0 < 1/3 -> continue; @3 = 4: continue; @9 = 3: finished.
    T1 @1 = 6: n=2, rank 1 >= 2/3 -> culled.
    T2 @1 = 1: n=3, rank 0 < 1 -> continue; @3 = 9: n=2, rank 1 >= 2/3 -> culled.
    """
    core = SearchCore(SearchPlan(mode="asha-stopping", min_budget=1, max_budget=9, eta=3), CountingSampler())
    t0 = core.ask()
    assert isinstance(t0, Segment) and t0.milestones == (1, 3, 9) and t0.target_budget == 9
    assert core.report(0, t0.attempt, 0, 5) == Continue(0, 1)
    assert core.report(0, t0.attempt, 1, 4) == Continue(0, 2)
    assert core.report(0, t0.attempt, 2, 3) == Finished(0)
    t1 = core.ask()
    assert isinstance(t1, Segment)
    assert core.report(1, t1.attempt, 0, 6) == Culled(1, 0)
    t2 = core.ask()
    assert isinstance(t2, Segment)
    assert core.report(2, t2.attempt, 0, 1) == Continue(2, 1)
    assert core.report(2, t2.attempt, 1, 9) == Culled(2, 1)


def test_stopping_form_requeue_resumes_at_the_current_rung() -> None:
    core = SearchCore(SearchPlan(mode="asha-stopping", min_budget=1, max_budget=9, eta=3), CountingSampler())
    seg = core.ask()
    assert isinstance(seg, Segment)
    core.report(0, seg.attempt, 0, 1.0)
    core.lost(0, seg.attempt)
    again = core.ask()
    assert isinstance(again, Segment)
    assert (again.trial, again.rung, again.start_budget, again.milestones) == (0, 1, 1, (3, 9))


def test_hyperband_deals_new_trials_in_proportion_to_the_bracket_counts() -> None:
    core = SearchCore(SearchPlan(mode="hyperband", min_budget=1, max_budget=9, eta=3), CountingSampler())
    segments = [core.ask() for _ in range(6)]
    assert all(isinstance(s, Segment) for s in segments)
    # s_max = 2: brackets s = 2, 1, 0 with bottom budgets 1, 3, 9 and n_s = 9, 5, 3 (Li et al.,
    # JMLR 2018, Algorithm 1: ceil(3 / (s + 1) * 3**s)). The quota method's picks, worked by
    # hand: see tests/core/test_hyperband_dealing.py.
    assert [s.bracket for s in segments] == [0, 1, 0, 0, 2, 1]  # type: ignore[union-attr]
    assert [s.target_budget for s in segments] == [1, 3, 1, 1, 9, 3]  # type: ignore[union-attr]


def test_full_budget_runs_every_trial_to_max_budget() -> None:
    core = SearchCore(SearchPlan(mode="full-budget", min_budget=1, max_budget=9, eta=3, max_trials=3), CountingSampler())
    seen = []
    while isinstance(seg := core.ask(), Segment):
        seen.append(seg.target_budget)
        assert core.report(seg.trial, seg.attempt, 0, 1.0) == Finished(seg.trial)
    assert seen == [9, 9, 9]
