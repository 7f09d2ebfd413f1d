"""Run one segment of a trial on a worker: load its checkpoint, run the objective, write
checkpoints and measurements to the store, and only then return a small summary.

Theory of operation. This module is what every worker process executes; the Ray task that
calls it is a three-line wrapper (``rungway.workers.ray_task``). It owns the order of
durable effects: a checkpoint is written atomically before it can be resumed from, and a
segment's measurements are in the store before the head hears of its result, so a head
that accepts a result never accepts one whose measurements could be missing.

User code runs inside a single ``try``: whatever it raises or returns becomes a summary
(``crashed`` with its traceback, or a ``result`` with the reason it is unusable), never an
exception out of the worker; ``SystemExit`` and ``KeyboardInterrupt`` too (with the exit code
in the reason), so the worker process lives on. A worker that dies (``os._exit``, a signal)
is seen only by the head (``head/executor.py``). Storage faults are the exception: they come back as
``storage`` so the head can pause the search instead of blaming the trial.
"""

from __future__ import annotations

import functools
import math
import os
import pickle
import socket
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Literal, Protocol

from .context import Context, TrialCulled
from .cpu import CpuMeter
from .objective import NOT_FINITE, Objective, interpret_result, load_objective

__all__ = ["SegmentOrder", "SegmentSummary", "HeadLink", "run_segment", "node_name", "describe_error"]

Budget = int | float
Outcome = Literal["result", "stopped", "yielded", "crashed", "storage"]


@dataclass(frozen=True, slots=True)
class SegmentOrder:
    """Everything a worker needs to run one segment (small and picklable)."""

    store_root: str
    search: str
    objective: str
    metric: str
    trial: int
    attempt: int
    rung: int
    start_budget: Budget
    target_budget: Budget
    milestones: tuple[Budget, ...]
    config: dict[str, Any]
    integral: bool = True
    stopping: bool = False
    keep_checkpoints: int = 2


@dataclass(slots=True)
class SegmentSummary:
    """What the head learns of a segment; bulk data stays in the store."""

    trial: int
    attempt: int
    rung: int
    outcome: Outcome
    value: float | None = None
    metrics: dict[str, float] = field(default_factory=dict)
    reason: str | None = None
    budget: Budget = 0
    checkpoint_budget: Budget | None = None
    node: str = ""
    started: float = 0.0
    ended: float = 0.0
    """When the segment's last write to the store was done (the worker's clock)."""
    cpu_seconds: float = 0.0
    """CPU time of the objective's threads and child processes, checkpoint and measurement
    I/O included (``workers/cpu.py``); on a worker process's first segment, its start-up too."""
    startup_cpu_seconds: float = 0.0
    """Of ``cpu_seconds``: what the worker process used before its first segment."""
    error_type: str | None = None
    traceback: str | None = None
    skipped_checkpoints: list[str] = field(default_factory=list)
    final_rows: list[dict[str, Any]] = field(default_factory=list)
    """The rung result's measurement rows (promotion form): the head writes those of many
    segments as one part file, before it accepts any of their results."""


class HeadLink(Protocol):
    """The worker's line to the head while a segment runs (a Ray actor in production)."""

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> bool:
        """A rung result in the stopping form; True to run on, False to stop. Waits for the
        head's verdict, but never in a blocking Ray call (which would lend the task's CPU to
        a queued segment: see workers/link.py)."""
        ...

    def asked_to_yield(self, trial: int, attempt: int) -> bool:
        """Whether the head asks the segment to yield: a local read (the production link's
        beat thread brings the answer), never a blocking call to the head."""
        ...

    def beat(self, trial: int, attempt: int, budget: Budget) -> None: ...


def node_name() -> str:
    return os.environ.get("RUNGWAY_NODE") or socket.gethostname()


@functools.lru_cache(maxsize=64)
def _objective(path: str) -> Objective:
    return load_objective(path)


@functools.lru_cache(maxsize=8)
def _files(store_root: str, search: str):  # type: ignore[no-untyped-def]
    from rungway.scheduler.store import Store

    return Store(store_root).search(search)


def _utc(ts: float) -> datetime:
    return datetime.fromtimestamp(ts, tz=timezone.utc)


def _as_budget(value: float, integral: bool) -> Budget:
    return int(round(value)) if integral else float(value)


def run_segment(
    order: SegmentOrder,
    link: HeadLink | None = None,
    *,
    node: str | None = None,
    clock: Callable[[], float] = time.time,
    yield_poll_seconds: float = 0.0,
    charge_startup: bool = False,
) -> SegmentSummary:
    """Run ``order`` to its target budget and return what happened. ``node`` names the
    machine in the measurements (default: $RUNGWAY_NODE or the host name).
    ``charge_startup``: this process is a worker started for segments, whose first segment
    is charged the CPU the process used before it (``workers/cpu.py``)."""
    from rungway.scheduler.store import StorageError

    started = clock()
    cpu_start = CpuMeter(startup=charge_startup)
    node = node or node_name()
    summary = SegmentSummary(order.trial, order.attempt, order.rung, "crashed", node=node, started=started)
    try:
        files = _files(order.store_root, order.search)
        objective = _objective(order.objective)
        state, start = None, 0
        if objective.form == "resumable":
            loaded = files.load_checkpoint(order.trial)
            if loaded is not None:
                state = pickle.loads(loaded.data)
                start = _as_budget(loaded.info.budget, order.integral)
                summary.checkpoint_budget = start
            if loaded is not None and loaded.skipped:
                summary.skipped_checkpoints = [f"{path}: {why}" for path, why in loaded.skipped]
            if loaded is None and order.start_budget:
                summary.skipped_checkpoints = [
                    f"trial {order.trial} had no readable checkpoint: restarted from budget 0 instead of "
                    f"{order.start_budget} (either its objective had not called ctx.save by then, or its checkpoints "
                    "are damaged: the store's warnings name any damaged file)"
                ]
    except StorageError as exc:
        return _storage_fault(summary, exc, clock, cpu_start)
    except Exception as exc:  # the objective does not import on this worker, or its state does not unpickle
        return _crash(summary, exc, clock, cpu_start)
    except BaseException as exc:  # its module calls sys.exit() on import, say: the trial's crash
        return _crash(summary, exc, clock, cpu_start)

    rows: list[dict[str, Any]] = []  # reports not yet written
    rung_results: list[int] = []  # stopping form: rungs whose results were posted
    written = [0]  # rows already written this segment, so that seq keeps counting
    next_rung = [order.rung]
    last_poll = [0.0, False]

    def save(obj: Any, budget: Budget) -> None:
        files.save_checkpoint(order.trial, float(budget), order.attempt, pickle.dumps(obj, protocol=5))
        summary.checkpoint_budget = budget
        files.prune_checkpoints(order.trial, keep=order.keep_checkpoints)

    def report(budget: Budget, metrics: dict[str, float], at_milestone: bool) -> bool:
        now = clock()
        rows.extend(_rows(order, next_rung[0], written[0] + len(rows), budget, metrics, False, node, started, now))
        if link is not None:
            link.beat(order.trial, order.attempt, budget)
        if not (order.stopping and at_milestone):
            return True
        value = metrics.get(order.metric, math.nan)
        rung = next_rung[0]
        next_rung[0] += 1
        # Stopping form: the rung's rows are in the store before the head hears of the result.
        rows.extend(_rows(order, rung, written[0] + len(rows), budget, metrics, True, node, started, now))
        files.write_measurements(rows)
        written[0] += len(rows)
        rows.clear()
        rung_results.append(rung)
        if link is None:
            return True
        return link.milestone(order.trial, order.attempt, rung, value)

    def yield_flag() -> bool:
        if link is None:
            return False
        if last_poll[1]:  # a request to yield is never withdrawn: once seen, reused
            return True
        now = clock()
        if now - last_poll[0] >= yield_poll_seconds:
            last_poll[0], last_poll[1] = now, link.asked_to_yield(order.trial, order.attempt)
        return bool(last_poll[1])

    ctx = Context(
        config=order.config, budget=order.target_budget, start=start, state=state, trial=order.trial,
        attempt=order.attempt, rung=order.rung, milestones=order.milestones if order.stopping else (),
        save=save, report=report, yield_flag=yield_flag,
    )
    try:
        if objective.form == "plain":
            returned = objective.fn(dict(order.config), order.target_budget)
        else:
            returned = objective.fn(ctx)
    except TrialCulled:
        summary.outcome = "stopped"
        returned = _STOPPED
    except StorageError as exc:
        return _storage_fault(summary, exc, clock, cpu_start)
    except Exception as exc:
        _write_rows(files, rows, summary)
        return _crash(summary, exc, clock, cpu_start)
    except BaseException as exc:  # SystemExit, KeyboardInterrupt: the worker lives on; the trial crashed
        _write_rows(files, rows, summary)
        return _crash(summary, exc, clock, cpu_start)

    ended = clock()
    summary.ended = ended
    if returned is _STOPPED:
        summary.budget = ctx.measurements[-1][0] if ctx.measurements else start
    elif objective.form == "resumable" and _short_of_target(ctx, order) and ctx.asked_to_yield:
        # Asked only when it could matter (a cheap local read, but a fake link may count it).
        summary.outcome = "yielded"
        summary.budget = ctx.saved_budget if ctx.saved_budget is not None else start
    else:
        last = ctx.measurements[-1][1] if ctx.measurements else None
        value, metrics, reason = interpret_result(returned, order.metric, last)
        summary.outcome, summary.value, summary.metrics, summary.reason = "result", value, metrics, reason
        summary.budget = order.target_budget
        if order.stopping:
            final_rung = order.rung + len(order.milestones) - 1
            if not rung_results or rung_results[-1] != final_rung:  # returned without reporting the top
                rows.extend(_rows(order, final_rung, written[0] + len(rows), order.target_budget, metrics, True, node, started, ended))
        else:
            summary.final_rows = _rows(order, order.rung, written[0] + len(rows), order.target_budget, metrics, True, node, started, ended)
    try:
        _write_rows(files, rows, summary)
        if summary.reason and summary.reason != NOT_FINITE:
            files.record_failure(order.trial, order.rung, order.attempt, "BadResult", summary.reason, "", node)
    except StorageError as exc:
        return _storage_fault(summary, exc, clock, cpu_start)
    summary.ended = max(ended, clock())  # the writes are the segment's too
    _charge(summary, cpu_start)
    return summary


_STOPPED = object()


def _short_of_target(ctx: Context, order: SegmentOrder) -> bool:
    reached = ctx.measurements[-1][0] if ctx.measurements else ctx.start
    return reached < order.target_budget


def _rows(
    order: SegmentOrder, rung: int, seq0: int, budget: Budget, metrics: dict[str, float], final: bool,
    node: str, started: float, ended: float,
) -> list[dict[str, Any]]:
    return [
        {
            "trial": order.trial, "rung": rung, "attempt": order.attempt, "seq": seq0 + i,
            "budget": float(budget), "metric": name, "value": float(value), "final": final,
            "node": node, "started_at": _utc(started), "ended_at": _utc(ended),
        }
        for i, (name, value) in enumerate(sorted(metrics.items()))
    ]


def _write_rows(files: Any, rows: list[dict[str, Any]], summary: SegmentSummary) -> None:
    if rows:
        files.write_measurements(rows)


def describe_error(exc: BaseException) -> str:
    """One line for a failure record: the exception's type and message, and for
    ``SystemExit`` the exit status the process would have ended with."""
    name = type(exc).__name__
    if isinstance(exc, SystemExit):
        code = exc.code
        if code is None or isinstance(code, int):
            return f"{name}: the objective exited with exit code {code or 0}"
        return f"{name}: the objective exited with exit code 1: {code}"  # sys.exit("message")
    if isinstance(exc, KeyboardInterrupt):
        return f"{name}: the objective raised KeyboardInterrupt" + (f": {exc}" if str(exc) else "")
    return f"{name}: {exc}"


def _charge(summary: SegmentSummary, cpu: CpuMeter) -> None:
    summary.cpu_seconds = cpu.seconds()
    summary.startup_cpu_seconds = cpu.startup_seconds


def _crash(summary: SegmentSummary, exc: BaseException, clock: Callable[[], float], cpu_start: CpuMeter) -> SegmentSummary:
    summary.outcome = "crashed"
    summary.error_type = type(exc).__name__
    summary.reason = describe_error(exc)
    summary.traceback = traceback.format_exc()
    summary.ended = clock()
    _charge(summary, cpu_start)
    return summary


def _storage_fault(summary: SegmentSummary, exc: BaseException, clock: Callable[[], float], cpu_start: CpuMeter) -> SegmentSummary:
    _crash(summary, exc, clock, cpu_start)
    summary.outcome = "storage"
    return summary
