"""The head's loop for one search: the core decides, the executor runs, the store keeps.

Theory of operation. The driver asks the core for work whenever a slot is free, submits each
segment to the executor, and turns every completion into exactly one core event (a result,
a loss, a crash). It owns the search's wall-clock limits, the periodic writes of the trials
table and of the core's snapshot, and the progress callback. The core never learns about
time, Ray or files; the executor never learns about ladders.

Resuming: the snapshot in the store is restored, and every segment that was running when
the head stopped is requeued (its worker's result, if it ever comes, is refused as stale).
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from rungway.scheduler.core.errors import RejectedEvent, SpecError
from rungway.scheduler.core.estimate import planned_budget
from rungway.scheduler.core.events import Continue, Drained, Failed, Segment
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.spec import SearchSpec
from rungway.workers.runner import SegmentOrder, SegmentSummary

from .executor import Completion, Executor

__all__ = ["SearchDriver", "RunReport", "HEAD_STATE"]

log = logging.getLogger("rungway.head")

HEAD_STATE = "head-state.json"


@dataclass
class RunReport:
    """How a run of the driver ended."""

    finished: bool
    interrupted: bool = False
    paused_reason: str | None = None
    elapsed: float = 0.0
    segments: int = 0
    statistics: dict[str, Any] = field(default_factory=dict)


@dataclass(slots=True)
class _Running:
    trial: int
    attempt: int
    rung: int
    start_budget: float
    target_budget: float
    submitted: float


class SearchDriver:
    """Runs one search until it drains, hits a limit, is interrupted or meets a storage fault."""

    def __init__(
        self,
        spec: SearchSpec,
        spec_text: str,
        store_root: str,
        executor: Executor,
        *,
        progress: Callable[[dict[str, Any]], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        persist_seconds: float = 5.0,
        progress_seconds: float = 0.5,
        prefetch: float = 1.0,
        flush_seconds: float = 0.05,
    ) -> None:
        from rungway.scheduler.store import Store

        self.spec = spec
        self.spec_text = spec_text
        self.store_root = store_root
        self.files = Store(store_root).search(spec.name)
        self.executor = executor
        self.progress = progress
        self.clock = clock
        self.persist_seconds = persist_seconds
        self.progress_seconds = progress_seconds
        # Segments submitted beyond the free slots, as a fraction of the slots: Ray queues them
        # and starts one the moment a slot frees, so no slot waits for a round trip to the head.
        self.prefetch = prefetch
        # Finished segments' results are gathered for up to this long and written as one file.
        self.flush_seconds = flush_seconds
        self.plan = spec.plan()
        self.core = self._restore_or_start()
        self.running: dict[tuple[int, int], _Running] = {}
        self.budget_done = self._meta.get("budget_done", 0.0)
        self.cpu_seconds = self._meta.get("cpu_seconds", 0.0)
        self.elapsed_before = self._meta.get("elapsed", 0.0)
        self.segments = self._meta.get("segments", 0)
        self.planned = planned_budget(self.plan)

    # ---- state in the store ------------------------------------------------------------

    def _restore_or_start(self) -> SearchCore:
        stored_spec = self.files.read_spec()
        sampler = self.spec.make_sampler(np.random.default_rng(self.spec.seed))
        state = self.files.read_head_state(HEAD_STATE)
        self._meta: dict[str, Any] = {}
        if stored_spec is not None and stored_spec != self.spec_text:
            raise SpecError(
                f"a search named {self.spec.name!r} already exists in {self.store_root} with a different "
                "spec; give this one another name (or delete the old search's folder)",
                field="name",
            )
        if state is None:
            self.files.write_spec(self.spec_text)
            return SearchCore(self.plan, sampler)
        data = json.loads(state)
        self._meta = data.get("meta", {})
        core = SearchCore.restore(data["core"], sampler)
        for view in core.trials():
            if view.state == "active":  # its worker belonged to the previous head
                core.lost(view.id, view.attempt)
        return core

    def persist(self) -> None:
        """Write the core's snapshot and the trials table (both atomically)."""
        meta = {
            "budget_done": self.budget_done,
            "cpu_seconds": self.cpu_seconds,
            "elapsed": self.elapsed,
            "segments": self.segments,
        }
        payload = json.dumps({"meta": meta, "core": self.core.snapshot()}, separators=(",", ":"))
        self.files.write_head_state(HEAD_STATE, payload)
        self.write_trials()

    def write_trials(self) -> None:
        rows = []
        for t in self.core.trials():
            rows.append(
                {
                    "trial": t.id,
                    "status": t.state,
                    "rung": t.rung,
                    "budget_reached": float(t.budget),
                    "best_value": math.nan if t.loss is None else self.core.value_of(t.loss),
                    "attempts": t.attempt,
                    "failures": t.crashes,
                    "params": t.config,
                }
            )
        self.files.write_trials(rows, self.spec.space().names)

    # ---- the loop -------------------------------------------------------------------------

    @property
    def elapsed(self) -> float:
        return self.elapsed_before + (self.clock() - self._started if hasattr(self, "_started") else 0.0)

    def run(self, should_stop: Callable[[], bool] = lambda: False) -> RunReport:
        self._started = self.clock()
        last_persist = last_progress = self._started
        report = RunReport(finished=False)
        drained = False
        pending: list[Completion] = []  # finished segments whose results wait for the next write
        pending_since: float | None = None
        try:
            while True:
                if should_stop():
                    report.interrupted = True
                    break
                self._check_limits()
                drained = self._fill() or drained
                if drained and not self.running and not pending:
                    report.finished = True
                    break
                pending.extend(self.executor.wait(timeout=0.02 if self.running else 0.0))
                now = self.clock()
                if pending and pending_since is None:
                    pending_since = now
                if pending and (
                    now - pending_since >= self.flush_seconds  # type: ignore[operator]
                    or len(pending) >= 256
                    or self.executor.in_flight() == 0
                ):
                    # One part file for the rung results gathered, written before any is accepted.
                    self._write_final_rows(pending)
                    for completion in pending:
                        reason = self._complete(completion)
                        if reason:
                            report.paused_reason = reason
                    pending, pending_since = [], None
                if self.plan.stopping:
                    self._relay_milestones()
                if report.paused_reason:
                    break
                now = self.clock()
                if self.progress is not None and now - last_progress >= self.progress_seconds:
                    self.progress(self.statistics())
                    last_progress = now
                if now - last_persist >= self.persist_seconds:
                    self.persist()
                    self.files.compact_measurements(min_parts=64)
                    last_persist = now
        finally:
            if pending:  # results already in hand are kept, not redone
                self._write_final_rows(pending)
                for completion in pending:
                    self._complete(completion)
            self._stop_running()
            self.persist()
            self.files.compact_measurements(min_parts=2)
        report.elapsed = self.elapsed
        report.segments = self.segments
        report.statistics = self.statistics()
        if self.progress is not None:
            self.progress(report.statistics)
        return report

    def _slots(self) -> int:
        """Segments to keep submitted: every slot of the cluster, plus the prefetch."""
        cpus = self.spec.resources.cpus
        capacity = self.executor.capacity()
        if capacity < cpus:
            return 0
        slots = int(capacity // cpus)
        return slots + (max(1, int(slots * self.prefetch)) if self.prefetch > 0 else 0)

    def _fill(self) -> bool:
        """Submit segments while slots are free; True once the core says the search drained."""
        free = self._slots() - self.executor.in_flight()
        while free > 0:
            out = self.core.ask()
            if isinstance(out, Drained):
                return True
            if not isinstance(out, Segment):
                return False
            self._submit(out)
            free -= 1
        return False

    def _submit(self, seg: Segment) -> None:
        order = SegmentOrder(
            store_root=self.store_root,
            search=self.spec.name,
            objective=self.spec.objective,
            metric=self.spec.metric,
            trial=seg.trial,
            attempt=seg.attempt,
            rung=seg.rung,
            start_budget=seg.start_budget,
            target_budget=seg.target_budget,
            milestones=seg.milestones,
            config=seg.config,
            integral=isinstance(self.plan.min_budget, int) and isinstance(self.plan.max_budget, int),
            stopping=self.plan.stopping,
        )
        self.running[(seg.trial, seg.attempt)] = _Running(
            seg.trial, seg.attempt, seg.rung, float(seg.start_budget), float(seg.target_budget), self.clock()
        )
        self.executor.submit(order, self.spec.resources.cpus, self.spec.resources.memory_mb)

    def _write_final_rows(self, completions: list[Completion]) -> None:
        rows = [row for c in completions if c.summary is not None and (c.trial, c.attempt) in self.running
                for row in c.summary.final_rows]
        if rows:
            self.files.write_measurements(rows)

    def _complete(self, c: Completion) -> str | None:
        """Apply one completion to the core; a storage fault's message to pause on, or None."""
        run = self.running.pop((c.trial, c.attempt), None)
        if run is None:
            log.info("dropped a completion of trial %s attempt %s that is no longer running", c.trial, c.attempt)
            return None
        self.segments += 1
        self.cpu_seconds += self.spec.resources.cpus * max(0.0, self.clock() - run.submitted)
        try:
            return self._apply(c, run)
        except RejectedEvent as exc:  # a stale or duplicate answer: the core is right, drop it
            log.info("dropped a stale completion: %s", exc)
            return None

    def _apply(self, c: Completion, run: _Running) -> str | None:
        core, s = self.core, c.summary
        if s is None:
            if c.lost is not None:
                core.lost(c.trial, c.attempt)
            else:
                self._crashed(c.trial, c.attempt, run.rung, "RungwayTaskError", c.crashed or "", "")
            return None
        if s.skipped_checkpoints:
            log.warning("trial %s: skipped damaged checkpoints: %s", s.trial, "; ".join(s.skipped_checkpoints))
        if s.outcome == "result":
            self.budget_done += run.target_budget - min(run.start_budget, float(s.checkpoint_budget or 0))
            if not self.plan.stopping:
                core.report(s.trial, s.attempt, s.rung, s.value if s.value is not None else math.nan)
            elif core.trial(s.trial).state == "active":  # no relay answered (inline executor)
                self._apply_stopping_results(s)
        elif s.outcome == "stopped":
            self.budget_done += float(s.budget) - run.start_budget
        elif s.outcome == "yielded":
            core.yielded(s.trial, s.attempt)
        elif s.outcome == "crashed":
            self._crashed(s.trial, s.attempt, s.rung, s.error_type or "Error", s.reason or "", s.traceback or "", s.node)
        elif s.outcome == "storage":
            core.lost(s.trial, s.attempt)
            return f"storage fault on {s.node}: {s.reason}"
        return None

    def _apply_stopping_results(self, s: SegmentSummary) -> None:
        trial = self.core.trial(s.trial)
        rung = trial.rung
        value = s.value if s.value is not None else math.nan
        while True:
            verdict = self.core.report(s.trial, s.attempt, rung, value)
            if not isinstance(verdict, Continue):
                return
            rung = verdict.rung

    def _crashed(self, trial: int, attempt: int, rung: int, kind: str, reason: str, tb: str, node: str | None = None) -> None:
        self.files.record_failure(trial, rung, attempt, kind, reason, tb, node)
        out = self.core.crashed(trial, attempt, reason)
        if isinstance(out, Failed):
            log.warning("trial %s failed after %s crashes: %s", trial, self.plan.max_crashes + 1, reason)

    def _relay_milestones(self) -> None:
        posts = self.executor.drain_link()
        verdicts = []
        for trial, attempt, rung, value in posts.get("milestones", []):
            try:
                out = self.core.report(trial, attempt, rung, value)
            except RejectedEvent:
                verdicts.append((trial, attempt, rung, False))
                continue
            verdicts.append((trial, attempt, rung, isinstance(out, Continue)))
        self.executor.decide(verdicts)

    def _check_limits(self) -> None:
        if not self.core.admitting:
            return
        deadline = self.spec.deadline_seconds
        if deadline is not None and self.elapsed >= deadline:
            log.info("wall-clock deadline reached: starting no new trials")
            self.core.stop_admitting()
        cpu_hours = self.spec.limits.cpu_hours
        if cpu_hours is not None and self.cpu_seconds >= cpu_hours * 3600:
            log.info("CPU-hour limit reached: starting no new trials")
            self.core.stop_admitting()

    def _stop_running(self) -> None:
        """Interrupted or paused: cancel what runs and requeue it (its checkpoints stay)."""
        for (trial, attempt) in list(self.running):
            self.executor.cancel(trial, attempt)
            try:
                self.core.lost(trial, attempt)
            except RejectedEvent:
                pass
        self.running.clear()

    # ---- reading --------------------------------------------------------------------------

    def statistics(self) -> dict[str, Any]:
        stats = self.core.statistics()
        elapsed = self.elapsed
        eta_seconds = None
        if self.planned and self.budget_done > 0:
            rate = self.budget_done / max(elapsed, 1e-9)
            eta_seconds = max(0.0, (self.planned - self.budget_done) / rate)
        deadline = self.spec.deadline_seconds
        if deadline is not None:
            left = max(0.0, deadline - elapsed)
            eta_seconds = left if eta_seconds is None else min(eta_seconds, left)
        stats.update(
            {
                "search": self.spec.name,
                "metric": self.spec.metric,
                "direction": self.spec.direction,
                "unit": self.spec.ladder.unit,
                "elapsed": elapsed,
                "eta_seconds": eta_seconds,
                "cpus_busy": min(len(self.running) * self.spec.resources.cpus, self.executor.capacity()),
                "cpus_total": self.executor.capacity(),
                "segments": self.segments,
                "cpu_seconds": self.cpu_seconds,
            }
        )
        return stats
