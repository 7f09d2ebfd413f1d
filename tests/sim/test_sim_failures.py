"""Node failures in the simulator: lost segments are requeued and the search still drains.

What is checked is bookkeeping the core must keep whatever happens (no outside figures): a
lost segment is handed out again with a new attempt number, so the attempts of all trials are
the segments that ended plus the segments lost; a trial has a result at rung k+1 only after
one at rung k, so the trials whose last rung is >= k are exactly the results at rung k; in
the promotion form every promotion out of rung k became a result at rung k+1.
"""

from __future__ import annotations

import pytest

from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.states import ACTIVE, CULLED, DONE, PARKED, QUEUED
from rungway.scheduler.sim import HeavyTailCost, LinearCost, simulate
from rungway.scheduler.sim.cluster import SimResult
from rungway.scheduler.testing import CountingSampler


def _run(plan, failures, workers=16, seed=3, per_worker=1, cost=None):
    return simulate(plan, CountingSampler(), workers, cost or LinearCost(60.0), failure_rate_per_hour=failures,
                    requeue_delay=30.0, repair_seconds=600.0, seed=seed, cpus_per_worker=per_worker)


def _check_consistent(result: SimResult, plan: SearchPlan) -> None:
    stats = result.statistics
    assert result.drained
    assert stats["states"][ACTIVE] == 0 and stats["states"][QUEUED] == 0 and stats["queued"] == 0
    rungs = stats["brackets"][0]["rungs"]
    trials = result.core.trials()
    for k, rung in enumerate(rungs):
        assert rung["results"] == sum(1 for t in trials if t.loss is not None and t.rung >= k)
        if k + 1 < len(rungs):
            assert rungs[k + 1]["results"] <= rung["results"]
            if not plan.stopping:
                assert rungs[k + 1]["results"] == rung["promoted"]
    assert stats["states"][DONE] == rungs[-1]["results"]
    assert sum(r["results"] for r in rungs) == result.results
    assert sum(t.attempt for t in trials) == result.segments + result.lost
    assert {t.state for t in trials} <= {DONE, CULLED if plan.stopping else PARKED}


@pytest.mark.parametrize("mode", ["asha", "asha-stopping"])
def test_failures_requeue_and_the_search_drains(mode):
    # Losses uncapped (max_losses): what is checked is the bookkeeping of requeues.
    plan = SearchPlan(mode=mode, min_budget=1, max_budget=81, eta=3, max_trials=400, max_losses=10**6)
    calm = _run(plan, 0.0)
    stormy = _run(plan, 0.5)
    for r in (calm, stormy):
        _check_consistent(r, plan)
        assert r.trials == 400 and r.trials_per_rung[0][0] == 400
    assert calm.lost == 0 and calm.failures == 0
    assert stormy.failures > 0 and stormy.lost > 0
    assert stormy.lost <= stormy.failures  # one slot per worker: at most one segment per failure
    # lost work is paid for: the same search costs more CPU time with failures
    assert stormy.cpu_hours > calm.cpu_hours


def test_workers_with_several_slots_lose_all_their_segments():
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=27, eta=3, max_trials=300, max_losses=10**6)
    result = _run(plan, 1.0, workers=8, per_worker=4, cost=HeavyTailCost(60.0, sigma=0.5))
    assert result.slots == 32
    assert result.lost > result.failures  # a failure takes down up to 4 segments at once
    _check_consistent(result, plan)


def test_failures_slow_the_search_down():
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=27, eta=3, max_trials=300, max_losses=10**6)
    calm = _run(plan, 0.0, workers=8)
    stormy = _run(plan, 2.0, workers=8)
    assert stormy.wall_seconds > calm.wall_seconds
    assert stormy.lost > 0
    _check_consistent(stormy, plan)
