"""How much budget a plan will spend, and what a segment is expected to cost.

Pure arithmetic. :func:`planned_budget` is the figure behind the live view's time-left
estimate: for asynchronous ladders it assumes the proportions of successive halving
(n / eta**k trials reach rung k); trials resumed from a checkpoint only pay for the budget
above the rung they come from. The cluster simulator refines this.

:class:`SegmentCosts` fits what finished segments cost (CPU seconds, or wall seconds) to
``overhead + units * per_unit`` by least squares over every segment recorded (running sums,
so recording and predicting are O(1)); the head and the simulator use it to start no
segment whose expected cost would cross a limit.
"""

from __future__ import annotations

from .plan import SearchPlan

__all__ = ["SegmentCosts", "planned_budget"]


def planned_budget(plan: SearchPlan, trials: int | None = None) -> float | None:
    """Total budget the search is expected to run, or None when it has no trial limit."""
    n = trials if trials is not None else plan.max_trials
    brackets = plan.brackets()
    if plan.synchronous:
        total = 0.0
        for bp in brackets:
            assert bp.counts is not None
            total += _ladder_cost(bp.ladder.budgets, [float(c) for c in bp.counts], plan.stopping)
        return total
    if n is None:
        return None
    per_bracket = n / len(brackets)
    total = 0.0
    for bp in brackets:
        counts = [per_bracket / plan.eta**k for k in range(len(bp.ladder.budgets))]
        total += _ladder_cost(bp.ladder.budgets, counts, plan.stopping)
    return total


def _ladder_cost(budgets: tuple[float, ...], counts: list[float], stopping: bool) -> float:
    total, previous = 0.0, 0.0
    for budget, count in zip(budgets, counts, strict=True):
        total += count * (budget - previous)  # resumed (or continued) from the rung below
        previous = budget
    return total


class SegmentCosts:
    """Costs of finished segments, fitted per budget unit: ``cost = overhead + units * per_unit``.

    Least squares over every ``(units, cost)`` recorded; with a single distinct number of
    units (or a fit that would make either term negative) the cost is taken as proportional
    to the units, through the origin. ``expected`` is None until a segment is recorded."""

    __slots__ = ("n", "sx", "sy", "sxx", "sxy", "_fit")

    def __init__(self) -> None:
        self.n = 0
        self.sx = self.sy = self.sxx = self.sxy = 0.0
        self._fit: tuple[float, float] | None = None

    def record(self, units: float, cost: float) -> None:
        """One finished segment ran ``units`` budget units and cost ``cost``."""
        if not (units > 0 and cost >= 0) or cost == float("inf"):
            return
        self.n += 1
        self.sx += units
        self.sy += cost
        self.sxx += units * units
        self.sxy += units * cost
        self._fit = None

    def fit(self) -> tuple[float, float] | None:
        """(overhead, per_unit), or None before the first segment."""
        if self.n == 0:
            return None
        if self._fit is None:
            n, sx, sy, sxx, sxy = self.n, self.sx, self.sy, self.sxx, self.sxy
            spread = n * sxx - sx * sx
            fit = None
            if n >= 3 and spread > 1e-12 * max(1.0, sxx * n):
                per_unit = (n * sxy - sx * sy) / spread
                overhead = (sy - per_unit * sx) / n
                if per_unit >= 0 and overhead >= 0:
                    fit = (overhead, per_unit)
            self._fit = fit or (0.0, sxy / sxx)
        return self._fit

    def expected(self, units: float) -> float | None:
        """The expected cost of a segment of ``units`` budget units (None: nothing recorded)."""
        fit = self.fit()
        if fit is None:
            return None
        return fit[0] + fit[1] * max(0.0, units)
