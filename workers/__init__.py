"""rungway's worker side: what a submitted objective runs with.

Objectives come in two forms, both named by a ``module:function`` path in the search spec:

- the plain form ``def f(config: dict, budget) -> float | dict``: trains from scratch to
  ``budget`` and returns the metric (or a dict of metrics); nothing of rungway's to import;
- the resumable form ``def f(ctx: Context) -> float | dict | None``: resumes from
  ``ctx.state``, reports and saves as it goes (see :class:`Context`).
"""

from .context import Context, TrialCulled
from .objective import Objective, interpret_result, load_objective

__all__ = ["Context", "Objective", "TrialCulled", "interpret_result", "load_objective"]


def __getattr__(name: str) -> object:
    # A name rungway 0.2 replaced gets its new name (ImportError, so that ``from rungway.workers
    # import <old name>`` shows this message instead of Python's generic one).
    from rungway.scheduler.store.migrations import renamed

    new = renamed(name)
    if new is not None:
        raise ImportError(f"rungway.workers.{name} was renamed in rungway 0.2: use {new}")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
