"""The head's loop for one search: the core decides, the executor runs, the store keeps.

Theory of operation. The driver asks the core for work whenever a slot is free, submits each
segment to the executor, and turns every completion into exactly one core event (a result,
a loss, a crash). Every event is appended to the journal, durably, before the driver acts on
it: segments are journaled before they are submitted, results after their measurement rows
are in the store and before the ladder sees them. The driver also owns the search's
wall-clock limits, node health (dead nodes, missed heartbeats, hangs, nodes that keep
failing), the periodic snapshot, and the progress callback. The core never learns about
time, Ray or files; the executor never learns about ladders.

Restarting: the last snapshot is restored and the journal's later entries are replayed into
the core, which then stands exactly where it stood. A segment that was running when the head
stopped is settled from the store: if its result rows are there, the result is accepted
(nothing is redone); otherwise it is requeued from its checkpoint. A late answer from a
segment the head gave up on names an attempt the core no longer runs and is dropped.

Accounting and limits. Each segment is charged two figures, journaled with the event that
ended it: its CPU time (``cpu``: what its objective's threads and child processes used, as
the worker measured it, ``workers/cpu.py``; the reservation when no worker answered) and its
reservation (``res``: ``resources.cpus`` times the seconds it ran by the worker's clock).
``limits.cpu_hours`` counts the first. No segment starts whose expected cost would cross a
limit (``limits.py``): the run then lets what runs finish and ends with the final figures
(``RunReport.limit``); at the deadline, segments still waiting in Ray (no heartbeat yet) are
cancelled and requeued uncounted. Segments are submitted ahead of the free slots
(``resources.queued_per_slot`` per slot, the lab's ``head.queued_per_slot`` per granted one):
Ray starts one the moment a slot frees; the statistics tell running from queued.

Storage faults end the run with a message saying what to fix (exit status 3 from the
command); running it again, or ``--retry-storage``, resumes from the store. A search the core
calls *failing* (too many trials in a row failed at their first rung, or every trial failed)
ends the run too (``RunReport.failing``, with the first recorded failure; exit status 4); a
later run journals ``resume`` and tries again.
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import shutil
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from rungway.scheduler.core.errors import RejectedEvent, SpecError
from rungway.scheduler.core.estimate import planned_budget
from rungway.scheduler.core.events import Continue, Drained, Failed, Segment
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.spec import SearchSpec
from rungway.scheduler.store import StorageCorrupt, StorageError
from rungway.scheduler.store.lease import SearchLease
from rungway.workers.runner import SegmentOrder, SegmentSummary

from .executor import Completion, Executor
from .estimate import TimeLeft
from .journal import Journal
from .limits import Limits

__all__ = ["SearchDriver", "RunReport", "HEAD_STATE", "HealthSettings", "SegmentListener"]

log = logging.getLogger("rungway.head")

HEAD_STATE = "head-state.json"
# A running segment's first heartbeat comes within a second of its start (workers/link.py):
# one the head has not heard from this long after submitting it is still waiting in Ray.
_UNSTARTED_AFTER = 3.0


@dataclass
class RunReport:
    """How a run of the driver ended."""

    finished: bool
    interrupted: bool = False
    paused_reason: str | None = None
    failing: str | None = None
    """Why the search stopped as *failing* (it could only fail; ``SearchCore.failing``)."""
    first_failure: str | None = None
    """When failing: the search's first recorded failure, ``trial T attempt A: type: message``."""
    elapsed: float = 0.0
    segments: int = 0
    statistics: dict[str, Any] = field(default_factory=dict)
    limit: str | None = None
    """When a limit ended the run (``finished`` is then true): which, and the final figures."""


@dataclass(frozen=True)
class HealthSettings:
    """How the head judges running segments and nodes (seconds unless said otherwise)."""

    check_every: float = 1.0
    beat_timeout: float = 15.0  # a started segment silent this long is lost
    node_failure_limit: int = 3  # this many lost or crashed segments on a node within the window...
    node_failure_window: float = 300.0
    node_quarantine: float = 600.0  # ...keep new segments off it this long
    no_cpus_timeout: float | None = 120.0  # work waiting and no CPU in the cluster this long: the run stops


@dataclass(slots=True)
class _Running:
    trial: int
    attempt: int
    rung: int
    start_budget: float
    target_budget: float
    submitted: float
    node: str = ""
    last_beat: float | None = None
    last_progress: float = 0.0
    progress: float = -1.0
    first_beat: float | None = None  # when the head first heard from it running (None: queued, or inline)


class SegmentListener(Protocol):
    """Told of every segment this driver starts and of how each one ended (a shared head
    uses it for fair sharing and for its CPU ledger)."""

    def started(self, search: str, trial: int, attempt: int, rung: int) -> None: ...

    def ended(self, search: str, trial: int, attempt: int, rung: int, outcome: str, cpu_seconds: float,
              summary: SegmentSummary | None, node: str, reserved_seconds: float) -> None:
        """``cpu_seconds``: the CPU time it used; ``reserved_seconds``: ``resources.cpus`` times
        the seconds it held them (0 for a segment that never started)."""
        ...


_OUTCOMES = {"rep": "result", "done": "result", "yield": "yielded", "lost": "lost", "crash": "crashed"}


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
        prefetch: float | None = None,
        flush_seconds: float = 0.02,
        health: HealthSettings = HealthSettings(),
        listener: SegmentListener | None = None,
        lease: bool = True,
    ) -> None:
        from rungway.scheduler.store import open_store

        self.spec = spec
        self.spec_text = spec_text
        self.store_root = store_root
        self.files = open_store(store_root, create=True).search(spec.name)
        self.executor = executor
        self.progress = progress
        self.clock = clock
        self.persist_seconds = persist_seconds
        self.progress_seconds = progress_seconds
        # Segments submitted beyond the free slots, per slot (resources.queued_per_slot unless
        # given): Ray queues them and starts one the moment a slot frees, so no slot waits for
        # a round trip to the head.
        self.prefetch = spec.resources.queued_per_slot if prefetch is None else prefetch
        # Finished segments' results are gathered for up to this long and written as one file.
        self.flush_seconds = flush_seconds
        self.health = health
        self.listener = listener
        self.plan = spec.plan()
        self.running: dict[tuple[int, int], _Running] = {}
        self.budget_done = 0.0
        self.cpu_seconds = 0.0  # CPU time charged (what limits.cpu_hours counts)
        self.reserved_seconds = 0.0  # CPUs reserved x seconds held
        self.limits = Limits(spec.limits.cpu_hours, spec.deadline_seconds, spec.limits.trials)
        self.ended_by: str | None = None  # the limit that stopped new segments, once one did
        self.unstarted_at_deadline = 0  # segments cancelled at the deadline before they started
        self.elapsed_before = 0.0
        self.segments = 0
        self.lost_segments = 0  # segments requeued because their machine, worker or head went away
        self.replayed = 0
        self.replay_seconds = 0.0
        self.node_failures: dict[str, deque[float]] = {}
        self.quarantined: dict[str, float] = {}
        self.planned = planned_budget(self.plan)
        self.time_left = TimeLeft(spec)
        self._uncommitted: list[dict[str, Any]] = []
        self._persisted_seq = -1
        self._last_drain = 0.0
        self._last_fill = 0.0
        self._segments_this_run = 0
        # One writer per search (store/lease.py); a read-only look (lease=False) takes none.
        self.lease = SearchLease(str(self._journal_dir().parent), spec.name) if lease else None
        if self.lease is not None:
            self._check_fits()  # before anything is written
            self.lease.acquire()
        try:
            self.core = self._restore_or_start()
        except BaseException:
            if self.lease is not None:
                self.lease.release()
                if self.files.read_spec() is None:  # refused before anything was written: leave no folder
                    shutil.rmtree(Path(self.lease.folder), ignore_errors=True)
                    for empty in (self._journal_dir(), Path(self.lease.folder).parent):  # only if empty
                        with contextlib.suppress(OSError):
                            empty.rmdir()
            raise

    # ---- state in the store ------------------------------------------------------------

    def _journal_dir(self) -> Path:
        if "://" in self.store_root and not self.store_root.startswith("file://"):
            raise SpecError(
                f"the head's journal needs a POSIX path (local disk or NFS), not {self.store_root}; "
                "mount the store and pass its path",
                field="--store",
            )
        return Path(self.files.journal_dir.removeprefix("file://"))

    def _restore_or_start(self) -> SearchCore:
        stored_spec = self.files.read_spec()
        sampler = self.spec.make_sampler(np.random.default_rng(self.spec.seed))
        if stored_spec is not None and stored_spec != self.spec_text:
            raise SpecError(
                f"a search named {self.spec.name!r} already exists in {self.store_root} with a different "
                "spec; give this one another name (or delete the old search's folder)",
                field="name",
            )
        state = self.files.read_head_state(HEAD_STATE)
        self.journal = Journal(self._journal_dir())
        if state is None:
            if stored_spec is None:
                twin = self.files.store.case_twin(self.spec.name)
                if twin is not None:
                    self.journal.close()
                    raise SpecError(f"the store already holds a search named {twin!r}, which differs from "
                                    f"{self.spec.name!r} only in letter case; give this one another name", field="name")
                self.files.write_spec(self.spec_text)
            core = SearchCore(self.plan, sampler)
            covered = 0
        else:
            try:
                data = json.loads(state)
                meta = data.get("meta", {})
                self.budget_done = meta.get("budget_done", 0.0)
                self.cpu_seconds = meta.get("cpu_seconds", 0.0)
                # Snapshots before both figures were kept charged the reservation as cpu_seconds.
                self.reserved_seconds = meta.get("reserved_cpu_seconds", self.cpu_seconds)
                self.limits.restore(meta.get("costs"))
                self.elapsed_before = meta.get("elapsed", 0.0)
                self.segments = meta.get("segments", 0)
                covered = data.get("journal_seq", 0)
                core = SearchCore.restore(data["core"], sampler)
            except (ValueError, KeyError, TypeError, AttributeError, IndexError, RejectedEvent) as exc:
                self.journal.close()
                path = f"{self.files.journal_dir}/{HEAD_STATE}"
                raise StorageCorrupt(
                    f"{path}: the search's saved state is damaged ({type(exc).__name__}: {exc}), so the search "
                    "cannot be resumed from it. Its results so far stay readable (trials.parquet, measurements/). "
                    "Put back a copy of the file if you have one; otherwise run the spec again under another name",
                    path=path,
                ) from None
        self.core = core
        self.journal.resume_after(covered)
        started = time.perf_counter()
        for entry in self.journal.entries_after(covered):
            self._replay(entry)
            self.replayed += 1
        self.replay_seconds = time.perf_counter() - started
        if self.replayed:
            log.info("replayed %d journal entries in %.3fs", self.replayed, self.replay_seconds)
        self._settle_orphans()
        return core

    def _replay(self, entry: dict[str, Any]) -> None:
        if entry["e"] == "seg":
            out = self.core.ask()
            got = (out.trial, out.attempt, out.rung) if isinstance(out, Segment) else None
            if got != (entry["t"], entry["a"], entry["r"]):
                raise StorageError(
                    f"the journal in {self.journal.directory} does not match this search's decisions "
                    f"(entry {entry['n']}: expected segment {entry['t']}/{entry['a']}/{entry['r']}, the core "
                    f"gave {got}); was the spec or rungway changed between runs?",
                    path=str(self.journal.directory),
                )
            return
        self._apply_entry(entry)

    def _log(self, entry: dict[str, Any]) -> Any:
        """Apply one event now and queue its journal entry; ``_commit`` makes the queue durable
        before the head does anything outside itself that depends on it."""
        self._uncommitted.append(entry)
        return self._apply_entry(entry)

    def _commit(self) -> None:
        if self._uncommitted:
            entries, self._uncommitted = self._uncommitted, []
            self.journal.append(entries)

    def _apply_entry(self, entry: dict[str, Any]) -> Any:
        """Apply one journaled event to the core (live and in replay alike)."""
        core, kind = self.core, entry["e"]
        self.cpu_seconds += entry.get("cpu", 0.0)
        self.reserved_seconds += entry.get("res", entry.get("cpu", 0.0))  # older entries: cpu was the reservation
        self.budget_done += entry.get("bud", 0.0)
        if not hasattr(self, "_started"):  # replaying: the journal knows how long the search ran
            self.elapsed_before = max(self.elapsed_before, entry.get("el", 0.0))
        if kind in ("rep", "lost", "crash", "yield", "done") and not entry.get("unstarted"):
            self.segments += 1
        if kind == "lost" and not entry.get("unstarted"):
            self.lost_segments += 1
        try:
            if kind == "rep":
                return core.report(entry["t"], entry["a"], entry["r"], float(entry["v"]))
            if kind == "lost":  # entries without ``counted`` (the head's own stops, older journals) count not
                return core.lost(entry["t"], entry["a"], bool(entry.get("counted", False)))
            if kind == "crash":
                return core.crashed(entry["t"], entry["a"], entry.get("why", ""))
            if kind == "yield":
                return core.yielded(entry["t"], entry["a"])
            if kind == "cancel":
                return core.cancel(entry["t"])
            if kind == "stop":
                return core.stop_admitting()
            if kind == "resume":
                return core.resume()
            if kind == "done":  # stopping form: the segment ended after its rung results
                return None
        except RejectedEvent as exc:  # refused when it happened too; the core is right
            log.info("journal entry %s refused: %s", entry.get("n"), exc)
            return None
        raise StorageError(f"unknown journal entry kind {kind!r} (entry {entry.get('n')})", path=str(self.journal.directory))

    def _settle_orphans(self) -> None:
        """Segments running when the previous head stopped: accept results already in the
        store, requeue the rest from their checkpoints."""
        orphans = [t for t in self.core.trials() if t.state == "active"]
        if not orphans:
            return
        finals: dict[tuple[int, int, int], float] = {}
        times: dict[tuple[int, int], tuple[float, float, str]] = {}  # a kept segment's worker times
        frame = self.files.read_measurements()
        if not frame.empty:
            rows = frame[(frame["final"]) & (frame["metric"] == self.spec.metric)]
            for row in rows.itertuples():
                finals[(int(row.trial), int(row.attempt), int(row.rung))] = float(row.value)
                times[(int(row.trial), int(row.attempt))] = (row.started_at.timestamp(), row.ended_at.timestamp(),
                                                             str(row.node or ""))
        entries = []
        for view in orphans:
            rung = view.rung
            if self.plan.stopping:
                while (view.id, view.attempt, rung) in finals:
                    entries.append({"e": "rep", "t": view.id, "a": view.attempt, "r": rung, "v": finals[(view.id, view.attempt, rung)]})
                    rung += 1
                if entries and entries[-1]["t"] == view.id and rung > len(self.plan.brackets()[view.bracket].ladder.budgets) - 1:
                    continue
            elif (view.id, view.attempt, rung) in finals:
                entries.append({"e": "rep", "t": view.id, "a": view.attempt, "r": rung, "v": finals[(view.id, view.attempt, rung)]})
                continue
            entries.append({"e": "lost", "t": view.id, "a": view.attempt})
        for entry in entries:
            self._log(entry)
        self._commit()
        if self.listener is not None:  # results kept from the store are charged as they ran
            for entry in entries:
                key = (entry["t"], entry["a"])
                if entry["e"] == "rep" and key in times:
                    started, ended, node = times.pop(key)
                    summary = SegmentSummary(entry["t"], entry["a"], entry["r"], "result", node=node,
                                             started=started, ended=ended)
                    held = self.spec.resources.cpus * max(0.0, ended - started)  # no CPU measurement survives
                    self.listener.ended(self.spec.name, entry["t"], entry["a"], entry["r"], "result", held, summary,
                                        node, held)
        log.info("settled %d segments of the previous head: %d results kept from the store",
                 len(orphans), sum(1 for e in entries if e["e"] == "rep"))

    def persist(self) -> None:
        """Write the core's snapshot and the trials table (both atomically), then let the
        journal drop what the snapshot covers."""
        if self.lease is not None:
            self.lease.check()  # a head that lost its search's lease writes no snapshot over the new holder's
        running, queued = self.running_now()
        meta = {
            "lease": None if self.lease is None else self.lease.token,  # the fencing token it was written under
            "budget_done": self.budget_done,
            "cpu_seconds": self.cpu_seconds,
            "reserved_cpu_seconds": self.reserved_seconds,
            "costs": self.limits.state(),
            "elapsed": self.elapsed,
            "segments": self.segments,
            "running": running,
            "queued": queued,
            "ended_by": self.ended_by,
        }
        self._commit()
        seq = self.journal.seq
        payload = json.dumps({"meta": meta, "journal_seq": seq, "core": self.core.snapshot()}, separators=(",", ":"))
        self.files.write_head_state(HEAD_STATE, payload)
        self._persisted_seq = seq
        self.journal.rotate(seq)
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
                    "latest_value": math.nan if t.loss is None else self.core.value_of(t.loss),
                    "record_value": math.nan if t.record is None else self.core.value_of(t.record),
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
        """Run in the foreground, filling every slot of the executor, until the search ends."""
        self.begin()
        while not self.over:
            if should_stop():
                self.report.interrupted = True
                break
            self.step(wait=0.02)
        return self.end()

    # A head that shares its executor among searches (``service.lab``) drives these three
    # itself: ``step`` with ``grant`` starts at most that many segments and waits for nothing.

    def begin(self) -> None:
        self._started = self.clock()
        self._last_persist = self._last_progress = self._last_health = self._started
        self.report = RunReport(finished=False)
        self.over = False
        self._drained = False
        self._pending: list[Completion] = []  # finished segments whose results wait for the next write
        self._pending_since: float | None = None
        self._no_cpus_since: float | None = None
        if self.core.failing is not None:  # it stopped as failing before: give it another run of trials
            log.warning("search %s stopped as failing before (%s); trying again", self.spec.name, self.core.failing)
            self._log({"e": "resume"})

    def stagger(self, phase: float) -> None:
        """Shift this driver's periodic work (snapshot, health check) by ``phase`` (0 to 1) of
        its interval, so that a head with many searches does not do all of theirs at once."""
        self._last_persist -= self.persist_seconds * phase
        self._last_health -= self.health.check_every * phase

    def step(self, wait: float = 0.0, grant: int | None = None) -> None:
        """One turn of the loop: collect finished segments and store their results, start new
        segments (all of it in one journal write), answer rung results, check health.
        Sets ``over`` when the search drained or paused on a storage fault."""
        report = self.report
        try:
            if self.lease is not None:
                self.lease.renew()
            self._check_limits()
            # Results first, then new segments: one journal write covers both (the segments'
            # entries must be durable before they are submitted).
            self._pending.extend(self.executor.wait(timeout=wait if self.running else 0.0))
            now = self.clock()
            pending = self._pending
            if pending and self._pending_since is None:
                self._pending_since = now
            if pending and (
                now - self._pending_since >= self.flush_seconds  # type: ignore[operator]
                or len(pending) >= 256
                or self.executor.in_flight() == 0
                or grant is not None  # shared head: results free the team's CPUs; no grouping
            ):
                self._pending, self._pending_since = [], None
                reason = self._flush(pending)
                if reason:
                    report.paused_reason = reason
                    self.over = True
                    return
                if self._stop_if_failing():
                    return
            self._drained = self._fill(self.clock(), grant) or self._drained
            if (self._drained or self.ended_by is not None) and not self.running and not self._pending:
                if not self._stop_if_failing():
                    report.finished = True
                    if self.ended_by is not None:  # a limit stopped it: say which, with the final figures
                        report.limit = self.ended_by = self.limits.final(
                            self.ended_by, self.cpu_seconds, self.reserved_seconds, self.elapsed)
                        if self.unstarted_at_deadline:
                            report.limit = self.ended_by = (f"{report.limit}; {self.unstarted_at_deadline} segment(s) "
                                                            "that had not started were requeued for a later run")
                        log.info("search %s: %s", self.spec.name, report.limit)
                    self.over = True
                return
            self._relay_milestones()
            self._commit()
            if now - self._last_health >= self.health.check_every:
                self._check_health(now)
                self._check_cpus(now)
                self._last_health = now
                if self.over or self._stop_if_failing():
                    return
            if self.progress is not None:
                self.time_left.maybe_update(now, self._slots(prefetch=False))
            if self.progress is not None and now - self._last_progress >= self.progress_seconds:
                self.progress(self.statistics())
                self._last_progress = now
            if now - self._last_persist >= self.persist_seconds and self.journal.seq != self._persisted_seq:
                self.persist()  # only when something happened: a shared head holds many idle searches
                self.files.compact_measurements(min_parts=64)
                self._last_persist = now
        except StorageError as exc:
            report.paused_reason = str(exc)
            self.over = True

    def end(self) -> RunReport:
        """Stop what runs (requeued from checkpoints), write the final state, report."""
        report = self.report
        try:
            if self._pending and not report.paused_reason:  # results already in hand are kept, not redone
                pending, self._pending = self._pending, []
                self._flush(pending)
            self._stop_running()
            self.persist()
            self.files.compact_measurements(min_parts=2)
        except StorageError as exc:
            report.paused_reason = report.paused_reason or str(exc)
            self.executor.close()
        finally:
            self.journal.close()
            if self.lease is not None:
                self.lease.release()
        report.finished = report.finished and not report.paused_reason
        if report.failing is not None and not report.paused_reason:
            try:
                report.first_failure = self.first_failure()
            except StorageError as exc:
                report.first_failure = f"(the failures table cannot be read: {exc})"
        report.elapsed = self.elapsed
        report.segments = self.segments
        report.statistics = self.statistics()
        if self.progress is not None:
            self.progress(report.statistics)
        return report

    def backlog(self, limit: int) -> int:
        """Segments this search could start now (see ``SearchCore.backlog``); none once a
        limit has stopped it."""
        if self.ended_by is not None:
            return 0
        return self.core.backlog(limit)

    def _slots(self, prefetch: bool = True) -> int:
        """Segments to keep submitted: every slot of the cluster, plus the prefetch: at least
        what the cluster finishes in two fill intervals, so that grouped fills starve no CPU."""
        cpus = self.spec.resources.cpus
        capacity = self.executor.capacity()
        if capacity < cpus:
            return 0
        slots = int(capacity // cpus)
        if not prefetch or self.prefetch <= 0:
            return slots
        elapsed = max(self.clock() - self._started, 1e-3) if hasattr(self, "_started") else 1.0
        rate = self._segments_this_run / elapsed
        return slots + max(1, int(slots * self.prefetch), math.ceil(rate * self.flush_seconds * 2))

    def _fill(self, now: float, grant: int | None = None) -> bool:
        """Submit segments while slots are free (or up to ``grant``); True once the core says
        the search drained. The segments are journaled (one write) before any is submitted.
        Fills are grouped (one journal write per ``flush_seconds``) unless a CPU would
        otherwise sit idle. No segment starts whose expected cost would cross a limit
        (``limits.py``): the first one refused is given back to the core, uncounted, and
        nothing more starts in this run."""
        deadline = self.spec.deadline_seconds
        if deadline is not None and self.running and self.elapsed >= deadline:
            self._cancel_unstarted(now)
        if self.ended_by is not None:
            return False
        if grant is not None:
            # The lab's grants, plus its queue-ahead (head.queued_per_slot) per granted segment.
            free = grant + (math.ceil(grant * self.prefetch) if grant > 0 and self.prefetch > 0 else 0)
            if not self.running and self.core.active == 0 and self.core.backlog(1) == 0:
                # Nothing to start and nothing running: ask once to learn whether it drained
                # (with a backlog of 0 the core hands out no segment).
                return isinstance(self.core.ask(), Drained)
            slots = self._slots(prefetch=False)
            if self.limits.blind():
                free = min(free, grant)
        else:
            in_flight = self.executor.in_flight()
            slots = self._slots(prefetch=False)
            urgent = in_flight < slots
            if not urgent and now - self._last_fill < self.flush_seconds:
                return False
            self._last_fill = now
            free = self._slots() - in_flight
            if self.limits.blind():  # no segment's cost known yet: the first wave only
                free = min(free, slots - in_flight)
        segments: list[Segment] = []
        drained = False
        refused: tuple[Segment, str] | None = None
        ahead = self.limits.ahead([(r.start_budget, r.target_budget) for r in self.running.values()]) \
            if self.limits.any else (0, 0.0)
        while free > 0:
            out = self.core.ask()
            if isinstance(out, Drained):
                drained = True
                break
            if not isinstance(out, Segment):
                break
            if self.limits.any:
                why = self.limits.refuse(float(out.start_budget), float(out.target_budget), used_cpu=self.cpu_seconds,
                                         ahead=ahead, elapsed=self.elapsed, slots=max(1, slots))
                if why is not None:
                    refused = (out, why)
                    break
                ahead = (ahead[0] + 1, ahead[1] + self.limits.units(float(out.start_budget), float(out.target_budget)))
            segments.append(out)
            free -= 1
        self._uncommitted.extend({"e": "seg", "t": s.trial, "a": s.attempt, "r": s.rung} for s in segments)
        if refused is not None:  # handed out by the core, never started: back to its queue, uncounted
            seg, why = refused
            self._uncommitted.append({"e": "seg", "t": seg.trial, "a": seg.attempt, "r": seg.rung})
            self._log({"e": "lost", "t": seg.trial, "a": seg.attempt, "why": f"not started: {why}", "unstarted": True})
            self._limit_reached(why)
        self._commit()  # results applied this loop and these segments, in one durable write
        for seg in segments:
            self._submit(seg)
        return drained

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
        now = self.clock()
        self.running[(seg.trial, seg.attempt)] = _Running(
            seg.trial, seg.attempt, seg.rung, float(seg.start_budget), float(seg.target_budget), now, last_progress=now
        )
        self.executor.submit(order, self.spec.resources.cpus, self.spec.resources.memory_mb)
        if self.listener is not None:
            self.listener.started(self.spec.name, seg.trial, seg.attempt, seg.rung)

    def _ended(self, run: _Running, entry: dict[str, Any], summary: SegmentSummary | None = None) -> None:
        if self.listener is not None:
            outcome = _OUTCOMES.get(entry["e"], "other")
            if summary is not None and summary.outcome == "stopped":
                outcome = "stopped"
            self.listener.ended(self.spec.name, run.trial, run.attempt, run.rung, outcome, entry.get("cpu", 0.0),
                                summary, (summary.node if summary is not None else "") or run.node,
                                entry.get("res", entry.get("cpu", 0.0)))

    def _held(self, run: _Running, now: float) -> float:
        """CPU-seconds a segment that never answered held: from the first heartbeat the head
        heard (an undercount by at most a beat); nothing if it never beat (it waited in Ray's
        queue, or ran for less than a beat)."""
        if run.first_beat is None:
            return 0.0
        return self.spec.resources.cpus * max(0.0, now - run.first_beat)

    def _unanswered(self, run: _Running, now: float) -> dict[str, float]:
        """The charges of a segment whose worker never answered: its reservation, and the same
        as its CPU time (nobody measured it)."""
        held = self._held(run, now)
        return {"cpu": held, "res": held}

    def stop_segment(self, trial: int, attempt: int, why: str) -> bool:
        """Stop one running segment now and requeue its trial from its checkpoint (a preempted
        segment past its deadline, or a paused search's). False if it does not run."""
        run = self.running.pop((trial, attempt), None)
        if run is None:
            return False
        self.executor.cancel(trial, attempt)
        entry = {"e": "lost", "t": trial, "a": attempt, "why": why, **self._unanswered(run, self.clock()), "el": self.elapsed}
        self._log(entry)
        self._commit()
        self._ended(run, entry)
        return True

    def running_segments(self) -> list[tuple[int, int]]:
        return list(self.running)

    def _flush(self, completions: list[Completion]) -> str | None:
        """Store the rung results gathered, journal them, then apply them to the core.
        Returns a reason to pause (a storage fault reported by a worker), or None."""
        rows = [row for c in completions if c.summary is not None and (c.trial, c.attempt) in self.running
                for row in c.summary.final_rows]
        if rows:
            self.files.write_measurements(rows)
        entries: list[tuple[dict[str, Any], Completion, _Running]] = []
        pause = None
        self._segments_this_run += len(completions)
        for c in completions:
            run = self.running.pop((c.trial, c.attempt), None)
            if run is None:
                log.info("dropped the answer of trial %s attempt %s: the head no longer runs it", c.trial, c.attempt)
                continue
            entry = self._entry_for(c, run)
            entries.append((entry, c, run))
            if c.summary is not None and c.summary.outcome == "storage":
                pause = f"storage fault on {c.summary.node}: {c.summary.reason}"
        for entry, c, run in entries:
            if c.summary is not None and c.summary.outcome == "result":
                self.time_left.record(run.target_budget - run.start_budget, c.summary.ended - c.summary.started)
            if c.summary is not None and c.summary.outcome in ("result", "stopped") and entry.get("bud", 0.0) > 0:
                self.limits.record(run.start_budget, run.target_budget, entry["bud"], entry["cpu"],
                                   max(0.0, c.summary.ended - c.summary.started), c.summary.checkpoint_budget)
            out = self._log(entry)
            self._ended(run, entry, c.summary)
            if entry["e"] in ("lost", "crash"):
                self._count_node_failure(run.node)
            if isinstance(out, Failed):
                self._trial_failed(entry, out, run)
            if c.summary is not None and c.summary.skipped_checkpoints:
                log.warning("trial %s: %s", c.trial, "; ".join(c.summary.skipped_checkpoints))
        return pause

    def _entry_for(self, c: Completion, run: _Running) -> dict[str, Any]:
        """The journal entry for one completion (side records, e.g. tracebacks, written first)."""
        now = self.clock()
        s = c.summary
        # CPU time as the worker measured it; the reservation from the worker's own start and
        # end (a segment that waited in Ray's queue held no CPU). Without an answer: _unanswered.
        if s is not None and s.ended >= s.started > 0:
            held = self.spec.resources.cpus * (s.ended - s.started)
            charges = {"cpu": max(0.0, float(s.cpu_seconds)), "res": held}
        else:
            charges = self._unanswered(run, now)
        base = {"t": c.trial, "a": c.attempt, **charges, "el": self.elapsed}
        if s is None:
            if c.lost is not None:
                return {"e": "lost", **base, "why": c.lost, "counted": True}
            self.files.record_failure(c.trial, run.rung, c.attempt, c.error_type or "RungwayTaskError", c.crashed or "", "",
                                      c.node or run.node)
            return {"e": "crash", **base, "why": c.crashed or ""}
        if s.outcome == "result":
            advanced = run.target_budget - min(run.start_budget, float(s.checkpoint_budget or 0))
            if not self.plan.stopping:
                return {"e": "rep", **base, "r": s.rung, "v": s.value if s.value is not None else math.nan, "bud": advanced}
            if self.core.trial(s.trial).state == "active":  # no relay answered (inline executor)
                self._apply_stopping_results(s)
            return {"e": "done", **base, "bud": advanced}
        if s.outcome == "stopped":
            return {"e": "done", **base, "bud": float(s.budget) - run.start_budget}
        if s.outcome == "yielded":
            return {"e": "yield", **base}
        if s.outcome == "crashed":
            self.files.record_failure(s.trial, s.rung, s.attempt, s.error_type or "Error", s.reason or "", s.traceback or "", s.node)
            return {"e": "crash", **base, "why": s.reason or ""}
        return {"e": "lost", **base, "why": f"storage: {s.reason}"}

    def _trial_failed(self, entry: dict[str, Any], out: Failed, run: _Running) -> None:
        """A trial failed for good. A crash's record was written before its entry; a trial lost
        once too often gets its record here (losses are not failures until then)."""
        if entry["e"] == "lost":
            self.files.record_failure(out.trial, run.rung, entry["a"], "Lost", f"{out.reason}; the last time: {entry.get('why', '')}",
                                      "", run.node)
            log.warning("trial %s failed: %s (limits.max_losses = %s)", out.trial, out.reason, self.plan.max_losses)
        else:
            log.warning("trial %s failed after %s crashes: %s", out.trial, self.plan.max_crashes + 1, entry.get("why"))

    def _stop_if_failing(self) -> bool:
        """End the run when the core says the search can only fail."""
        why = self.core.failing
        if why is None:
            return False
        if self.report.failing is None:
            log.warning("search %s is failing: %s; stopping", self.spec.name, why)
        self.report.failing = why
        self.over = True
        return True

    def first_failure(self) -> str | None:
        """The search's first recorded failure (``failures/``), as one line."""
        frame = self.files.read_failures()
        if frame.empty:
            return None
        row = frame.sort_values("recorded_at", kind="stable").iloc[0]
        message = str(row["message"])
        text = message if message.startswith(str(row["error_type"])) else f"{row['error_type']}: {message}"
        return f"trial {int(row['trial'])} attempt {int(row['attempt'])}: {text}"

    def _apply_stopping_results(self, s: SegmentSummary) -> None:
        trial = self.core.trial(s.trial)
        rung = trial.rung
        value = s.value if s.value is not None else math.nan
        while True:
            verdict = self._log({"e": "rep", "t": s.trial, "a": s.attempt, "r": rung, "v": value})
            if not isinstance(verdict, Continue):
                return
            rung = verdict.rung

    def _relay_milestones(self) -> None:
        """Stopping form: rung results posted by running segments, answered with verdicts;
        heartbeats of every segment. Drained every loop in the stopping form (segments wait
        for their verdicts), otherwise a few times per health check."""
        now = self.clock()
        if not self.plan.stopping and now - self._last_drain < self.health.check_every / 4:
            return
        self._last_drain = now
        posts = self.executor.drain_link()
        for (trial, attempt), (budget, node) in posts.get("beats", {}).items():
            run = self.running.get((trial, attempt))
            if run is None:
                continue
            run.last_beat = now
            if node:
                run.node = node
            if run.first_beat is None:
                run.first_beat = now
            if budget is not None and budget > run.progress:
                run.progress, run.last_progress = float(budget), now
        milestones = posts.get("milestones", [])
        if not milestones:
            return
        entries = [{"e": "rep", "t": t, "a": a, "r": r, "v": v} for t, a, r, v in milestones if (t, a) in self.running]
        verdicts = []
        outcomes = [self._log(entry) for entry in entries]
        self._commit()  # durable before any segment hears its verdict
        for entry, out in zip(entries, outcomes, strict=True):
            run = self.running.get((entry["t"], entry["a"]))
            if run is not None:
                run.last_progress = now
            verdicts.append((entry["t"], entry["a"], entry["r"], isinstance(out, Continue)))
        for t, a, r, _v in milestones:
            if (t, a) not in self.running:
                verdicts.append((t, a, r, False))
        self.executor.decide(verdicts)

    # ---- health ----------------------------------------------------------------------------

    def _check_health(self, now: float) -> None:
        """Dead nodes, silent segments and hangs; nodes that keep failing are set aside."""
        gone: list[tuple[_Running, str, str]] = []
        dead = self.executor.dead_nodes() if self.running else set()
        hang = self.spec.hang_timeout_seconds
        for run in self.running.values():
            if run.node and run.node in dead:
                gone.append((run, "lost", f"node {run.node[:12]} died"))
            elif run.last_beat is not None and now - run.last_beat > self.health.beat_timeout:
                gone.append((run, "lost", f"no heartbeat for {now - run.last_beat:.0f}s"))
            elif hang is not None and run.last_beat is not None and now - run.last_progress > hang:
                gone.append((run, "crash", f"hang: no progress for {now - run.last_progress:.0f}s (limits.hang_timeout)"))
        if gone:
            entries = []
            for run, kind, why in gone:
                self.executor.cancel(run.trial, run.attempt)
                del self.running[(run.trial, run.attempt)]
                if kind == "crash":
                    self.files.record_failure(run.trial, run.rung, run.attempt, "Hang", why, "", run.node)
                entry = {"e": kind, "t": run.trial, "a": run.attempt, "why": why,
                         **self._unanswered(run, now), "el": self.elapsed}
                if kind == "lost":
                    entry["counted"] = True
                entries.append((entry, run))
                log.warning("trial %s attempt %s: %s; %s", run.trial, run.attempt, why,
                            "counted as a loss" if kind == "lost" else "counted as a crash")
            for entry, run in entries:
                out = self._log(entry)
                self._ended(run, entry)
                self._count_node_failure(run.node)
                if isinstance(out, Failed):
                    self._trial_failed(entry, out, run)
        for node, until in list(self.quarantined.items()):
            if until <= now:
                del self.quarantined[node]
                log.warning("node %s is back in scheduling", node[:12])
                self.executor.avoid(set(self.quarantined))

    def _check_fits(self) -> None:
        """A trial that no node can hold would wait forever: refuse the search at the start."""
        sizes = self.executor.node_sizes()
        cpus, memory = float(self.spec.resources.cpus), int(self.spec.resources.memory_mb)
        if not sizes or any(c >= cpus and (m is None or m >= memory) for c, m in sizes):
            return
        most_cpus = max(c for c, _ in sizes)
        field = "resources.cpus" if most_cpus < cpus else "resources.memory_mb"
        memories = [m for _, m in sizes if m is not None]
        largest = (f"the largest node has {most_cpus:g} CPUs" if field == "resources.cpus"
                   else f"no node with {cpus:g} CPUs has {memory} MB (the most memory on a node is {max(memories)} MB)")
        raise SpecError(f"one trial asks for {cpus:g} CPUs and {memory} MB, but {largest} among the "
                        f"{len(sizes)} live nodes, so no trial could ever start; lower it, or add a larger node",
                        field=field)

    def _check_cpus(self, now: float) -> None:
        """Work waiting while the cluster has no CPU at all (its Ray is gone, or every node left):
        after ``no_cpus_timeout`` the run stops with the reason, instead of waiting silently."""
        timeout = self.health.no_cpus_timeout
        if timeout is None or self.executor.capacity() > 0 or not (self.running or self.core.backlog(1)):
            self._no_cpus_since = None
            return
        if self._no_cpus_since is None:
            self._no_cpus_since = now
        elif now - self._no_cpus_since >= timeout:
            self.report.paused_reason = (f"the cluster has had no CPUs for {now - self._no_cpus_since:.0f}s, with "
                                         "segments waiting (has its Ray stopped, or has every node left?)")
            self.over = True

    def _count_node_failure(self, node: str) -> None:
        if not node:
            return
        now = self.clock()
        window = self.node_failures.setdefault(node, deque())
        window.append(now)
        while window and now - window[0] > self.health.node_failure_window:
            window.popleft()
        if len(window) >= self.health.node_failure_limit and node not in self.quarantined:
            others = {r.node for r in self.running.values() if r.node} | set(self.node_failures)
            if not others - set(self.quarantined) - {node}:
                log.warning("node %s failed %d segments in %.0fs, but it is the last node known to work: kept",
                            node[:12], len(window), self.health.node_failure_window)
                return
            self.quarantined[node] = now + self.health.node_quarantine
            log.warning("node %s failed %d segments in %.0fs: no new segments there for %.0fs",
                        node[:12], len(window), self.health.node_failure_window, self.health.node_quarantine)
            self.executor.avoid(set(self.quarantined))

    def _check_limits(self) -> None:
        """A limit crossed (CPU time used, or the deadline): start nothing more (``_fill``
        gives the rest of the rules, ``limits.py``)."""
        if self.ended_by is None and self.limits.any:
            why = self.limits.crossed(self.cpu_seconds, self.elapsed)
            if why is not None:
                self._limit_reached(why)

    def _limit_reached(self, why: str) -> None:
        """Start no segment from now on; the run ends once what runs has finished."""
        if self.ended_by is not None:
            return
        self.ended_by = why
        log.info("search %s: %s; starting nothing more, %d segment(s) to finish", self.spec.name, why, len(self.running))
        if self.core.admitting:
            self._log({"e": "stop", "why": why})

    def _cancel_unstarted(self, now: float) -> None:
        """The deadline has passed: segments still waiting in Ray (no heartbeat since they were
        submitted, ``_UNSTARTED_AFTER`` ago or more) are cancelled and requeued uncounted, so a
        search whose segments cannot run ends with its running ones."""
        self._limit_reached(self.limits.crossed(self.cpu_seconds, self.elapsed) or "limits.deadline reached")
        pending = {(c.trial, c.attempt) for c in self._pending}
        waiting = [r for key, r in self.running.items()
                   if r.first_beat is None and key not in pending and now - r.submitted >= _UNSTARTED_AFTER]
        for run in waiting:
            self.executor.cancel(run.trial, run.attempt)
            del self.running[(run.trial, run.attempt)]
            entry = {"e": "lost", "t": run.trial, "a": run.attempt, "why": "had not started by the deadline",
                     "cpu": 0.0, "res": 0.0, "unstarted": True, "el": self.elapsed}
            self._log(entry)
            self._ended(run, entry)
        if waiting:
            self.unstarted_at_deadline += len(waiting)
            log.info("search %s: %d segment(s) had not started by the deadline: requeued, not counted",
                     self.spec.name, len(waiting))
            self._commit()

    def _stop_running(self) -> None:
        """Interrupted or paused: cancel what runs and requeue it (its checkpoints stay)."""
        if not self.running:
            return
        now = self.clock()
        runs = list(self.running.values())
        entries = [{"e": "lost", "t": r.trial, "a": r.attempt, "why": "the head stopped", **self._unanswered(r, now)}
                   for r in runs]
        for (trial, attempt) in list(self.running):
            self.executor.cancel(trial, attempt)
        self.running.clear()
        for entry, run in zip(entries, runs, strict=True):
            self._log(entry)
            self._ended(run, entry)
        self._commit()

    # ---- reading --------------------------------------------------------------------------

    def running_now(self) -> tuple[int, int]:
        """(running, queued) of the segments submitted: those the head has heard from running,
        or as many as the cluster has slots for, run; the rest wait in Ray's queue."""
        in_flight = len(self.running)
        if not in_flight:
            return 0, 0
        beating = sum(1 for r in self.running.values() if r.first_beat is not None)
        running = min(in_flight, max(beating, self._slots(prefetch=False)))
        return running, in_flight - running

    def statistics(self) -> dict[str, Any]:
        stats = self.core.statistics()
        elapsed = self.elapsed
        eta_seconds = self.time_left.seconds_left(elapsed)  # the simulator's, once it has data
        if eta_seconds is None and self.planned and self.budget_done > 0:
            rate = self.budget_done / max(elapsed, 1e-9)
            eta_seconds = max(0.0, (self.planned - self.budget_done) / rate)
        deadline = self.spec.deadline_seconds
        if deadline is not None:
            left = max(0.0, deadline - elapsed)
            eta_seconds = left if eta_seconds is None else min(eta_seconds, left)
        running, queued = self.running_now()
        stats.update(
            {
                "search": self.spec.name,
                "metric": self.spec.metric,
                "better": self.spec.better,
                "unit": self.spec.ladder.unit,
                "elapsed": elapsed,
                "eta_seconds": eta_seconds,
                "cpus_busy": min(running * self.spec.resources.cpus, self.executor.capacity()),
                "cpus_total": self.executor.capacity(),
                "segments_running": running,
                "segments_queued": queued,
                "segments": self.segments,
                "lost_segments": self.lost_segments,
                "cpu_seconds": self.cpu_seconds,
                "reserved_cpu_seconds": self.reserved_seconds,
                "limits": self.limits.figures(self.cpu_seconds, self.reserved_seconds, elapsed, len(self.core)),
                "ended_by": self.ended_by,
                "quarantined_nodes": sorted(self.quarantined),
                "journal_replayed": self.replayed,
            }
        )
        return stats
