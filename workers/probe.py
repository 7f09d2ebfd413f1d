"""A first look at a user's objective before a search starts.

Runs the objective once, in this process, on one sampled configuration at the ladder's
minimum budget, with checkpoints kept in memory. A search whose objective raises, returns a
string, or returns NaN at the first try is almost always a broken spec; saying so before
anything is written to the store saves a cluster's worth of failed segments. ``rungway run
--no-probe`` skips it (for objectives too expensive to run twice at the minimum budget).
"""

from __future__ import annotations

import math
import traceback
from collections.abc import Mapping
from typing import Any

from rungway.scheduler.core.errors import SpecError

from .context import Context, TrialCulled
from .objective import NOT_FINITE, Objective, interpret_result

__all__ = ["probe_objective"]


def probe_objective(objective: Objective, config: Mapping[str, Any], budget: int | float, metric: str) -> float:
    """The metric's value for ``config`` at ``budget``; SpecError(field="objective") if unusable."""
    saved: dict[str, Any] = {}
    last: list[dict[str, float]] = []

    def report(at: Any, metrics: dict[str, float], at_milestone: bool) -> bool:
        last[:] = [metrics]
        return True

    ctx = Context(
        config=config, budget=budget, start=0, state=None, trial=-1, attempt=0, rung=0,
        milestones=(budget,), save=lambda state, at: saved.update(state=state), report=report,
        yield_flag=lambda: False,
    )
    where = f"{objective.path} on {dict(config)} at budget {budget}"
    try:
        returned = objective.fn(dict(config), budget) if objective.form == "plain" else objective.fn(ctx)
    except TrialCulled:
        returned = None
    except Exception as exc:
        tail = "".join(traceback.format_exception_only(type(exc), exc)).strip()
        raise SpecError(
            f"the objective failed on a first try ({where}): {tail}; fix it, or pass --no-probe to skip this check",
            field="objective",
        ) from exc
    value, _metrics, reason = interpret_result(returned, metric, last[0] if last else None)
    if reason is not None and reason != NOT_FINITE:
        raise SpecError(f"the objective's first result is unusable ({where}): {reason}", field="objective")
    if not math.isfinite(value):
        raise SpecError(
            f"the objective returned {value} for {metric!r} on a first try ({where}); a search would rank every "
            "such result worst. Fix the objective, or pass --no-probe if this is expected",
            field="objective",
        )
    return value
