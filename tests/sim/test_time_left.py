"""The live view's time-left estimate is the planner's simulation with the measured costs."""

from __future__ import annotations

import pytest

from rungway.scheduler.head.estimate import TimeLeft
from rungway.scheduler.sim import LinearCost, plan_search
from rungway.scheduler.spec import parse_spec
from rungway.workers.demo import DEMO_SPEC


def test_time_left_uses_the_planner_with_costs_fitted_from_segments() -> None:
    spec = parse_spec(DEMO_SPEC)
    estimate = TimeLeft(spec, every=0.0, min_segments=4, repeats=3)
    assert estimate.seconds_left(0.0) is None  # nothing measured yet
    for units in (1, 2, 1, 6, 18, 2, 1):
        estimate.record(units, 0.5 + 0.1 * units)  # exactly overhead 0.5 s + 0.1 s per epoch
    estimate.maybe_update(now=100.0, slots=2)
    assert estimate._thread is not None
    estimate._thread.join(timeout=60)
    expected = plan_search(spec, workers=2, cost=LinearCost(0.1, 0.5), repeats=3).wall_seconds.median
    assert estimate.predicted_total == pytest.approx(expected, rel=1e-6)
    assert estimate.seconds_left(10.0) == pytest.approx(expected - 10.0, rel=1e-6)
    assert estimate.seconds_left(expected + 5) == 0.0
