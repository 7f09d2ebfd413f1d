"""Planning a search before running it: repeated simulations of a spec file's search.

:func:`plan_search` simulates the spec's search ``repeats`` times on the given cluster, each
with its own seed (sampler, costs, values and failures all change with it), and reports the
median and the 10th-90th percentile interval of wall time, CPU-hours (CPU time, what
``limits.cpu_hours`` counts), reserved CPU-hours (CPUs held times wall time), utilization,
segments and the number of results at every rung of every bracket. CPU time is the
reservation times the CPU time the objective uses per CPU-second it reserves: 1 unless told
(``cpu_per_reserved``; ``rungway plan --from-search`` takes the finished search's own ratio).

The cost model decides everything about time. Without one, the planner uses
:data:`DEFAULT_SECONDS_PER_UNIT` seconds per budget unit and no per-segment overhead -- a
placeholder, not a measurement -- and says so in its report. ``fitted_from`` fits the cost to
a finished search's measurements instead (see :class:`~.costs.FittedCost`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from ..core.errors import SpecError
from ..core.plan import bracket_name
from .cluster import SimResult, simulate
from .costs import CostModel, FittedCost, LinearCost, ValueModel, dispatch_gap_from_measurements

__all__ = [
    "DEFAULT_OVERHEAD_SECONDS",
    "DEFAULT_SECONDS_PER_UNIT",
    "QUANTILES",
    "Interval",
    "PlanEstimate",
    "plan_search",
]

DEFAULT_SECONDS_PER_UNIT = 60.0
"""The cost the planner assumes when given none: one minute per budget unit..."""
DEFAULT_OVERHEAD_SECONDS = 0.0
"""...and no per-segment start-up time. A placeholder: pass a cost or measurements."""

QUANTILES = (0.1, 0.9)
"""The interval the planner reports: 10th to 90th percentile over the repeats."""


@dataclass(frozen=True)
class Interval:
    """The median of a figure over the repeats and its 10th-90th percentile interval."""

    median: float
    low: float
    high: float

    @classmethod
    def of(cls, values: Sequence[float]) -> Interval:
        arr = np.asarray(values, dtype=float)
        low, high = np.quantile(arr, QUANTILES)
        return cls(float(np.median(arr)), float(low), float(high))

    def contains(self, x: float) -> bool:
        return self.low <= x <= self.high

    def to_dict(self) -> dict[str, float]:
        return {"median": self.median, "low": self.low, "high": self.high}


@dataclass(frozen=True)
class PlanEstimate:
    """What :func:`plan_search` expects of a search on a cluster."""

    search: str
    mode: str
    unit: str
    workers: int
    cpus_per_worker: float
    cpus_per_trial: float
    quota_cpus: float | None
    slots: int
    repeats: int
    seed: int
    cost: str
    """The cost model in words."""
    cost_is_default: bool
    resumable: bool
    failure_rate_per_hour: float
    wall_seconds: Interval
    cpu_hours: Interval
    """CPU time, in hours (what limits.cpu_hours counts)."""
    reserved_cpu_hours: Interval
    """CPUs reserved times wall time, in hours."""
    utilization: Interval
    segments: Interval
    lost: Interval
    """Segments lost to node failures (and run again)."""
    trials: Interval
    trials_per_rung: tuple[tuple[Interval, ...], ...]
    """Results per rung per bracket."""
    budgets: tuple[tuple[float, ...], ...]
    drained: int
    """How many of the repeats drained or were ended by a limit (the rest hit the event guard)."""
    notes: tuple[str, ...] = ()
    runs: tuple[SimResult, ...] = field(default=(), repr=False)
    cpu_per_reserved: float = 1.0
    """CPU time the objective uses per CPU-second it reserves, as simulated."""

    def to_dict(self) -> dict[str, Any]:
        return {
            "search": self.search, "mode": self.mode, "unit": self.unit, "workers": self.workers,
            "cpus_per_worker": self.cpus_per_worker, "cpus_per_trial": self.cpus_per_trial,
            "quota_cpus": self.quota_cpus, "slots": self.slots, "repeats": self.repeats, "seed": self.seed,
            "interval": f"{int(QUANTILES[0] * 100)}th-{int(QUANTILES[1] * 100)}th percentile",
            "cost": self.cost, "cost_is_default": self.cost_is_default, "resumable": self.resumable,
            "wall_seconds": self.wall_seconds.to_dict(), "cpu_hours": self.cpu_hours.to_dict(),
            "reserved_cpu_hours": self.reserved_cpu_hours.to_dict(), "cpu_per_reserved": self.cpu_per_reserved,
            "utilization": self.utilization.to_dict(), "segments": self.segments.to_dict(),
            "lost": self.lost.to_dict(), "failure_rate_per_hour": self.failure_rate_per_hour,
            "trials": self.trials.to_dict(),
            "brackets": [
                {"s": s, **({"iteration": iteration} if iteration is not None else {}),
                 "rungs": [{"budget": b, **iv.to_dict()} for b, iv in zip(budgets, rungs, strict=True)]}
                for (s, iteration), budgets, rungs in zip(
                    self.bracket_labels(), self.budgets, self.trials_per_rung, strict=True)
            ],
            "drained": self.drained, "notes": list(self.notes),
        }

    def bracket_labels(self) -> list[tuple[int, int | None]]:
        """(s, iteration) of each bracket, as ``core.statistics()`` names them: s is Li et al.'s
        (the bracket's rungs minus one; s = s_max starts at the minimum budget), the iteration
        (from 1) is given only when ``sync-hyperband`` repeats its brackets."""
        ss = [len(budgets) - 1 for budgets in self.budgets]
        repeated = len(set(ss)) < len(ss)
        seen: dict[int, int] = {}
        out: list[tuple[int, int | None]] = []
        for s in ss:
            seen[s] = seen.get(s, 0) + 1
            out.append((s, seen[s] if repeated else None))
        return out

    def format(self) -> str:
        """The report ``rungway plan`` prints."""
        lo, hi = (int(q * 100) for q in QUANTILES)
        quota = f", quota {self.quota_cpus:g} CPUs" if self.quota_cpus is not None else ""
        lines = [
            f"plan for {self.search}: mode {self.mode}, {self.workers} worker(s) x {self.cpus_per_worker:g} CPU(s), "
            f"{self.cpus_per_trial:g} CPU(s) per trial{quota}: {self.slots} segment(s) at once",
            f"cost model: {self.cost}" + ("  [DEFAULT: not measured; pass --seconds-per-unit or --from-search]"
                                           if self.cost_is_default else ""),
            f"{self.repeats} simulated run(s), seeds {self.seed}..{self.seed + self.repeats - 1}; "
            f"median [{lo}th - {hi}th percentile]:",
            f"  wall time    {_duration(self.wall_seconds.median)}  [{_duration(self.wall_seconds.low)} - {_duration(self.wall_seconds.high)}]",
            f"  CPU-hours    {_num(self.cpu_hours.median)}  [{_num(self.cpu_hours.low)} - {_num(self.cpu_hours.high)}]"
            f"  (CPU time: {self.cpu_per_reserved:.3g} CPU-second per CPU-second reserved)",
            f"  reserved     {_num(self.reserved_cpu_hours.median)}  [{_num(self.reserved_cpu_hours.low)} - "
            f"{_num(self.reserved_cpu_hours.high)}]  (CPU-hours held: CPUs x wall time)",
            f"  utilization  {self.utilization.median:.1%}  [{self.utilization.low:.1%} - {self.utilization.high:.1%}]",
            f"  segments     {_num(self.segments.median)}  [{_num(self.segments.low)} - {_num(self.segments.high)}]",
            *([f"  lost         {_num(self.lost.median)}  [{_num(self.lost.low)} - {_num(self.lost.high)}]"
               f"  (segments lost to node failures and run again)"] if self.failure_rate_per_hour > 0 else []),
            f"  trials       {_num(self.trials.median)}  [{_num(self.trials.low)} - {_num(self.trials.high)}]",
            "  results per rung:",
        ]
        many = len(self.budgets) > 1
        for (s, iteration), budgets, rungs in zip(self.bracket_labels(), self.budgets, self.trials_per_rung, strict=True):
            head = f"    {bracket_name(s, iteration)}: " if many else "    "
            cells = [f"{self.unit} {b:g}: {_num(iv.median)} [{_num(iv.low)}-{_num(iv.high)}]" for b, iv in zip(budgets, rungs, strict=True)]
            lines.append(head + " | ".join(cells))
        if self.drained < self.repeats:
            lines.append(f"  {self.repeats - self.drained} run(s) did not drain within the event guard")
        lines.extend(f"note: {n}" for n in self.notes)
        return "\n".join(lines)


def _num(x: float) -> str:
    if x == int(x) and abs(x) < 1e15:
        return f"{int(x)}"
    return f"{x:.3g}" if abs(x) < 1000 else f"{x:,.0f}"


def _duration(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "inf"
    if seconds < 60:
        return f"{seconds:.1f}s"
    minutes, s = divmod(int(round(seconds)), 60)
    hours, m = divmod(minutes, 60)
    days, h = divmod(hours, 24)
    if days:
        return f"{days}d{h:02d}h{m:02d}m"
    if hours:
        return f"{hours}h{m:02d}m"
    return f"{m}m{s:02d}s"


def _objective_resumable(spec: Any) -> tuple[bool, str | None]:
    from rungway.workers.objective import load_objective

    try:
        form = load_objective(spec.objective).form
    except SpecError as exc:
        return True, f"could not import the objective to see its form ({exc}); assumed resumable (segments resume from checkpoints)"
    return form == "resumable", None


def plan_search(
    spec: Any,
    workers: int,
    cpus_per_worker: float = 1,
    quota_cpus: float | None = None,
    cost: CostModel | None = None,
    fitted_from: Any = None,
    repeats: int = 20,
    seed: int = 0,
    *,
    failure_rate_per_hour: float = 0.0,
    requeue_delay: float = 30.0,
    repair_seconds: float = 600.0,
    resumable: bool | None = None,
    value_model: ValueModel | None = None,
    max_events: int = 50_000_000,
    dispatch_gap: float | None = None,
    cpu_per_reserved: float | None = None,
) -> PlanEstimate:
    """Simulate ``spec``'s search ``repeats`` times on ``workers`` workers; see the module doc.

    ``spec`` is a :class:`~rungway.scheduler.spec.SearchSpec`. ``fitted_from`` is a
    measurements frame (``SearchFiles.read_measurements()``) or anything with a
    ``read_measurements()`` method; it is used when ``cost`` is None. ``resumable`` (None:
    look at the objective's form) says whether promoted segments resume from a checkpoint or
    train again from budget 0. ``dispatch_gap`` (None: fitted with the costs, else 0) is how
    long a slot stands empty between segments. ``cpu_per_reserved`` (None: 1, an objective
    that keeps its CPUs busy) is the CPU time the objective uses per CPU-second it reserves.
    Run ``r`` uses seed ``seed + r`` for everything random.
    """
    if isinstance(repeats, bool) or not isinstance(repeats, int) or repeats < 1:
        raise SpecError(f"must be an integer >= 1 (got {repeats!r})", field="repeats")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise SpecError(f"must be an integer >= 1 (got {workers!r})", field="workers")
    plan = spec.plan()
    cpus_per_trial = float(spec.resources.cpus)
    if cpus_per_worker + 1e-9 < cpus_per_trial:
        raise SpecError(
            f"a worker with {cpus_per_worker:g} CPU(s) cannot run a trial that needs {cpus_per_trial:g} "
            "(resources.cpus); raise --cpus-per-worker", field="cpus_per_worker")
    if quota_cpus is not None and quota_cpus + 1e-9 < cpus_per_trial:
        raise SpecError(f"a quota of {quota_cpus:g} CPU(s) cannot run a trial that needs {cpus_per_trial:g}",
                        field="quota_cpus")
    deadline, cpu_limit = spec.deadline_seconds, spec.limits.cpu_hours
    if not plan.synchronous and plan.max_trials is None and deadline is None and cpu_limit is None:
        raise SpecError(
            f"mode {plan.mode!r} starts new trials until a limit stops it, and this spec sets none: "
            "set limits.trials (or limits.deadline / limits.cpu_hours) to plan it",
            field="limits.trials")
    notes: list[str] = []
    is_default = False
    if cost is None and fitted_from is not None:
        frame = fitted_from.read_measurements() if hasattr(fitted_from, "read_measurements") else fitted_from
        if resumable is None:
            resumable, note = _objective_resumable(spec)
            if note:
                notes.append(note)
        try:
            cost = FittedCost.from_measurements(frame, from_scratch=not resumable)
        except ValueError as exc:
            raise SpecError(f"cannot fit a cost model to those measurements: {exc}", field="from_search") from None
        if dispatch_gap is None:
            dispatch_gap = dispatch_gap_from_measurements(frame)
            notes.append(f"between segments a slot waited {dispatch_gap * 1e3:.3g} ms (median) for the next one "
                         "in the search fitted from; simulated so too")
    dispatch_gap = dispatch_gap or 0.0
    if cost is None:
        cost = LinearCost(DEFAULT_SECONDS_PER_UNIT, DEFAULT_OVERHEAD_SECONDS)
        is_default = True
        notes.append(
            f"the cost model is the planner's default ({DEFAULT_SECONDS_PER_UNIT:g} s per budget unit, "
            f"{DEFAULT_OVERHEAD_SECONDS:g} s per segment), not a measurement: times scale with it")
    if resumable is None:
        resumable, note = _objective_resumable(spec)
        if note:
            notes.append(note)
    if not resumable:
        notes.append("the objective has the plain form: every promoted segment trains again from budget 0")
    if cpu_per_reserved is None:
        cpu_per_reserved = 1.0
        if cpu_limit is not None:
            notes.append("CPU time assumed equal to the CPUs reserved times wall time (an objective that keeps "
                         "its CPUs busy); --from-search takes a finished search's own ratio")
    if deadline is not None:
        notes.append(f"limits.deadline ({deadline:g} s): as in the head, no segment starts that is expected to end "
                     "after it, and the run ends when what runs has finished")
    if cpu_limit is not None:
        notes.append(f"limits.cpu_hours ({cpu_limit:g}, CPU time): as in the head, no segment starts whose expected "
                     "CPU time would cross it, and the run ends when what runs has finished")
    if failure_rate_per_hour > 0:
        notes.append(
            f"node failures: {failure_rate_per_hour:g} per worker per hour; a lost segment is requeued "
            f"{requeue_delay:g} s later and runs again (from the trial's last result, or from 0 for the plain "
            f"form; a trial lost more than limits.max_losses times fails); a node is back after "
            f"{repair_seconds:g} s")
    if spec.sampler.kind != "random":
        notes.append(f"the {spec.sampler.kind} sampler runs for real, on simulated results")

    runs = []
    for r in range(repeats):
        run_seed = seed + r
        sampler = spec.make_sampler(np.random.default_rng(run_seed))
        runs.append(replace(simulate(
            plan, sampler, workers, cost, value_model=value_model, cpus_per_trial=cpus_per_trial,
            cpus_per_worker=cpus_per_worker, failure_rate_per_hour=failure_rate_per_hour,
            requeue_delay=requeue_delay, repair_seconds=repair_seconds,
            quota_cpus=quota_cpus, resumable=resumable, deadline=deadline, max_cpu_hours=cpu_limit,
            cpu_per_reserved=cpu_per_reserved,
            seed=run_seed, max_events=max_events, dispatch_gap=dispatch_gap,
        ), core=None))
    shapes = {tuple(len(b) for b in run.trials_per_rung) for run in runs}
    assert len(shapes) == 1, shapes
    per_rung = tuple(
        tuple(Interval.of([run.trials_per_rung[bi][k] for run in runs]) for k in range(len(budgets)))
        for bi, budgets in enumerate(runs[0].budgets)
    )
    return PlanEstimate(
        search=spec.name, mode=plan.mode, unit=spec.ladder.unit, workers=workers,
        cpus_per_worker=float(cpus_per_worker), cpus_per_trial=cpus_per_trial,
        quota_cpus=None if quota_cpus is None else float(quota_cpus), slots=runs[0].slots,
        repeats=repeats, seed=seed, cost=cost.describe(spec.ladder.unit), cost_is_default=is_default,
        resumable=bool(resumable), failure_rate_per_hour=float(failure_rate_per_hour),
        wall_seconds=Interval.of([r.wall_seconds for r in runs]),
        cpu_hours=Interval.of([r.cpu_hours for r in runs]),
        reserved_cpu_hours=Interval.of([r.reserved_cpu_hours for r in runs]),
        utilization=Interval.of([r.utilization for r in runs]),
        segments=Interval.of([r.segments for r in runs]),
        lost=Interval.of([r.lost for r in runs]),
        trials=Interval.of([r.trials for r in runs]),
        trials_per_rung=per_rung, budgets=runs[0].budgets,
        drained=sum(r.drained or r.limit is not None for r in runs), notes=tuple(notes), runs=tuple(runs),
        cpu_per_reserved=float(cpu_per_reserved),
    )
