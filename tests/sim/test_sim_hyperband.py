"""The simulator, driving the real core, reproduces Hyperband's successive-halving counts.

Source: Li, Jamieson, DeSalvo, Rostamizadeh, Talwalkar, "Hyperband: A Novel Bandit-Based
Approach to Hyperparameter Optimization", JMLR 18 (2018). Table 1 (R = 81, eta = 3) lists, per
bracket s = 4..0, the pairs (n_i, r_i) below -- recalled from memory, checked against the
paper's own rules: r_i = R * eta**(i - s) and n_i = floor(n * eta**-i). Algorithm 1 starts
bracket s with n = ceil((s_max + 1) / (s + 1) * eta**s) trials (81, 34, 15, 8, 5 for R = 81);
Table 1 prints 27 / 9 / 6 starting trials for s = 3 / 2 / 1 instead (it floors B / R / (s + 1)
first), hence the two variants.
"""

from __future__ import annotations

import math

import pytest

from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.states import DONE
from rungway.scheduler.sim import HeavyTailCost, LinearCost, simulate
from rungway.scheduler.testing import CountingSampler

# Li et al. (JMLR 2018), Table 1: bracket s -> [(n_i, r_i), ...]
TABLE_1 = {
    4: [(81, 1), (27, 3), (9, 9), (3, 27), (1, 81)],
    3: [(27, 3), (9, 9), (3, 27), (1, 81)],
    2: [(9, 9), (3, 27), (1, 81)],
    1: [(6, 27), (2, 81)],
    0: [(5, 81)],
}


def _algorithm_1(big_r: int, eta: int) -> dict[int, list[tuple[int, int]]]:
    """Algorithm 1 of the same paper, written out here from its pseudo-code (floats, as printed)."""
    s_max = math.floor(math.log(big_r, eta) + 1e-12)
    budget = (s_max + 1) * big_r
    out = {}
    for s in range(s_max, -1, -1):
        n = math.ceil(budget / big_r / (s + 1) * eta**s - 1e-9)
        r = big_r * eta ** (-s)
        out[s] = [(math.floor(n * eta ** (-i) + 1e-9), round(r * eta**i)) for i in range(s + 1)]
    return out


def _as_pairs(result):
    return {4 - b: list(zip(counts, budgets, strict=True))
            for b, (counts, budgets) in enumerate(zip(result.trials_per_rung, result.budgets, strict=True))}


@pytest.mark.parametrize("workers", [1, 7, 100])
def test_table_variant_reproduces_table_1(workers):
    plan = SearchPlan(mode="sync-hyperband", min_budget=1, max_budget=81, eta=3, hyperband_counts="table")
    result = simulate(plan, CountingSampler(), workers, HeavyTailCost(10.0, sigma=1.0), seed=workers)
    assert result.drained
    assert _as_pairs(result) == TABLE_1
    assert result.trials == sum(pairs[0][0] for pairs in TABLE_1.values())  # 81 + 27 + 9 + 6 + 5 = 128


def test_formula_variant_gives_algorithm_1_starting_counts():
    plan = SearchPlan(mode="sync-hyperband", min_budget=1, max_budget=81, eta=3, hyperband_counts="formula")
    result = simulate(plan, CountingSampler(), 9, LinearCost(5.0, overhead=1.0), seed=3)
    pairs = _as_pairs(result)
    assert [pairs[s][0][0] for s in (4, 3, 2, 1, 0)] == [81, 34, 15, 8, 5]
    assert pairs == _algorithm_1(81, 3)


def test_table_counts_survive_node_failures():
    # a lost segment is requeued, not failed (losses uncapped here): every barrier still gets
    # all of its results
    plan = SearchPlan(mode="sync-hyperband", min_budget=1, max_budget=81, eta=3, hyperband_counts="table",
                      iterations=2, max_losses=10**6)
    result = simulate(plan, CountingSampler(), 12, LinearCost(60.0), failure_rate_per_hour=1.0,
                      requeue_delay=20.0, repair_seconds=300.0, seed=5)
    assert result.drained
    assert result.lost > 0
    assert len(result.trials_per_rung) == 10
    for b, counts in enumerate(result.trials_per_rung):
        s = 4 - b % 5
        assert list(zip(counts, result.budgets[b], strict=True)) == TABLE_1[s]


def test_sync_halving_top_rung_finishes_exactly_one_per_bracket_trial():
    plan = SearchPlan(mode="sync-halving", min_budget=1, max_budget=81, eta=3)
    result = simulate(plan, CountingSampler(), 10, HeavyTailCost(1.0, sigma=0.5), seed=0)
    # sync_trials defaults to eta**top = 81: 81, 27, 9, 3, 1 (successive halving's n_i = n / eta**i)
    assert result.trials_per_rung == ((81, 27, 9, 3, 1),)
    assert result.statistics["states"][DONE] == 1
