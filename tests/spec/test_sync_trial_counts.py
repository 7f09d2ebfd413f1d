"""``limits.trials`` in the synchronous modes: honoured exactly, or refused at load.

Rule (docs/scheduling.md, "How many trials the synchronous modes start"): ``sync-halving``
starts every trial at its bottom rung, so ``limits.trials`` is the number it starts there,
the same number as ``ladder.sync_trials``; rung k then keeps floor(n / eta**k), successive
halving's n_i = floor(n * eta**-i) (Li et al., "Hyperband", JMLR 2018, Algorithm 1, its inner
loop; recalled from memory). ``sync-hyperband`` starts the brackets' n_s each iteration, so
``limits.trials`` must be a whole number of iterations; n_s = 81, 34, 15, 8, 5 for R = 81 and
eta = 3 by Algorithm 1's formula and 81, 27, 9, 6, 5 by Table 1 (recalled from memory; the
docs' table and tests/sim/test_sim_hyperband.py check both against the paper's rules).
"""

from __future__ import annotations

import pytest

from rungway.scheduler.core.events import Segment
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.spec import SpecFileError, parse_spec
from rungway.scheduler.testing import CountingSampler

SPEC = """\
name = "counts"
objective = "objectives_for_tests:plain"
metric = "loss"
better = "lower"

[ladder]
min = 1
max = {max}
eta = 3
mode = "{mode}"
{ladder}

[limits]
{limits}

[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


def spec(mode: str, max_budget: int = 81, ladder: str = "", limits: str = ""):  # type: ignore[no-untyped-def]
    return parse_spec(SPEC.format(mode=mode, max=max_budget, ladder=ladder, limits=limits), "counts.toml")


def run_to_the_end(core: SearchCore) -> list[list[int]]:
    """Drive ``core`` with 7 slots, answering the oldest segment first with a value that
    depends only on the trial; return the results per rung per bracket."""
    running: list[Segment] = []
    while True:
        while len(running) < 7 and isinstance(seg := core.ask(), Segment):
            running.append(seg)
        if not running:
            break
        seg = running.pop(0)
        core.report(seg.trial, seg.attempt, seg.rung, (seg.trial * 7919) % 101 / 101)
    return [[r["results"] for r in b["rungs"]] for b in core.statistics()["brackets"]]


def test_sync_halving_runs_limits_trials_at_the_bottom_rung() -> None:
    # The first case: 300 asked, 81 ran. Now 300 start; floor(300 / 3**k) per rung.
    plan = spec("sync-halving", limits="trials = 300").plan()
    core = SearchCore(plan, CountingSampler())
    assert run_to_the_end(core) == [[300, 100, 33, 11, 3]]
    assert len(core) == 300


def test_fifty_trials_on_three_rungs_reach_the_top() -> None:
    # The brief's example: 50 trials, eta 3, rungs 1, 3, 9: 50 -> 16 -> 5 (floor(50/3), floor(50/9)).
    core = SearchCore(spec("sync-halving", max_budget=9, limits="trials = 50").plan(), CountingSampler())
    assert run_to_the_end(core) == [[50, 16, 5]]
    assert core.statistics()["states"]["done"] == 5


def test_fifty_trials_on_five_rungs_are_refused_naming_the_field_and_the_minimum() -> None:
    # The second case: 50 -> 16 -> 5 -> 1 -> 0, no trial reaches 81.
    with pytest.raises(SpecFileError) as info:
        spec("sync-halving", limits="trials = 50")
    assert info.value.field == "limits.trials"
    text = str(info.value)
    assert "at least eta**4 = 81" in text and "50, 16, 5, 1, 0" in text and "(got 50)" in text


def test_sync_trials_alone_still_sets_the_count_and_must_reach_the_top() -> None:
    assert spec("sync-halving", ladder="sync_trials = 100").plan().sync_trials == 100
    with pytest.raises(SpecFileError) as info:
        spec("sync-halving", ladder="sync_trials = 20")
    assert info.value.field == "ladder.sync_trials"
    assert "at least eta**4 = 81" in str(info.value)


def test_both_fields_must_agree() -> None:
    assert spec("sync-halving", ladder="sync_trials = 90", limits="trials = 90").plan().sync_trials == 90
    with pytest.raises(SpecFileError) as info:
        spec("sync-halving", ladder="sync_trials = 81", limits="trials = 300")
    assert info.value.field == "limits.trials"
    assert "ladder.sync_trials = 81" in str(info.value) and "(got 300)" in str(info.value)


def test_the_default_is_unchanged() -> None:
    plan = spec("sync-halving").plan()
    assert plan.sync_trials is None and plan.brackets()[0].counts == (81, 27, 9, 3, 1)  # eta**top


@pytest.mark.parametrize(("counts", "per_iteration"), [("formula", 81 + 34 + 15 + 8 + 5), ("table", 81 + 27 + 9 + 6 + 5)])
def test_sync_hyperband_takes_a_whole_number_of_iterations(counts: str, per_iteration: int) -> None:
    plan = spec("sync-hyperband", ladder=f'hyperband_counts = "{counts}"', limits=f"trials = {2 * per_iteration}").plan()
    assert plan.iterations == 2
    core = SearchCore(plan, CountingSampler())
    run_to_the_end(core)
    assert len(core) == 2 * per_iteration
    with pytest.raises(SpecFileError) as info:
        spec("sync-hyperband", ladder=f'hyperband_counts = "{counts}"', limits=f"trials = {2 * per_iteration + 1}")
    assert info.value.field == "limits.trials"
    assert f"use {2 * per_iteration} or {3 * per_iteration}" in str(info.value)


def test_sync_hyperband_trials_and_iterations_must_agree() -> None:
    assert spec("sync-hyperband", ladder="iterations = 2", limits="trials = 286").plan().iterations == 2
    with pytest.raises(SpecFileError) as info:
        spec("sync-hyperband", ladder="iterations = 3", limits="trials = 286")
    assert info.value.field == "limits.trials"
    assert "ladder.iterations x 143 = 429" in str(info.value)


def test_fewer_than_one_iteration_is_refused() -> None:
    with pytest.raises(SpecFileError) as info:
        spec("sync-hyperband", limits="trials = 100")
    assert "use 143 (which sets ladder.iterations)" in str(info.value)
