"""The cluster simulator and the search planner.

:func:`simulate` runs a search plan on a simulated cluster, driving the real scheduling core
(:class:`~rungway.scheduler.core.search.SearchCore`) with simulated time, segment costs from a
cost model and results from a value model. :func:`plan_search` repeats that over seeds for a
spec file's search and reports expected wall time, CPU-hours and trials per rung with an
interval. See ``docs/planning.md``.
"""

from __future__ import annotations

from .cluster import SimResult, simulate
from .costs import (
    CostModel,
    CurveValue,
    FittedCost,
    FixedCost,
    HeavyTailCost,
    LinearCost,
    ValueModel,
    dispatch_gap_from_measurements,
    segments_from_measurements,
)
from .planner import DEFAULT_OVERHEAD_SECONDS, DEFAULT_SECONDS_PER_UNIT, Interval, PlanEstimate, plan_search

__all__ = [
    "DEFAULT_OVERHEAD_SECONDS",
    "DEFAULT_SECONDS_PER_UNIT",
    "CostModel",
    "CurveValue",
    "FittedCost",
    "FixedCost",
    "HeavyTailCost",
    "Interval",
    "LinearCost",
    "PlanEstimate",
    "SimResult",
    "ValueModel",
    "dispatch_gap_from_measurements",
    "plan_search",
    "segments_from_measurements",
    "simulate",
]
