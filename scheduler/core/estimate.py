"""How much budget a plan will spend: the figure behind the live view's time-left estimate.

Pure arithmetic over the plan. For asynchronous ladders it assumes the proportions of
successive halving (n / eta**k trials reach rung k); trials resumed from a checkpoint only
pay for the budget above the rung they come from. The cluster simulator refines this.
"""

from __future__ import annotations

from .plan import SearchPlan

__all__ = ["planned_budget"]


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
