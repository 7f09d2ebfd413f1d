"""ASHA keeps every worker busy, so its throughput grows linearly with workers.

Source: Li, Jamieson, Rostamizadeh, Gonina, Ben-tzur, Hardt, Recht, Talwalkar, "A System for
Massively Parallel Hyperparameter Tuning" (MLSys 2020): ASHA never waits -- when nothing can be
promoted it starts a new trial -- and its throughput scales linearly with workers, while
synchronous successive halving idles workers at its barriers and behind stragglers (recalled
from memory; the qualitative result, not the paper's numbers). All times here are simulated.
"""

from __future__ import annotations

import pytest

from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.sim import FixedCost, HeavyTailCost, LinearCost, simulate
from rungway.scheduler.testing import CountingSampler

UNLIMITED = SearchPlan(mode="asha", min_budget=1, max_budget=81, eta=3, max_trials=10**7)


def _throughput(plan, workers, cost, horizon, seed=0):
    r = simulate(plan, CountingSampler(), workers, cost, seed=seed, until=horizon)
    assert not r.drained
    return r


@pytest.mark.parametrize(
    ("cost", "horizon"),
    [
        (FixedCost(60.0), 60.0 * 50),
        # i.i.d. lognormal segment times with mean 60 s whatever the budget (a negligible
        # per-unit rate): random finish order, same expected length at every rung
        (HeavyTailCost(1e-9, sigma=1.0, overhead=60.0), 60.0 * 400),
    ],
    ids=["fixed", "heavy-tail"],
)
def test_asha_throughput_grows_linearly_with_workers(cost, horizon):
    base = _throughput(UNLIMITED, 1, cost, horizon)
    for workers in (4, 16, 64):
        r = _throughput(UNLIMITED, workers, cost, horizon)
        ratio = r.segments_per_hour / base.segments_per_hour
        assert ratio == pytest.approx(workers, rel=0.2), (workers, ratio)


def test_synchronous_hyperband_does_not_scale_like_asha():
    # the control that shows the measure can fail: barriers cap the useful width of a bracket
    plan = SearchPlan(mode="sync-hyperband", min_budget=1, max_budget=81, eta=3, iterations=50)
    cost = FixedCost(60.0)
    narrow = _throughput(plan, 16, cost, 3600.0 * 5)
    wide = _throughput(plan, 64, cost, 3600.0 * 5)
    assert wide.segments_per_hour / narrow.segments_per_hour < 0.8 * 4
    assert wide.utilization < 0.8


@pytest.mark.parametrize("cost", [FixedCost(60.0), HeavyTailCost(60.0, sigma=1.0), LinearCost(30.0, 5.0)],
                         ids=["fixed", "heavy-tail", "linear"])
def test_asha_utilization_with_plenty_of_trials(cost):
    r = _throughput(UNLIMITED, 32, cost, 3600.0 * 10)
    assert r.utilization > 0.95
    # every ask handed out a segment: those that ended, plus at most one running per slot
    assert r.segments <= r.decisions <= r.segments + r.slots


def test_synchronous_halving_idles_behind_stragglers():
    plan = SearchPlan(mode="sync-halving", min_budget=1, max_budget=81, eta=3)
    r = simulate(plan, CountingSampler(), 27, HeavyTailCost(60.0, sigma=1.0), seed=1)
    assert r.drained
    assert r.utilization < 0.5


def test_quota_caps_concurrent_slots():
    cost = FixedCost(60.0)
    capped = simulate(UNLIMITED, CountingSampler(), 100, cost, quota_cpus=20, cpus_per_trial=2, cpus_per_worker=4,
                      until=3600.0)
    small = simulate(UNLIMITED, CountingSampler(), 5, cost, cpus_per_trial=2, cpus_per_worker=4, until=3600.0)
    assert capped.slots == small.slots == 10
    assert capped.segments == small.segments == 10 * 60
    # CPU-hours count the CPUs of each trial: 10 slots x 1 h x 2 CPUs
    assert capped.cpu_hours == pytest.approx(20.0)


def test_time_scale_invariance():
    # doubling every cost doubles the wall time and changes no decision
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=27, eta=3, max_trials=300)
    a = simulate(plan, CountingSampler(), 8, HeavyTailCost(10.0, sigma=0.7, overhead=2.0), seed=4)
    b = simulate(plan, CountingSampler(), 8, HeavyTailCost(20.0, sigma=0.7, overhead=4.0), seed=4)
    assert b.wall_seconds == pytest.approx(2 * a.wall_seconds, rel=1e-9)
    assert a.trials_per_rung == b.trials_per_rung
    assert a.leader_value == b.leader_value


def test_runs_are_deterministic_given_the_seed():
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=27, eta=3, max_trials=200)
    runs = [simulate(plan, CountingSampler(), 6, HeavyTailCost(5.0, sigma=1.0), seed=s,
                     failure_rate_per_hour=2.0) for s in (7, 7, 8)]
    assert runs[0].to_dict() == runs[1].to_dict()
    assert runs[0].to_dict() != runs[2].to_dict()


def test_time_to_target():
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=27, eta=3, max_trials=400)
    easy = simulate(plan, CountingSampler(), 8, LinearCost(1.0), seed=2, target=10.0)
    none = simulate(plan, CountingSampler(), 8, LinearCost(1.0), seed=2, target=-1.0)
    assert easy.time_to_target is not None and 0 < easy.time_to_target <= easy.wall_seconds
    # the first top-rung result: no earlier than one trial's full ladder, 27 units
    assert easy.time_to_target >= 27.0
    assert none.time_to_target is None
    assert easy.leader_value is not None and easy.leader_value > 0
