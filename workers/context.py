"""What a resumable objective sees while it runs: its configuration, its budget, its saved
state, and the calls to report measurements, save state and notice a request to yield.

A resumable objective is a function of one argument::

    def train(ctx: rungway.workers.Context):
        model = ctx.state if ctx.state is not None else build(ctx.config)
        for epoch in range(ctx.start, ctx.budget):
            fit_one_epoch(model)
            ctx.report(epoch + 1, accuracy=score(model))
            ctx.save(model, epoch + 1)
            if ctx.asked_to_yield:
                return            # saved above; rungway resumes it later
        return {"accuracy": score(model)}

The runner builds the Context; the objective never constructs one. Everything here is plain
Python: the runner passes in callables for the store and the head, so this module neither
imports Ray nor touches files itself.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

__all__ = ["Context", "TrialCulled"]

Budget = int | float


class Context:
    """The running segment, as the objective sees it."""

    __slots__ = (
        "config", "budget", "start", "state", "trial", "attempt", "rung", "milestones",
        "_save", "_report", "_yield_flag", "measurements", "saved_budget", "_milestone_index",
    )

    def __init__(
        self,
        *,
        config: Mapping[str, Any],
        budget: Budget,
        start: Budget,
        state: Any,
        trial: int,
        attempt: int,
        rung: int,
        milestones: tuple[Budget, ...],
        save: Callable[[Any, Budget], None],
        report: Callable[[Budget, dict[str, float], bool], bool],
        yield_flag: Callable[[], bool],
    ) -> None:
        self.config: dict[str, Any] = dict(config)
        self.budget = budget
        """The budget this segment must reach (an int for whole units)."""
        self.start = start
        """The budget the restored ``state`` had reached (0 for a fresh start)."""
        self.state = state
        """The object saved by the last :meth:`save` of this trial, or None."""
        self.trial = trial
        self.attempt = attempt
        self.rung = rung
        self.milestones = milestones
        self._save = save
        self._report = report
        self._yield_flag = yield_flag
        self.measurements: list[tuple[Budget, dict[str, float]]] = []
        self.saved_budget: Budget | None = None
        self._milestone_index = 0

    def report(self, budget: Budget, /, **metrics: float) -> None:
        """Record measurements taken at ``budget`` (e.g. ``ctx.report(3, accuracy=0.91)``).

        Values must be numbers; NaN and infinities are kept and ranked worst. Reaching a rung's
        budget makes this the rung's result. In ASHA's stopping form the head may then stop
        the trial: ``report`` raises :class:`TrialCulled` (caught by the runner) in that case.
        """
        if not metrics:
            raise TypeError("report() needs at least one metric, e.g. ctx.report(3, accuracy=0.9)")
        clean: dict[str, float] = {}
        for name, value in metrics.items():
            if isinstance(value, bool) or not isinstance(value, int | float):
                try:
                    value = float(value)  # numpy scalars
                except (TypeError, ValueError):
                    raise TypeError(f"metric {name!r} must be a number (got {type(value).__name__})") from None
            clean[name] = float(value)
        self.measurements.append((budget, clean))
        at_milestone = False
        while self._milestone_index < len(self.milestones) and budget >= self.milestones[self._milestone_index]:
            self._milestone_index += 1
            at_milestone = True
        if not self._report(budget, clean, at_milestone):
            raise TrialCulled(f"the scheduler stopped trial {self.trial} at budget {budget}")

    def save(self, state: Any, budget: Budget, /) -> None:
        """Save ``state`` (any picklable object) as this trial's checkpoint at ``budget``.

        Written atomically to the shared store; a later segment of this trial, possibly on
        another machine, receives it as ``ctx.state`` with ``ctx.start == budget``.
        """
        if isinstance(budget, float) and not math.isfinite(budget):
            raise ValueError("a checkpoint's budget must be finite")
        self._save(state, budget)
        self.saved_budget = budget

    @property
    def asked_to_yield(self) -> bool:
        """True when the scheduler asks this segment to save and return early (preemption)."""
        return self._yield_flag()

    def __getattr__(self, name: str) -> Any:
        # Only reached for a name the class lacks: answer a name rungway 0.2 replaced with its new one.
        from rungway.scheduler.store.migrations import renamed

        new = renamed(name)
        if new is not None:
            raise AttributeError(f"ctx.{name} was renamed in rungway 0.2: use ctx.{new}")
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")


class TrialCulled(Exception):
    """The scheduler stopped the trial at a rung (stopping form); the runner catches it."""

