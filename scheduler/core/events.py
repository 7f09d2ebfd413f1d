"""Events that go into the scheduling core and the commands and verdicts that come out.

Events are what the world tells the core (a slot is free, a result arrived, a worker was
lost). Commands and verdicts are the core's answers; adapters carry them out. All are small
frozen classes; none holds anything but plain data.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .ladder import Budget

__all__ = [
    # events
    "Ask",
    "Report",
    "Lost",
    "Crashed",
    "Yielded",
    "Cancel",
    "StopAdmitting",
    "Resume",
    "Event",
    # commands and verdicts
    "Segment",
    "Idle",
    "Drained",
    "Parked",
    "Finished",
    "Continue",
    "Culled",
    "Requeued",
    "Failed",
    "Cancelled",
    "Outcome",
]


# ---- events -------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Ask:
    """A worker slot is free: what should it run?"""


@dataclass(frozen=True, slots=True)
class Report:
    """Segment ``attempt`` of ``trial`` reached rung ``rung`` and measured ``value``."""

    trial: int
    attempt: int
    rung: int
    value: float


@dataclass(frozen=True, slots=True)
class Lost:
    """The segment's machine went away (or the head stopped it); not the trial's fault.

    ``counted`` losses (the machine died, the segment fell silent) count towards the trial's
    ``max_losses``, so a trial that keeps taking its machine down ends; a segment the head
    stopped itself (it was stopped, paused or restarted) is not counted.
    """

    trial: int
    attempt: int
    counted: bool = True


@dataclass(frozen=True, slots=True)
class Crashed:
    """User code raised or returned something unusable; counts against the trial."""

    trial: int
    attempt: int
    reason: str = ""


@dataclass(frozen=True, slots=True)
class Yielded:
    """The segment saved its state and stopped early when asked (preemption)."""

    trial: int
    attempt: int


@dataclass(frozen=True, slots=True)
class Cancel:
    """Withdraw a trial, whatever it is doing."""

    trial: int


@dataclass(frozen=True, slots=True)
class StopAdmitting:
    """Start no more new trials; let what is under way drain."""


@dataclass(frozen=True, slots=True)
class Resume:
    """A new run of a search that stopped as failing: its run of first-rung failures starts
    over, so it gets another ``max_consecutive_failures`` trials (its objective may be fixed)."""


Event = Ask | Report | Lost | Crashed | Yielded | Cancel | StopAdmitting | Resume


# ---- commands and verdicts ----------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Segment:
    """Run ``trial`` from its last saved state to ``target_budget``.

    ``milestones`` are the rung budgets at which the worker reports on the way (only more than
    one in the stopping form of ASHA, where a trial runs on without pausing). ``attempt``
    numbers every hand-out of a trial, so (trial, rung, attempt) names one result exactly.
    """

    trial: int
    attempt: int
    rung: int
    bracket: int
    start_budget: Budget
    target_budget: Budget
    config: dict[str, Any] = field(compare=False)
    milestones: tuple[Budget, ...] = ()


@dataclass(frozen=True, slots=True)
class Idle:
    """Nothing to run now: results still to come may make work."""


@dataclass(frozen=True, slots=True)
class Drained:
    """The search has finished: nothing runs and nothing more will."""


@dataclass(frozen=True, slots=True)
class Parked:
    trial: int
    rung: int


@dataclass(frozen=True, slots=True)
class Finished:
    trial: int


@dataclass(frozen=True, slots=True)
class Continue:
    """Stopping form: the trial is in the top 1/eta of its rung and runs on to ``rung``."""

    trial: int
    rung: int


@dataclass(frozen=True, slots=True)
class Culled:
    trial: int
    rung: int


@dataclass(frozen=True, slots=True)
class Requeued:
    trial: int
    rung: int


@dataclass(frozen=True, slots=True)
class Failed:
    trial: int
    reason: str


@dataclass(frozen=True, slots=True)
class Cancelled:
    trial: int


Outcome = Segment | Idle | Drained | Parked | Finished | Continue | Culled | Requeued | Failed | Cancelled

IDLE = Idle()
DRAINED = Drained()
