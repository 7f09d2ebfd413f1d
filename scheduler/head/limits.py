"""A search's limits as the head applies them: no segment starts whose expected cost crosses one.

Theory of operation. ``limits.cpu_hours`` counts CPU time (what the segments' objectives
used, as their workers measured it; docs/service.md, "Accounting") and ``limits.deadline``
wall time since the search first started. Before the driver submits a segment it asks
:meth:`Limits.refuse`: the segment's expected cost comes from the costs of the segments that
finished so far, fitted per budget unit (:class:`~rungway.scheduler.core.estimate.SegmentCosts`,
CPU seconds and wall seconds). A segment is refused when

- **cpu_hours**: the CPU time charged so far, plus the expected cost of every segment already
  submitted, plus its own would be more than the limit. Before any segment has finished no
  cost is known: segments start only while a CPU slot is free for them, so the first wave is
  the only one run blind;
- **deadline**: it would be expected to end after the deadline: it starts when a slot frees
  (its place in the queue, in waves of the slots, times the expected segment time) and runs
  for its expected time.

The first refusal ends the search's run: the driver gives that segment back to the core (an
uncounted requeue, so nothing is lost), starts nothing more, lets what runs finish, and ends
with :meth:`Limits.final` as the reason. A limit already crossed (:meth:`Limits.crossed`) does
the same. At the deadline itself the driver also cancels what has not started yet (no
heartbeat), so a search whose segments cannot run still ends. ``limits.trials`` is the core's
own (it admits no more trials); it is reported here with the others.

What a segment is expected to run: ``target - start`` budget units when the objective resumes
from its checkpoints, ``target`` when it starts from 0 (the plain form). That is learnt from
the first promoted segment that comes back (it loaded a checkpoint or not); until then the
larger figure is assumed.
"""

from __future__ import annotations

from typing import Any

from rungway.scheduler.core.estimate import SegmentCosts

__all__ = ["Limits"]


def _hours(seconds: float) -> str:
    return f"{seconds / 3600:.4g}"


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}h{m:02d}m{s:02d}s" if h else f"{m}m{s:02d}s" if m else f"{s}s"


class Limits:
    """The rules of ``[limits]`` for one search, and the costs they are judged by."""

    def __init__(self, cpu_hours: float | None, deadline: float | None, trials: int | None) -> None:
        self.cpu_limit = None if cpu_hours is None else float(cpu_hours) * 3600.0
        self.cpu_hours = cpu_hours
        self.deadline = deadline
        self.trials = trials
        self.cpu = SegmentCosts()
        self.wall = SegmentCosts()
        self.resumes: bool | None = None  # whether promoted segments start from their checkpoint

    @property
    def any(self) -> bool:
        return self.cpu_limit is not None or self.deadline is not None

    # ---- learning ------------------------------------------------------------------------

    def record(self, start: float, target: float, units: float, cpu: float, wall: float,
               checkpoint: float | None) -> None:
        """A segment from ``start`` to ``target`` finished with its result: it ran ``units``
        budget units (from its checkpoint, or from 0) in ``cpu`` CPU seconds, ``wall`` seconds."""
        self.cpu.record(units, cpu)
        self.wall.record(units, wall)
        if start > 0 and self.resumes is None:
            self.resumes = checkpoint is not None and checkpoint >= start

    def units(self, start: float, target: float) -> float:
        return target - start if self.resumes else target

    # ---- the rules -----------------------------------------------------------------------

    def blind(self) -> bool:
        """A CPU limit and no segment's cost known yet: submit no more than the free slots."""
        return self.cpu_limit is not None and self.cpu.n == 0

    def crossed(self, used_cpu: float, elapsed: float) -> str | None:
        """Why nothing more may start now (a limit is reached), or None."""
        if self.cpu_limit is not None and used_cpu >= self.cpu_limit:
            return f"limits.cpu_hours = {self.cpu_hours:g} reached"
        if self.deadline is not None and elapsed >= self.deadline:
            return f"limits.deadline = {_duration(self.deadline)} reached"
        return None

    def ahead(self, submitted: list[tuple[float, float]]) -> tuple[int, float]:
        """(count, budget units) of segments submitted and not ended, from their (start, target)."""
        return len(submitted), sum(self.units(s, t) for s, t in submitted)

    def refuse(self, start: float, target: float, *, used_cpu: float, ahead: tuple[int, float],
               elapsed: float, slots: int) -> str | None:
        """Why the segment from ``start`` to ``target`` must not start, or None. ``ahead``: the
        count and budget units (:meth:`ahead`) of this search's segments submitted and not ended."""
        crossed = self.crossed(used_cpu, elapsed)
        if crossed:
            return crossed
        count, units = ahead
        if self.cpu_limit is not None:
            mine = self.cpu.expected(self.units(start, target))
            fit = self.cpu.fit()
            if mine is not None and fit is not None:  # else the driver keeps to one wave (``blind``)
                ahead_cpu = count * fit[0] + units * fit[1]  # the fit is linear: sum of expected costs
                if used_cpu + ahead_cpu + mine > self.cpu_limit:
                    return (f"limits.cpu_hours = {self.cpu_hours:g}: {_hours(used_cpu)} CPU-hours used and "
                            f"{_hours(ahead_cpu)} expected of what runs; the next segment (about {mine:.3g} CPU-seconds) "
                            "would cross it")
        if self.deadline is not None:
            mine = self.wall.expected(self.units(start, target))
            if mine is not None:
                waves = count // max(1, slots)
                if elapsed + (waves + 1) * mine > self.deadline:
                    return (f"limits.deadline = {_duration(self.deadline)}: the next segment (about {mine:.3g} s, "
                            f"starting after {waves} wave(s) of what runs) would end after it")
        return None

    # ---- reporting -----------------------------------------------------------------------

    def figures(self, used_cpu: float, reserved: float, elapsed: float, trials: int) -> dict[str, Any]:
        """Each limit that is set, with what was used against it."""
        out: dict[str, Any] = {}
        if self.cpu_limit is not None:
            out["cpu_hours"] = {"limit": self.cpu_hours, "used": used_cpu / 3600, "reserved": reserved / 3600}
        if self.deadline is not None:
            out["deadline"] = {"limit": self.deadline, "elapsed": elapsed}
        if self.trials is not None:
            out["trials"] = {"limit": self.trials, "used": trials}
        return out

    def final(self, why: str, used_cpu: float, reserved: float, elapsed: float) -> str:
        """The message a search ended by a limit ends with: why, and the final figures."""
        parts = []
        if self.cpu_limit is not None:
            parts.append(f"{_hours(used_cpu)} of {self.cpu_hours:g} CPU-hours used "
                         f"({100 * used_cpu / self.cpu_limit:.1f}%; {_hours(reserved)} reserved)")
        if self.deadline is not None:
            parts.append(f"{_duration(elapsed)} of the {_duration(self.deadline)} deadline")
        return f"{why}; the search ended there: {', '.join(parts)}"

    # ---- state ---------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        return {"cpu": _sums(self.cpu), "wall": _sums(self.wall), "resumes": self.resumes}

    def restore(self, state: dict[str, Any] | None) -> None:
        if not state:
            return
        for costs, sums in ((self.cpu, state.get("cpu")), (self.wall, state.get("wall"))):
            if sums and len(sums) == 5:
                costs.n, costs.sx, costs.sy, costs.sxx, costs.sxy = int(sums[0]), *map(float, sums[1:])
                costs._fit = None
        self.resumes = state.get("resumes")


def _sums(costs: SegmentCosts) -> list[float]:
    return [costs.n, costs.sx, costs.sy, costs.sxx, costs.sxy]
