"""Synchronous successive halving and Hyperband: barriers and counts (Li et al., JMLR 2018)."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from rungway.scheduler.core.events import Drained, Idle, Segment
from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.testing import CountingSampler


def drive(core: SearchCore, value_of, workers: int, rng: np.random.Generator | None = None) -> list[Segment]:
    """Run to the end with ``workers`` slots; results come back in a (seeded) random order."""
    running: list[Segment] = []
    handed: list[Segment] = []
    while True:
        while len(running) < workers:
            out = core.ask()
            if not isinstance(out, Segment):
                break
            running.append(out)
            handed.append(out)
        else:
            out = None
        if not running:
            assert isinstance(core.ask(), Drained)
            return handed
        pick = int(rng.integers(len(running))) if rng is not None else 0
        seg = running.pop(pick)
        core.report(seg.trial, seg.attempt, seg.rung, value_of(seg))


def value(seg: Segment) -> float:
    # Deterministic, distinct per configuration, improving with budget.
    return ((seg.config["index"] * 7919) % 1009) / 1009 + 1.0 / seg.target_budget


def test_barrier_holds_promotions_until_every_result_of_the_rung_is_in() -> None:
    core = SearchCore(SearchPlan(mode="sync-halving", min_budget=1, max_budget=9, eta=3, sync_trials=9), CountingSampler())
    first = [core.ask() for _ in range(9)]
    assert all(isinstance(s, Segment) and s.rung == 0 for s in first)
    assert core.ask() == Idle()
    for seg in first[:-1]:
        core.report(seg.trial, seg.attempt, 0, value(seg))  # type: ignore[union-attr]
        assert core.ask() == Idle()  # one result still missing: the barrier holds
    last = first[-1]
    core.report(last.trial, last.attempt, 0, value(last))  # type: ignore[union-attr]
    promoted = [core.ask() for _ in range(3)]
    assert all(isinstance(s, Segment) and s.rung == 1 for s in promoted)
    assert core.ask() == Idle()
    # The three promoted are exactly the best three of rung 0.
    ranked = sorted(first, key=lambda s: (value(s), s.trial))  # type: ignore[arg-type]
    assert {s.trial for s in promoted} == {s.trial for s in ranked[:3]}  # type: ignore[union-attr]


@pytest.mark.parametrize("variant", ["formula", "table"])
def test_sync_hyperband_runs_the_published_counts(variant: str) -> None:
    """Segments run per (bracket, rung) equal Li et al. (JMLR 2018): Algorithm 1's counts for
    the formula, Table 1's for the table variant (R = 81, eta = 3)."""
    from test_ladder import ALGORITHM_1, TABLE_1  # the published numbers, with their sources

    expected = ALGORITHM_1 if variant == "formula" else TABLE_1
    plan = SearchPlan(mode="sync-hyperband", min_budget=1, max_budget=81, eta=3, hyperband_counts=variant)  # type: ignore[arg-type]
    handed = drive(SearchCore(plan, CountingSampler()), value, workers=7, rng=np.random.default_rng(3))
    counts = Counter((s.bracket, s.target_budget) for s in handed)
    for bracket_index, s in enumerate([4, 3, 2, 1, 0]):
        for n_i, r_i in expected[s]:
            assert counts[(bracket_index, r_i)] == n_i, (s, r_i)
    assert sum(counts.values()) == sum(n for rows in expected.values() for n, _ in rows)


def test_synchronous_mode_is_deterministic_whatever_the_arrival_order() -> None:
    plan = SearchPlan(mode="sync-halving", min_budget=1, max_budget=27, eta=3, sync_trials=40)
    outcomes = []
    for seed in (0, 1, 2):
        core = SearchCore(plan, CountingSampler())
        drive(core, value, workers=5, rng=np.random.default_rng(seed))
        outcomes.append([(t.id, t.state, t.rung, t.loss) for t in core.trials()])
    assert outcomes[0] == outcomes[1] == outcomes[2]
    finished = [t for t in outcomes[0] if t[1] == "done"]
    assert len(finished) == 40 // 27  # floor(floor(floor(40/3)/3)/3) = 1


def test_a_failed_trial_does_not_hold_the_barrier_and_has_no_result_to_count() -> None:
    core = SearchCore(SearchPlan(mode="sync-halving", min_budget=1, max_budget=3, eta=3, sync_trials=4, max_crashes=0), CountingSampler())
    segs = [core.ask() for _ in range(4)]
    assert all(isinstance(s, Segment) for s in segs)
    core.crashed(segs[0].trial, segs[0].attempt, "boom")  # type: ignore[union-attr]
    for seg, v in zip(segs[1:], (2.0, 1.0, 3.0), strict=True):
        core.report(seg.trial, seg.attempt, 0, v)  # type: ignore[union-attr]
    top = core.ask()  # 3 results: floor(3/3) = 1 promoted, the best
    assert isinstance(top, Segment) and top.trial == segs[2].trial and top.rung == 1  # type: ignore[union-attr]
    assert core.ask() == Idle()
