"""Asynchronous Hyperband deals new trials to its brackets in proportion to Li et al.'s n_s.

Outside sources, each named where it is used:

- Li, Jamieson, DeSalvo, Rostamizadeh, Talwalkar, "Hyperband", JMLR 18 (2018), Algorithm 1:
  bracket s starts n_s = ceil((s_max + 1) / (s + 1) * eta**s) trials; for R = 81, eta = 3
  that is 81, 34, 15, 8, 5 (recalled from memory, and recomputed below from the formula
  with exact fractions, independently of rungway's integer code).
- Balinski and Young, "The quota method of apportionment", American Mathematical Monthly 82
  (1975) (recalled from memory): the quota method is house-monotone (one seat at a time) and
  keeps every state within its quota, floor or ceil of h * w_i / W, for every house size h.
  The property test checks exactly that bound for every N, over random result orders.
"""

from __future__ import annotations

import json
import math
import random
from collections import Counter
from fractions import Fraction

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rungway.scheduler.core.events import Segment
from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.testing import CountingSampler


def li_counts(s_max: int, eta: int) -> list[int]:
    """n_s for s = s_max .. 0 (the core's bracket order), from Li et al.'s Algorithm 1 as
    printed, computed with exact fractions rather than the core's integer trick."""
    return [math.ceil(Fraction(s_max + 1, s + 1) * eta**s) for s in range(s_max, -1, -1)]


def within_quota(counts: list[int], weights: list[int]) -> bool:
    n, total = sum(counts), sum(weights)
    return all(
        math.floor(Fraction(n * w, total)) <= c <= math.ceil(Fraction(n * w, total))
        for c, w in zip(counts, weights, strict=True)
    )


def drive(core: SearchCore, rng: random.Random, workers: int, check) -> None:  # type: ignore[no-untyped-def]
    """Run ``core`` to the end with ``workers`` slots, results back in a random order with
    random values; ``check(core)`` after every new trial."""
    running: list[Segment] = []
    while True:
        while len(running) < workers:
            seg = core.ask()
            if not isinstance(seg, Segment):
                break
            running.append(seg)
            if seg.rung == 0 and seg.attempt == 1:
                check(core)
        if not running:
            return
        seg = running.pop(rng.randrange(len(running)))
        core.report(seg.trial, seg.attempt, seg.rung, rng.choice([rng.random(), float(rng.randrange(3))]))


def bracket_counts(core: SearchCore) -> list[int]:
    return [b["created"] for b in core.statistics()["brackets"]]


def test_the_weights_are_li_et_al_n_s() -> None:
    # Li et al. (JMLR 2018), Algorithm 1, R = 81, eta = 3: 81, 34, 15, 8, 5 (recalled from memory).
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=81, eta=3)
    assert [b.weight for b in plan.brackets()] == [81, 34, 15, 8, 5] == li_counts(4, 3)
    assert [b.s for b in plan.brackets()] == [4, 3, 2, 1, 0]


def test_the_first_deals_worked_by_hand() -> None:
    # R = 9, eta = 3: n_s = 9, 5, 3 for s = 2, 1, 0 (Algorithm 1), W = 17. Trial N + 1 goes to
    # a bracket with c * 17 < (N + 1) * w, the smallest (c + 1) / w among them, larger s on a tie:
    # 1: all eligible, 1/9 least -> s=2; 2: 1/5 < 2/9 -> s=1; 3: s=1 not eligible (17 >= 15) -> s=2;
    # 4: 3/9 = 1/3 tie with s=0 -> s=2; 5: s=2 not eligible (51 >= 45), 1/3 < 2/5 -> s=0;
    # 6: 2/5 < 4/9 < 2/3 -> s=1.
    core = SearchCore(SearchPlan(mode="hyperband", min_budget=1, max_budget=9, eta=3), CountingSampler())
    segments = [core.ask() for _ in range(6)]
    assert [s.target_budget for s in segments] == [1, 3, 1, 1, 9, 3]  # type: ignore[union-attr]


def test_300_trials_on_the_worked_ladder() -> None:
    # The case: R = 81, eta = 3, 300 trials. Quotas 300 * (81, 34, 15, 8, 5) / 143 =
    # 169.9, 71.3, 31.5, 16.8, 10.5 (the old dealing gave about 55/54/53/58/80).
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=81, eta=3, max_trials=300)
    core = SearchCore(plan, CountingSampler())
    drive(core, random.Random(1), 8, lambda c: None)
    counts = bracket_counts(core)
    assert sum(counts) == 300
    assert within_quota(counts, li_counts(4, 3))
    assert counts == [170, 72, 31, 17, 10]


def test_a_whole_round_of_143_deals_exactly_li_et_al_counts() -> None:
    # After sum(n_s) = 143 new trials the quotas are whole numbers: exactly Algorithm 1's n_s.
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=81, eta=3, max_trials=143 * 2)
    core = SearchCore(plan, CountingSampler())
    seen: list[list[int]] = []
    drive(core, random.Random(7), 5, lambda c: seen.append(bracket_counts(c)))
    assert seen[143 - 1] == [81, 34, 15, 8, 5]
    assert seen[286 - 1] == [162, 68, 30, 16, 10]


def test_promotions_go_before_new_trials_in_any_bracket() -> None:
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=9, eta=3)
    core = SearchCore(plan, CountingSampler())
    first = [core.ask() for _ in range(4)]  # s=2, s=1, s=2, s=2 (worked above)
    assert [s.bracket for s in first] == [0, 1, 0, 0]  # type: ignore[union-attr]
    for seg, value in zip(first, (3.0, 1.0, 2.0, 1.0), strict=True):
        core.report(seg.trial, seg.attempt, seg.rung, value)  # type: ignore[union-attr]
    # Bracket s=2 has 3 results at rung 0: its best (trial 3) is ready for promotion and goes
    # first, before the new trial the dealing rule would start.
    nxt = core.ask()
    assert isinstance(nxt, Segment) and (nxt.trial, nxt.rung) == (3, 1)
    assert isinstance(new := core.ask(), Segment) and new.rung == 0 and new.trial == 4


def test_dealing_survives_a_snapshot() -> None:
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=27, eta=3, max_trials=60)
    core = SearchCore(plan, CountingSampler())
    for _ in range(11):
        core.ask()
    twin = SearchCore.restore(json.loads(json.dumps(core.snapshot())), CountingSampler())
    for _ in range(20):
        a, b = core.ask(), twin.ask()
        assert a == b


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    eta=st.sampled_from([2, 3, 4]),
    s_max=st.integers(1, 4),
    raised_top=st.booleans(),
    trials=st.integers(1, 400),
    workers=st.integers(1, 40),
    rng=st.randoms(use_true_random=False),
)
def test_counts_per_bracket_stay_within_their_quota(eta, s_max, raised_top, trials, workers, rng) -> None:
    # Any result order, any number of workers: after every new trial N, bracket s holds
    # floor or ceil of N * n_s / sum(n) trials (the quota method's guarantee, Balinski and
    # Young 1975; n_s from Li et al., JMLR 2018, Algorithm 1).
    top = eta**s_max + (1 if raised_top else 0)  # R / r not a power of eta: the top rung is raised, s_max kept
    plan = SearchPlan(mode="hyperband", min_budget=1, max_budget=top, eta=eta, max_trials=trials)
    core = SearchCore(plan, CountingSampler())
    weights = li_counts(s_max, eta)
    checked = []

    def check(c: SearchCore) -> None:
        counts = bracket_counts(c)
        assert within_quota(counts, weights), (counts, weights)
        checked.append(sum(counts))

    drive(core, rng, workers, check)
    assert checked == list(range(1, trials + 1))
    assert Counter(t.bracket for t in core.trials()) == Counter(
        {i: c for i, c in enumerate(bracket_counts(core)) if c}
    )
