"""A discrete-event simulation of a search on a cluster, driving the real scheduling core.

The simulator owns simulated time and the simulated cluster; the decisions are made by the
very :class:`~rungway.scheduler.core.search.SearchCore` a real search uses. Theory of
operation:

- The cluster is ``workers`` machines of ``cpus_per_worker`` CPUs; each holds
  ``floor(cpus_per_worker / cpus_per_trial)`` *slots* (one segment each). ``quota_cpus`` caps
  how many CPUs run segments at once, i.e. at most ``floor(quota_cpus / cpus_per_trial)``
  segments run whatever the size of the cluster.
- Time advances from event to event, popped from one heap of plain tuples
  ``(time, seq, kind, a, b)``; ``seq`` breaks ties in the order events were scheduled, so a
  run is deterministic given its seed.
- Whenever a slot is free, the core is asked (``core.ask()``): a ``Segment`` starts there
  and its completion is scheduled ``cost(config, start, target, rung)`` seconds later;
  ``Idle`` leaves the slot (and every other free one) waiting until the next event; at
  ``Drained`` the run is over. Asking stops at the first ``Idle``, since asking again before
  anything changes gets ``Idle`` again: each event costs O(1) asks, not O(free slots).
- A completion reports the value model's value (``core.report``). In the stopping form a
  ``Continue`` keeps the slot and schedules the next milestone.
- Node failures: each live worker fails after an exponential time (rate
  ``failure_rate_per_hour``). Its running segments are reported lost (``core.lost``) after
  ``requeue_delay`` seconds (the head noticing), and the worker comes back after
  ``repair_seconds``. A requeued segment runs again from the trial's last saved budget; as
  with the real head, a trial lost more than ``plan.max_losses`` times fails.
- Limits as the real driver applies them (``head/limits.py``): no segment starts whose
  expected cost (fitted per budget unit from the segments finished so far) would take the
  CPU time over ``max_cpu_hours`` or end after ``deadline``; the first one refused is given
  back to the core (an uncounted requeue), nothing more starts and the run ends when what runs
  has finished. CPU time is busy slot time times CPUs per trial times ``cpu_per_reserved``
  (the CPU time an objective uses per CPU-second it reserves; 1 keeps its CPUs busy).
  ``admit_until`` (a simulation knob, not a spec limit) only stops new trials after that many
  simulated seconds; started trials run on.

Nothing here reads a clock or global random state; all randomness comes from generators
spawned from ``seed``.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..core.events import Continue, Drained, Segment
from ..core.plan import SearchPlan
from ..core.samplers.base import Sampler
from ..core.search import SearchCore
from ..head.limits import Limits
from .costs import CostModel, CurveValue, ValueModel

__all__ = ["SimResult", "simulate"]

_DONE, _FAIL, _NOTICE, _REPAIR = 0, 1, 2, 3
_IDLE_SLOT, _BUSY, _DOWN = 0, 1, 2


@dataclass(frozen=True)
class SimResult:
    """What one simulated search did."""

    wall_seconds: float
    """Simulated time from the start to the end (drained, ``until`` or ``max_events``)."""
    cpu_hours: float
    """CPU time: ``reserved_cpu_hours`` times ``cpu_per_reserved`` (work lost to failures included)."""
    reserved_cpu_hours: float
    """Busy slot-seconds times CPUs per trial, in hours (work lost to failures included)."""
    utilization: float
    """Busy slot-time / (slots x wall time); slots of failed workers count as provisioned."""
    slots: int
    """Segments that can run at once (after the quota)."""
    segments: int
    """Segments that ended with a result (a stopping-form segment counts once)."""
    results: int
    """Results reported to the core (one per rung reached)."""
    budget_run: float
    """Budget units run by the pieces that reported (work lost to failures not included; a
    segment of the plain form counts from 0)."""
    lost: int
    """Segments lost to node failures (each was requeued)."""
    failures: int
    """Node failures."""
    decisions: int
    """``core.ask()`` calls."""
    trials: int
    trials_per_rung: tuple[tuple[int, ...], ...]
    """Results per rung per bracket, from ``core.statistics()``."""
    budgets: tuple[tuple[float, ...], ...]
    """The rung budgets of each bracket (same shape as ``trials_per_rung``)."""
    drained: bool
    time_to_target: float | None
    """First simulated time a result at a bracket's top rung was at least as good as
    ``target`` (None when no target was given or none reached it)."""
    leader_value: float | None
    events: int
    statistics: dict[str, Any] = field(repr=False, default_factory=dict)
    """``core.statistics()`` at the end."""
    core: SearchCore | None = field(repr=False, compare=False, default=None)
    """The core itself, for a look at its trials (``core.trials()``)."""
    limit: str | None = None
    """Why a limit stopped the run before it drained (as the head would say), or None."""

    @property
    def segments_per_hour(self) -> float:
        return self.segments * 3600.0 / self.wall_seconds if self.wall_seconds > 0 else 0.0

    @property
    def budget_per_hour(self) -> float:
        return self.budget_run * 3600.0 / self.wall_seconds if self.wall_seconds > 0 else 0.0

    @property
    def rung0_results_per_hour(self) -> float:
        rung0 = sum(b[0] for b in self.trials_per_rung if b)
        return rung0 * 3600.0 / self.wall_seconds if self.wall_seconds > 0 else 0.0

    def to_dict(self) -> dict[str, Any]:
        out = {k: getattr(self, k) for k in self.__dataclass_fields__ if k not in ("statistics", "core")}
        out["trials_per_rung"] = [list(b) for b in self.trials_per_rung]
        out["budgets"] = [list(b) for b in self.budgets]
        out["segments_per_hour"] = self.segments_per_hour
        out["budget_per_hour"] = self.budget_per_hour
        return out


def simulate(
    plan: SearchPlan,
    sampler: Sampler,
    workers: int,
    cost: CostModel,
    *,
    value_model: ValueModel | None = None,
    cpus_per_trial: float = 1,
    cpus_per_worker: float = 1,
    failure_rate_per_hour: float = 0.0,
    requeue_delay: float = 30.0,
    repair_seconds: float = 600.0,
    quota_cpus: float | None = None,
    resumable: bool = True,
    admit_until: float | None = None,
    max_cpu_hours: float | None = None,
    deadline: float | None = None,
    cpu_per_reserved: float = 1.0,
    seed: int = 0,
    target: float | None = None,
    until: float | None = None,
    max_events: int | None = None,
    dispatch_gap: float = 0.0,
) -> SimResult:
    """Run ``plan`` with ``sampler`` on a simulated cluster until the search drains (or
    ``until`` simulated seconds, or ``max_events`` events).

    ``cost`` gives each segment's duration; ``value_model`` what trials report (default
    :class:`CurveValue`; its losses are reported as ``1 - loss`` when the plan maximizes).
    ``resumable=False`` models the plain objective form: every segment trains again from
    budget 0, so it costs ``cost(config, 0, target, rung)``. ``requeue_delay``: seconds from a
    node failure until its segments are reported lost; ``repair_seconds``: until the node is
    back. ``dispatch_gap``: seconds a slot stands empty between a segment's end and the next
    one's start (the head's and Ray's round trip; not CPU time). ``seed`` seeds the cost,
    value and failure draws (the sampler has its own).
    """
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be an integer >= 1 (got {workers!r})")
    if not cpus_per_trial > 0:
        raise ValueError(f"cpus_per_trial must be > 0 (got {cpus_per_trial!r})")
    per_worker = int(math.floor(cpus_per_worker / cpus_per_trial + 1e-9))
    if per_worker < 1:
        raise ValueError(f"a worker with {cpus_per_worker} CPUs cannot hold a trial needing {cpus_per_trial}")
    n_slots = workers * per_worker
    cap = n_slots
    if quota_cpus is not None:
        cap = min(n_slots, int(math.floor(quota_cpus / cpus_per_trial + 1e-9)))
        if cap < 1:
            raise ValueError(f"a quota of {quota_cpus} CPUs cannot run a trial needing {cpus_per_trial}")
    if failure_rate_per_hour < 0 or requeue_delay < 0 or repair_seconds < 0 or not dispatch_gap >= 0:
        raise ValueError("failure_rate_per_hour, requeue_delay, repair_seconds and dispatch_gap must be >= 0")
    if not (cpu_per_reserved >= 0 and math.isfinite(cpu_per_reserved)):
        raise ValueError(f"cpu_per_reserved must be a finite number >= 0 (got {cpu_per_reserved!r})")
    if (not plan.synchronous and plan.max_trials is None and admit_until is None and max_cpu_hours is None
            and deadline is None and until is None and max_events is None):
        raise ValueError(
            "an asynchronous plan without max_trials starts trials for ever: give the plan a "
            "max_trials, or pass admit_until, max_cpu_hours, deadline, until or max_events"
        )

    cost_rng, value_rng, fail_rng = (np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(3))
    cost_fn = cost.bind(cost_rng)
    loss_fn = (value_model or CurveValue()).bind(value_rng, plan)
    maximize = plan.maximize
    top_budget = plan.max_budget
    better = (lambda v: v >= target) if maximize else (lambda v: v <= target)  # noqa: E731

    core = SearchCore(plan, sampler)
    ask, report, lost_fn = core.ask, core.report, core.lost

    # per-slot state, as parallel lists (no per-event objects)
    s_state = [_IDLE_SLOT] * n_slots
    s_token = [0] * n_slots
    s_trial = [0] * n_slots
    s_attempt = [0] * n_slots
    s_rung = [0] * n_slots
    s_config: list[Any] = [None] * n_slots
    s_miles: list[tuple[Any, ...]] = [()] * n_slots
    s_mi = [0] * n_slots
    s_budget = [0.0] * n_slots  # the budget the current piece started from
    s_span: list[tuple[float, float]] = [(0.0, 0.0)] * n_slots  # the segment's (start, target) budgets
    s_since = [0.0] * n_slots  # when the current piece started
    in_pool = [True] * n_slots
    pool = list(range(n_slots - 1, -1, -1))  # free slots on live workers (lazily cleaned)

    heap: list[tuple[float, int, int, int, int]] = []
    push, pop = heapq.heappush, heapq.heappop
    seq = 0
    if failure_rate_per_hour > 0:
        mean_up = 3600.0 / failure_rate_per_hour
        for w, t in enumerate(fail_rng.exponential(mean_up, workers).tolist()):
            heap.append((t, seq, _FAIL, w, 0))
            seq += 1
        heapq.heapify(heap)
    else:
        mean_up = 0.0

    now = 0.0
    running = 0
    busy = 0.0  # slot-seconds of finished pieces (and of pieces lost to failures)
    segments = results = lost = failures = decisions = events = 0
    budget_run = 0.0
    pending_notices = 0
    drained = False
    admitting = True
    tt: float | None = None
    cpu_rate = cpus_per_trial * cpu_per_reserved  # CPU seconds per busy slot-second
    limits = Limits(max_cpu_hours, deadline, None) if max_cpu_hours is not None or deadline is not None else None
    if limits is not None:
        limits.resumes = resumable
    stopped: str | None = None  # why a limit stopped the run
    run_units = 0.0  # budget units the running segments run, as the limits count them

    def start(slot: int, seg: Segment, at: float) -> None:
        nonlocal seq, running, run_units
        miles = seg.milestones
        s_state[slot] = _BUSY
        tok = s_token[slot] + 1
        s_token[slot] = tok
        s_trial[slot] = seg.trial
        s_attempt[slot] = seg.attempt
        s_rung[slot] = seg.rung
        s_config[slot] = seg.config
        s_miles[slot] = miles
        s_mi[slot] = 0
        s_span[slot] = (float(seg.start_budget), float(miles[-1]))
        if limits is not None:
            run_units += limits.units(*s_span[slot])
        begin = seg.start_budget if resumable else 0
        s_budget[slot] = begin
        at += dispatch_gap  # the slot waits for the segment to reach it; that wait is not busy
        s_since[slot] = at
        running += 1
        push(heap, (at + cost_fn(seg.config, begin, miles[0], seg.rung), seq, _DONE, slot, tok))
        seq += 1

    while True:
        # fill free slots until the core has nothing to hand out
        while pool and running < cap and not drained and stopped is None:
            slot = pool.pop()
            in_pool[slot] = False
            if s_state[slot] != _IDLE_SLOT:
                continue  # its worker is down
            out = ask()
            decisions += 1
            if type(out) is Segment:
                why = None if limits is None else limits.refuse(
                    float(out.start_budget), float(out.target_budget), used_cpu=busy * cpu_rate, elapsed=now, slots=cap,
                    ahead=(running, run_units))
                if why is None:
                    start(slot, out, now)
                    continue
                lost_fn(out.trial, out.attempt, False)  # given back, uncounted, as the head does
                stopped = why
                pool.append(slot)
                in_pool[slot] = True
                break
            pool.append(slot)
            in_pool[slot] = True
            if type(out) is Drained:
                drained = True
            elif running == 0 and pending_notices == 0:
                raise RuntimeError(f"the core is idle with nothing running or requeued: {core.statistics()}")
            break
        if drained or not heap or (stopped is not None and running == 0 and pending_notices == 0):
            break
        if max_events is not None and events >= max_events:
            break
        if until is not None and heap[0][0] > until:
            now = until
            break
        now, _, kind, a, b = pop(heap)
        events += 1
        if kind == _DONE:
            slot = a
            if s_token[slot] != b or s_state[slot] != _BUSY:
                continue  # the segment died with its worker
            piece = now - s_since[slot]
            busy += piece
            mi = s_mi[slot]
            miles = s_miles[slot]
            budget = miles[mi]
            if limits is not None:
                limits.record(s_span[slot][0], budget, budget - s_budget[slot], piece * cpu_rate, piece, None)
            rung = s_rung[slot]
            tid = s_trial[slot]
            budget_run += budget - s_budget[slot]
            loss = loss_fn(tid, s_config[slot], budget, rung)
            value = 1.0 - loss if maximize else loss
            verdict = report(tid, s_attempt[slot], rung, value)
            results += 1
            if tt is None and target is not None and budget == top_budget and better(value):
                tt = now
            if type(verdict) is Continue:
                mi += 1
                s_mi[slot] = mi
                s_rung[slot] = verdict.rung
                s_budget[slot] = budget
                s_since[slot] = now
                push(heap, (now + cost_fn(s_config[slot], budget, miles[mi], verdict.rung), seq, _DONE, slot, b))
                seq += 1
                continue
            segments += 1
            running -= 1
            if limits is not None:
                run_units -= limits.units(*s_span[slot])
            s_state[slot] = _IDLE_SLOT
            s_config[slot] = None
            if not in_pool[slot]:
                pool.append(slot)
                in_pool[slot] = True
            if stopped is None and limits is not None:
                stopped = limits.crossed(busy * cpu_rate, now)
        elif kind == _FAIL:
            failures += 1
            first = a * per_worker
            for slot in range(first, first + per_worker):
                if s_state[slot] == _BUSY:
                    busy += now - s_since[slot]
                    running -= 1
                    if limits is not None:
                        run_units -= limits.units(*s_span[slot])
                    push(heap, (now + requeue_delay, seq, _NOTICE, s_trial[slot], s_attempt[slot]))
                    seq += 1
                    pending_notices += 1
                    s_config[slot] = None
                s_state[slot] = _DOWN
            push(heap, (now + repair_seconds, seq, _REPAIR, a, 0))
            seq += 1
        elif kind == _NOTICE:
            pending_notices -= 1
            lost += 1
            lost_fn(a, b)
        else:  # _REPAIR
            first = a * per_worker
            for slot in range(first + per_worker - 1, first - 1, -1):
                s_state[slot] = _IDLE_SLOT
                if not in_pool[slot]:
                    pool.append(slot)
                    in_pool[slot] = True
            push(heap, (now + float(fail_rng.exponential(mean_up)), seq, _FAIL, a, 0))
            seq += 1
        if admitting and admit_until is not None and now >= admit_until:
            core.stop_admitting()
            admitting = False

    # pieces still running at the end (``until`` or ``max_events``) count up to now
    for slot in range(n_slots):
        if s_state[slot] == _BUSY:
            busy += now - s_since[slot]
    stats = core.statistics()
    best = stats["best"]
    wall = now
    return SimResult(
        wall_seconds=wall,
        cpu_hours=busy * cpu_rate / 3600.0,
        reserved_cpu_hours=busy * cpus_per_trial / 3600.0,
        utilization=busy / (cap * wall) if wall > 0 else 0.0,
        slots=cap,
        segments=segments,
        results=results,
        budget_run=budget_run,
        lost=lost,
        failures=failures,
        decisions=decisions,
        trials=len(core),
        trials_per_rung=tuple(tuple(r["results"] for r in b["rungs"]) for b in stats["brackets"]),
        budgets=tuple(tuple(r["budget"] for r in b["rungs"]) for b in stats["brackets"]),
        drained=drained,
        time_to_target=tt,
        leader_value=None if best is None else best["value"],
        events=events,
        statistics=stats,
        core=core,
        limit=stopped,
    )
