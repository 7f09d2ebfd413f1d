"""The simulator applies the spec's limits as the head does (scheduler/head/limits.py): no
segment starts whose expected cost would cross ``limits.cpu_hours`` (CPU time) or end after
``limits.deadline``; what runs finishes; the run says which limit ended it. What is checked
is our own promise (issue #11): at most 2% of the limit or one segment's cost over it. All
times are simulated.
"""

from __future__ import annotations

import pytest

from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.sim import HeavyTailCost, LinearCost, simulate
from rungway.scheduler.testing import CountingSampler

OPEN = SearchPlan(mode="asha", min_budget=1, max_budget=27, eta=3)  # no trial limit


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("resumable", [True, False])
def test_a_cpu_hour_limit_ends_the_run_within_one_segment(seed: int, resumable: bool) -> None:
    limit_hours = 2.0
    cost = HeavyTailCost(10.0, sigma=0.5, overhead=5.0)
    r = simulate(OPEN, CountingSampler(), 8, cost, max_cpu_hours=limit_hours, resumable=resumable, seed=seed)
    assert r.limit is not None and r.limit.startswith("limits.cpu_hours = 2")
    # One segment's cost, generously: the top rung from scratch with a heavy-tailed multiplier.
    one_segment = 5.0 * (5.0 + 27 * 10.0) / 3600
    assert r.cpu_hours <= limit_hours + max(0.02 * limit_hours, one_segment)
    assert r.cpu_hours >= limit_hours - 2 * one_segment  # it ran up to the limit, not short of it
    assert not r.drained


def test_cpu_time_is_the_reservation_times_what_the_objective_uses_of_it() -> None:
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=9, eta=3, max_trials=30)
    full = simulate(plan, CountingSampler(), 4, LinearCost(10.0), cpus_per_trial=2, cpus_per_worker=2)
    half = simulate(plan, CountingSampler(), 4, LinearCost(10.0), cpus_per_trial=2, cpus_per_worker=2,
                    cpu_per_reserved=0.5)
    assert full.reserved_cpu_hours == pytest.approx(half.reserved_cpu_hours)
    assert full.cpu_hours == pytest.approx(full.reserved_cpu_hours)
    assert half.cpu_hours == pytest.approx(0.5 * half.reserved_cpu_hours)
    # The same CPU-hour limit buys twice the wall time of an objective that uses half its CPUs.
    a = simulate(OPEN, CountingSampler(), 4, LinearCost(10.0), max_cpu_hours=1.0)
    b = simulate(OPEN, CountingSampler(), 4, LinearCost(10.0), max_cpu_hours=1.0, cpu_per_reserved=0.5)
    assert b.reserved_cpu_hours == pytest.approx(2 * a.reserved_cpu_hours, rel=0.05)


def test_a_deadline_starts_no_segment_expected_to_end_after_it() -> None:
    r = simulate(OPEN, CountingSampler(), 4, LinearCost(10.0, overhead=1.0), deadline=3600.0)
    assert r.limit is not None and r.limit.startswith("limits.deadline = 1h00m00s")
    assert 3600.0 - 271.0 <= r.wall_seconds <= 3600.0  # costs are exact: nothing ends after it
