"""Cost models: fitted from measurements, and the heavy-tailed multipliers' means.

Sources: the synthetic measurements are built here with a known slope and overhead, and the
fit is also checked against ``scipy.stats.linregress`` (an independent least-squares line) on
the same segments. The multipliers' means use the textbook moments (recalled from memory):
a lognormal(mu, sigma) has mean exp(mu + sigma**2 / 2); a Pareto with minimum x_m and shape
alpha > 1 has mean alpha * x_m / (alpha - 1).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from rungway.scheduler.sim import (
    FittedCost,
    FixedCost,
    HeavyTailCost,
    LinearCost,
    dispatch_gap_from_measurements,
    segments_from_measurements,
)

SLOPE, OVERHEAD = 2.5, 4.0
BUDGETS = (1, 3, 9, 27)
T0 = datetime(2026, 1, 1, tzinfo=timezone.utc)


def _frame(seed: int = 0, noise: float = 0.3) -> tuple[pd.DataFrame, list[tuple[float, float]]]:
    """Measurements of 40 trials run up the ladder 1, 3, 9, 27 (resumed from the rung below),
    two metrics per result, progress rows that are not final, and one lost attempt."""
    rng = np.random.default_rng(seed)
    rows, truth = [], []
    clock = T0
    for trial in range(40):
        top = int(rng.integers(0, len(BUDGETS)))
        attempt = 0
        for rung in range(top + 1):
            attempt += 1
            start = 0 if rung == 0 else BUDGETS[rung - 1]
            if trial % 7 == 3 and rung == 1:  # lost on its first try: progress rows only
                lost_end = clock + timedelta(seconds=5)
                rows.append(dict(trial=trial, rung=rung, attempt=attempt, seq=0, budget=float(start + 1), metric="loss",
                                 value=0.5, final=False, node="n1", started_at=clock, ended_at=lost_end))
                clock = lost_end
                attempt += 1
            seconds = OVERHEAD + SLOPE * (BUDGETS[rung] - start) + rng.normal(0, noise)
            truth.append((BUDGETS[rung] - start, seconds))
            end = clock + timedelta(seconds=seconds)
            half = clock + timedelta(seconds=seconds / 2)
            rows.append(dict(trial=trial, rung=rung, attempt=attempt, seq=0, budget=float(BUDGETS[rung]), metric="loss",
                             value=0.4, final=False, node="n1", started_at=clock, ended_at=half))
            for seq, metric in enumerate(("accuracy", "loss"), 1):
                rows.append(dict(trial=trial, rung=rung, attempt=attempt, seq=seq, budget=float(BUDGETS[rung]),
                                 metric=metric, value=0.9, final=True, node="n1", started_at=clock, ended_at=end))
            clock = end + timedelta(seconds=1)
    return pd.DataFrame(rows), truth


def test_fitted_cost_recovers_slope_and_overhead():
    frame, truth = _frame()
    fitted = FittedCost.from_measurements(frame)
    assert fitted.segments == len(truth) - 1  # the first, the node's warm-up, is left out
    assert fitted.seconds_per_unit == pytest.approx(SLOPE, abs=0.05)
    assert fitted.overhead == pytest.approx(OVERHEAD, abs=0.3)
    x, y = np.array(truth[1:]).T
    line = stats.linregress(x, y)
    assert fitted.seconds_per_unit == pytest.approx(line.slope, rel=1e-6)
    assert fitted.overhead == pytest.approx(line.intercept, rel=1e-6)
    assert fitted.residual_std == pytest.approx(0.3, rel=0.35)


def test_segments_are_one_per_attempt_with_the_start_budget():
    frame, truth = _frame()
    seg = segments_from_measurements(frame)
    assert len(seg) == len(truth)
    assert sorted(seg["advance"].tolist()) == sorted(a for a, _ in truth)
    # a trial that reached 27 resumed from 9
    row = seg[seg["target"] == 27].iloc[0]
    assert row["start"] == 9
    scratch = segments_from_measurements(frame, from_scratch=True)
    assert (scratch["start"] == 0).all()
    assert (scratch["advance"] == scratch["target"]).all()


def test_fitted_cost_samples_around_the_line():
    frame, _ = _frame(seed=1, noise=1.0)
    fitted = FittedCost.from_measurements(frame)
    cost = fitted.bind(np.random.default_rng(0))
    draws = np.array([cost({}, 3, 9, 2) for _ in range(20000)])
    assert draws.mean() == pytest.approx(fitted.overhead + 6 * fitted.seconds_per_unit, abs=0.05)
    assert draws.std() == pytest.approx(fitted.residual_std, rel=0.05)
    again = fitted.bind(np.random.default_rng(0))
    assert [again({}, 3, 9, 2) for _ in range(5)] == draws[:5].tolist()


def test_fitting_needs_completed_segments():
    frame, _ = _frame()
    with pytest.raises(ValueError, match="no completed segment"):
        FittedCost.from_measurements(frame[~frame["final"]])


@pytest.mark.parametrize(
    ("model", "expected_mean"),
    [
        (HeavyTailCost(1.0, sigma=1.0), 1.0),  # exp(-sigma**2/2 + sigma**2/2)
        (HeavyTailCost(1.0, distribution="pareto", alpha=2.5), 1.0),  # 2.5 * 0.6 / 1.5
    ],
    ids=["lognormal", "pareto"],
)
def test_heavy_tail_multipliers_have_mean_one(model, expected_mean):
    cost = model.bind(np.random.default_rng(42))
    draws = np.array([cost({}, 0, 1, 0) for _ in range(200_000)])
    assert draws.mean() == pytest.approx(expected_mean, abs=0.02)
    assert np.median(draws) < draws.mean()  # right-skewed
    if model.distribution == "pareto":
        assert draws.min() >= 0.6 - 1e-12  # the minimum x_m = (alpha - 1) / alpha


def test_fixed_and_linear_costs():
    assert FixedCost(7.0).bind(np.random.default_rng(0))({}, 3, 9, 1) == 7.0
    assert LinearCost(2.0, overhead=1.5).bind(np.random.default_rng(0))({}, 3, 9, 1) == 1.5 + 6 * 2.0
    with pytest.raises(ValueError):
        LinearCost(0.0)
    with pytest.raises(ValueError):
        HeavyTailCost(1.0, distribution="pareto", alpha=1.0)


def test_the_dispatch_gap_is_the_typical_wait_between_segments_on_a_node():
    frame, truth = _frame()
    # The synthetic search leaves exactly 1 s between one segment's end and the next start
    # (and 6 s after a lost attempt's progress rows, which counts as no segment).
    assert dispatch_gap_from_measurements(frame, longest=2.0) == pytest.approx(1.0)
    assert dispatch_gap_from_measurements(frame, longest=1.0) == 0.0  # waits of 1 s or more left out
    # Per node: on a second node that ran the same segments 0.25 s later, each end is followed
    # by that node's own next start, not by the other node's.
    shifted = frame.assign(node="n2", trial=frame["trial"] + 1000, started_at=frame["started_at"] + pd.Timedelta(seconds=0.25),
                           ended_at=frame["ended_at"] + pd.Timedelta(seconds=0.25))
    assert dispatch_gap_from_measurements(pd.concat([frame, shifted]), longest=2.0) == pytest.approx(1.0)


def test_a_dispatch_gap_costs_wall_time_and_no_cpu_time():
    from rungway.scheduler.core.plan import SearchPlan
    from rungway.scheduler.sim import simulate
    from rungway.scheduler.testing import CountingSampler

    plan = SearchPlan(mode="full-budget", min_budget=1, max_budget=1, eta=3, max_trials=10)
    plain = simulate(plan, CountingSampler(), 1, FixedCost(2.0))
    gapped = simulate(plan, CountingSampler(), 1, FixedCost(2.0), dispatch_gap=0.5)
    # One slot runs the 10 segments one after another: 10 x 2 s, plus 10 x 0.5 s of waiting.
    assert plain.wall_seconds == pytest.approx(20.0)
    assert gapped.wall_seconds == pytest.approx(25.0)
    assert gapped.cpu_hours == pytest.approx(plain.cpu_hours) == pytest.approx(20.0 / 3600)
    with pytest.raises(ValueError, match="dispatch_gap"):
        simulate(plan, CountingSampler(), 1, FixedCost(2.0), dispatch_gap=-1.0)


def test_the_first_wave_on_a_node_is_marked_warm_up_and_left_out_of_the_fit():
    frame, truth = _frame()
    seg = segments_from_measurements(frame)
    # One node running one segment at a time: only the very first segment started before
    # any segment there had ended.
    assert seg["warmup"].sum() == 1
    first = seg.loc[seg["warmup"]].iloc[0]
    # The worker processes' start-up (say 100 s of imports) lands on that first segment: the
    # fitted line stays that of the warm segments.
    slow = frame.copy()
    mine = (slow["trial"] == first["trial"]) & (slow["attempt"] == first["attempt"])
    slow.loc[mine, "ended_at"] = slow.loc[mine, "ended_at"] + pd.Timedelta(seconds=100)
    fitted = FittedCost.from_measurements(slow)
    # Slowed, it now ends after the second segment began (and ended): both are the first wave.
    assert segments_from_measurements(slow)["warmup"].sum() == 2
    assert fitted.segments == len(truth) - 2
    assert fitted.seconds_per_unit == pytest.approx(SLOPE, abs=0.05)
    assert fitted.overhead == pytest.approx(OVERHEAD, abs=0.3)
