"""rungway's worker side: what a submitted objective runs with.

Objectives come in two forms, both named by a ``module:function`` path in the search spec:

- the plain form ``def f(config: dict, budget) -> float | dict``: trains from scratch to
  ``budget`` and returns the metric (or a dict of metrics); nothing of rungway's to import;
- the resumable form ``def f(ctx: Context) -> float | dict | None``: resumes from
  ``ctx.state``, reports and saves as it goes (see :class:`Context`).
"""

from .context import Context, TrialStopped
from .objective import Objective, interpret_result, load_objective

__all__ = ["Context", "Objective", "TrialStopped", "interpret_result", "load_objective"]
