"""The lab's head: every team's searches in one loop, sharing one Ray cluster by the lab's rules.

Theory of operation. Each search has its own :class:`SearchDriver` (its core, journal and
store folder, exactly as when run alone) driving a lane of one shared :class:`RayPool`. The
pure :class:`SharingState` decides who may start how many segments: every loop the head tells
it each search's demand (``SearchDriver.backlog``: what the search could start now, without
asking its core, so nothing is committed early), plans a round, and hands each search its
grant. Segments that start and end are reported back (``Started``/``Ended``) through the
driver's listener, which also writes one CPU-ledger row per segment (the CPU time it used and
its reservation). Allowances count CPU time: whenever a segment ends, its team's usage in the
sharing state is set to the CPU time its ended segments used this period, plus what its
running ones have reserved so far (their CPU time is known only when they end). Preemptions are carried
out through the relay (``ask_to_yield``); a segment still running at its deadline is stopped
and requeued from its checkpoint.

The API thread calls the public methods; they take the head's lock, so every change happens
between two loop turns. Submissions, pauses, resumes and cancels are journaled in the lab's
own journal (``<store>/lab/journal``) before they are acknowledged; a restarted head replays
it, each search's driver restores itself from its own journal, and usage for the current
allowance period is read back from the ledger. Searches keep their submission order and
priority, which is their queue position.
"""

from __future__ import annotations

import logging
import math
import threading
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Protocol

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.sharing import (
    ALLOWANCE_SPENT,
    Demand,
    Ended,
    QuotaChanged,
    SharingState,
    Started,
    TeamsConfigured,
    Tick,
    Withdrawn,
)
from rungway.scheduler.head.driver import HealthSettings, RunReport, SearchDriver
from rungway.scheduler.head.executor import Executor
from rungway.scheduler.head.journal import Journal
from rungway.scheduler.spec import SearchSpec, parse_spec
from rungway.scheduler.store import StorageError, open_store
from rungway.scheduler.store.layout import validate_search_name
from rungway.workers.runner import SegmentSummary

from .config import LabConfig, period_start
from .errors import HeadStopped, NameTaken, UnknownSearch, UnknownTeam, WrongState
from .ledger import Ledger, LedgerRow
from .models import SearchDetail, SearchInfo, SearchUsage, TeamUsage, UsageReport

__all__ = ["LabHead", "PoolLike"]

log = logging.getLogger("rungway.lab")

_ACTIVE = ("running", "paused", "held")
_DEMAND_LIMIT = 100_000  # a search's demand is counted up to this many segments
_IDLE_STEP = 0.25  # seconds between steps of a search that has nothing new
# A search's snapshot only shortens its journal replay at restart; with hundreds of searches
# one every few seconds each would be most of the head's disk writes.
_PERSIST_SECONDS = 30.0
_COMPACT_SECONDS = 60.0  # the ledger's part files are merged (once 64 or more) this often


class PoolLike(Protocol):
    """What the head needs of its executor pool (``RayPool``, ``InlinePool``, or a stand-in)."""

    def lane(self, search: str) -> Executor: ...

    def forget(self, search: str) -> None: ...

    def poll(self, timeout: float) -> int: ...

    def drain_link(self) -> None: ...

    def capacity(self) -> float: ...

    def memory_mb(self) -> int: ...

    def close(self) -> None: ...


@dataclass
class _Search:
    name: str
    team: str
    priority: int
    submitted_at: float
    spec: SearchSpec | None  # None while the stored spec cannot be read (the search is faulted)
    spec_text: str
    state: str = "running"
    reason: str | None = None
    driver: SearchDriver | None = None
    last_stats: dict[str, Any] = field(default_factory=dict)
    demand: tuple[int, float, int, int] | None = None  # last Demand sent: waiting, cpus, memory, priority
    yielding: dict[tuple[int, int], float] = field(default_factory=dict)  # segment -> deadline (pause)
    preempted: set[tuple[int, int]] = field(default_factory=set)
    wall_started: dict[tuple[int, int], float] = field(default_factory=dict)
    last_step: float = -math.inf
    viewer: SearchDriver | None = None  # a finished search's state, read back for showing


class LabHead:
    """Holds the lab's searches and runs them all; thread-safe public methods for the API."""

    def __init__(
        self,
        config: LabConfig,
        pool: PoolLike | None = None,
        *,
        clock: Callable[[], float] = time.monotonic,
        wall: Callable[[], float] = time.time,
        health: HealthSettings = HealthSettings(no_cpus_timeout=None),  # a lab waits for its cluster
    ) -> None:
        self.config = config
        self.store_root = config.store_root
        self.store = open_store(self.store_root, create=True)
        self.ledger = Ledger(self.store_root)
        self.clock = clock
        self.wall = wall
        self.health = health
        self._pool = pool
        self._lock = threading.RLock()
        self._thread: threading.Thread | None = None
        self._stopping = threading.Event()
        self._searches: dict[str, _Search] = {}
        self._ledger_rows: list[LedgerRow] = []
        self._capacity: tuple[float, int] | None = None
        self._capacity_checked = -math.inf
        self._period_began = period_start(config.head.allowance_period, wall())
        self._period_used: dict[str, float] = {}  # CPU-seconds per team this period, ended segments
        self._running_since: dict[str, tuple[str, float, float]] = {}  # segment -> team, cpus, started at
        self.loop_error: str | None = None
        self._want_drivers = True  # a search may need a driver opened (set on every state change)
        self._ledger_compacted = clock()
        self.sharing = SharingState()
        self._journal = Journal(self._lab_dir() / "journal")
        self._replay()

    # ---- state on disk --------------------------------------------------------------------

    def _lab_dir(self) -> Path:
        if "://" in self.store_root and not self.store_root.startswith("file://"):
            raise SpecError("the lab's head keeps its journal on a POSIX path (local disk or NFS); "
                            f"mount the store and give its path, not {self.store_root}", field="head.store")
        return Path(self.store_root.removeprefix("file://")) / "lab"

    def _replay(self) -> None:
        unreadable: dict[str, str | None] = {}
        for entry in self._journal.entries_after(0):
            kind, name = entry["e"], entry["name"]
            if kind == "submit":
                try:
                    text = self.store.search(name).read_spec()
                    why = None
                except StorageError as exc:
                    text, why = "", str(exc)
                if text is None:
                    log.warning("search %s was submitted but its spec is not in the store; skipped", name)
                    continue
                s = _Search(name, entry["team"], int(entry["priority"]), float(entry["at"]), None, text)
                s.spec, unreadable[name] = self._parse_stored(name, text) if why is None else (None, why)
                self._searches[name] = s
            elif name in self._searches:
                s = self._searches[name]
                s.state, s.reason = entry["state"], entry.get("reason")
        for s in self._searches.values():
            if s.spec is None:  # one search's damaged spec faults that search, not the head
                s.state, s.reason = "faulted", unreadable[s.name]
                log.warning("search %s is faulted: %s", s.name, s.reason)
        if self._searches:
            log.info("restored %d searches from the lab journal", len(self._searches))

    def _parse_stored(self, name: str, text: str) -> tuple[SearchSpec | None, str | None]:
        """The stored spec of search ``name``, or None and why it cannot be read."""
        path = f"{self.store.search(name).layout.spec}"
        try:
            return parse_spec(text, source=path), None
        except Exception as exc:  # noqa: BLE001 (a damaged file: any parse error faults the search)
            return None, (f"its stored spec cannot be read: {exc}. Put back the spec it was submitted with "
                          f"at {path}, then resume the search")

    def _fault(self, s: _Search, what: str, exc: BaseException) -> None:
        """Whatever went wrong with one search faults that search alone (state and reason shown
        to its team and the admin); the head and every other search go on."""
        log.warning("search %s faulted while %s", s.name, what, exc_info=exc)
        reason = str(exc) if isinstance(exc, (StorageError, SpecError)) else f"{type(exc).__name__}: {exc}"
        if s.driver is not None:
            try:
                self._close_driver(s)
            except Exception:  # noqa: BLE001 (already faulting; the driver's own state is suspect)
                log.warning("search %s: its driver could not be closed cleanly", s.name, exc_info=True)
                s.driver = None
        self._set_state(s, "faulted", f"{what}: {reason}")

    def _record(self, entry: dict[str, Any]) -> None:
        self._journal.append([entry])

    # ---- the public API (thread-safe) ------------------------------------------------------

    def submit(self, team: str, spec_text: str, priority: int = 0) -> SearchInfo:
        try:
            quota = self.config.team(team)
        except KeyError:
            raise UnknownTeam(f"the lab config has no team {team!r}") from None
        spec = parse_spec(spec_text, source="spec")
        validate_search_name(spec.name)
        cap = quota.cap_cpus
        if cap is not None and spec.resources.cpus > cap:
            raise SpecError(f"one trial asks for {spec.resources.cpus} CPUs but team {team!r} may use at most "
                            f"{cap}; ask for fewer", field="resources.cpus")
        with self._lock:
            if self._stopping.is_set():
                raise HeadStopped("the head is shutting down; submit again once it is back")
            if spec.name in self._searches:
                raise NameTaken(f"a search named {spec.name!r} already exists; give yours another name")
            files = self.store.search(spec.name)
            if files.read_spec() is not None:
                raise NameTaken(f"the store already holds a search named {spec.name!r}; give yours another name")
            twin = self.store.case_twin(spec.name)
            if twin is not None:
                raise NameTaken(f"the store already holds a search named {twin!r}, which differs from {spec.name!r} "
                                "only in letter case; give yours another name")
            s = _Search(spec.name, team, priority, self.wall(), spec, spec_text)
            # Journaled first: a head killed between the two has a submission whose spec is
            # missing (skipped at restart, the name free again), never a spec nobody owns.
            self._record({"e": "submit", "name": s.name, "team": team, "priority": priority, "at": s.submitted_at})
            files.write_spec(spec_text)
            self._searches[s.name] = s
            self._want_drivers = True
            log.info("team %s submitted search %s (priority %d)", team, s.name, priority)
            return self._info(s)

    def searches(self, team: str | None = None) -> list[SearchInfo]:
        with self._lock:
            return [self._info(s) for s in self._ordered() if team is None or s.team == team]

    def search(self, name: str) -> SearchDetail:
        with self._lock:
            s = self._get(name)
            info = self._info(s).model_dump()
            stats = self._stats(s)
            leaderboard = []
            source = s.driver if s.driver is not None else s.viewer
            if source is not None:
                core = source.core
                for t in core.leaderboard(10):
                    leaderboard.append({"trial": t.id, "rung": t.rung, "budget": float(t.budget), "state": t.state,
                                        "value": None if t.loss is None else _finite(core.value_of(t.loss)),
                                        "config": t.config})
            # A rung's bracket is Li et al.'s s (docs/scheduling.md), as `rungway show` names it.
            rungs = [dict(r, bracket=br.get("s", len(br["rungs"]) - 1),
                          **({"iteration": br["iteration"]} if "iteration" in br else {}))
                     for br in stats.get("brackets", []) for r in br["rungs"]]
            return SearchDetail(**info, leaderboard=leaderboard, rungs=_jsonable(rungs),
                                statistics=_jsonable({k: v for k, v in stats.items() if k != "brackets"}))

    def owner(self, name: str) -> str:
        with self._lock:
            return self._get(name).team

    def pause(self, name: str) -> SearchInfo:
        with self._lock:
            s = self._get(name)
            if s.state not in ("running", "held"):
                raise WrongState(f"search {name!r} is {s.state}; only a running or held search can be paused")
            self._set_state(s, "paused", None)
            deadline = self.clock() + self.config.head.preempt_deadline
            if s.driver is not None:
                for key in s.driver.running_segments():
                    s.driver.executor.ask_to_yield(*key)
                    s.yielding[key] = deadline
            return self._info(s)

    def resume(self, name: str) -> SearchInfo:
        with self._lock:
            s = self._get(name)
            if s.state not in ("paused", "faulted"):
                raise WrongState(f"search {name!r} is {s.state}; only a paused or faulted search can be resumed")
            if s.spec is None:
                text = self.store.search(name).read_spec() or ""
                spec, why = self._parse_stored(name, text)
                if spec is None:
                    raise WrongState(f"search {name!r} cannot resume: {why}")
                s.spec, s.spec_text = spec, text
            self._set_state(s, "running", None)
            return self._info(s)

    def cancel(self, name: str) -> SearchInfo:
        with self._lock:
            s = self._get(name)
            if s.state in ("finished", "cancelled"):
                raise WrongState(f"search {name!r} is already {s.state}")
            self._close_driver(s)
            self._set_state(s, "cancelled", None)
            return self._info(s)

    def usage(self, team: str | None = None, period: str | None = None, since: float | None = None,
              until: float | None = None) -> UsageReport:
        period = period or self.config.head.allowance_period
        now = self.wall()
        if since is None and period != "all":
            since = period_start(period, now)
        until = now if until is None else until
        with self._lock:
            self._write_ledger()
            teams_used, per_search = self.ledger.usage(since, until)
            stats = self.sharing.statistics().get("teams", {}) if self._capacity is not None else {}
            teams = []
            for q in self.config.teams:
                if team is not None and q.name != team:
                    continue
                used = teams_used.get(q.name, {})
                mine = [s for s in self._searches.values() if s.team == q.name]
                teams.append(TeamUsage(
                    team=q.name, guarantee_cpus=q.guarantee_cpus, cap_cpus=q.cap_cpus, weight=q.weight,
                    allowance_cpu_hours=q.allowance_cpu_hours, used_cpu_hours=used.get("cpu_hours", 0.0),
                    memory_mb_hours=used.get("memory_mb_hours", 0.0),
                    cpus_running=float(stats.get(q.name, {}).get("running_cpus", 0.0)),
                    reserved_cpu_hours=used.get("reserved_cpu_hours", 0.0),
                    searches=sum(1 for s in mine if s.state in _ACTIVE),
                    held=any(s.state == "held" for s in mine),
                ))
            searches = [SearchUsage(team=r["team"], search=r["search"], cpu_hours=r["cpu_hours"],
                                    reserved_cpu_hours=r["reserved_cpu_hours"], segments=r["segments"])
                        for r in per_search if team is None or r["team"] == team]
            charged = {u.search for u in searches}
            searches += [SearchUsage(team=s.team, search=s.name, cpu_hours=0.0, segments=0) for s in self._ordered()
                         if s.name not in charged and (team is None or s.team == team)]  # nothing charged yet
            return UsageReport(period=period, since=since, until=until, teams=teams, searches=searches)

    # ---- lifecycle -------------------------------------------------------------------------

    def start(self) -> None:
        """Start the loop thread (connects to Ray through the pool given, or a new RayPool)."""
        if self._pool is None:
            from rungway.scheduler.head.executor import RayPool

            self._pool = RayPool()
        self._configure(force=True)
        self._thread = threading.Thread(target=self._loop_guarded, name="rungway-lab", daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 30.0) -> None:
        """Stop the loop: running segments are requeued from their checkpoints, state written."""
        self._stopping.set()
        if self._thread is not None:
            self._thread.join(timeout)
        with self._lock:
            for s in self._searches.values():
                if s.driver is not None:
                    self._close_driver(s)
            self._write_ledger()
            self._journal.close()
            if self._pool is not None:
                self._pool.close()

    def run_for(self, seconds: float, until: Callable[[], bool] | None = None) -> None:
        """Run the loop in this thread (tests and tools): for ``seconds`` or until ``until()``."""
        if self._pool is None:
            raise RuntimeError("run_for needs a pool given to the constructor")
        if self._capacity is None:
            self._configure(force=True)
        end = self.clock() + seconds
        while self.clock() < end and not (until is not None and until()):
            self.turn()

    def _loop_guarded(self) -> None:
        while not self._stopping.is_set():
            try:
                self.turn()
            except Exception:  # the head keeps serving; the error is shown and logged
                self.loop_error = traceback.format_exc()
                log.exception("the lab's loop failed; retrying in 1 s")
                time.sleep(1.0)

    # ---- one turn of the loop --------------------------------------------------------------

    def turn(self) -> None:
        pool = self._pool
        assert pool is not None
        busy = any(s.driver is not None and s.driver.running for s in self._searches.values())
        pool.poll(self.config.head.round_seconds if busy else 0.0)
        pool.drain_link()  # relay posts (heartbeats, rung results) routed to the searches' lanes
        if not busy:
            time.sleep(min(self.config.head.round_seconds, 0.05))
        with self._lock:
            now = self.clock()
            self._configure()
            if self._capacity is None:
                return
            self._roll_period()
            if self._want_drivers:
                self._open_drivers()
            decision = self.sharing.apply(Tick(now))
            assert decision is not None
            grants = {g.search: g.count for g in decision.grants}
            for p in decision.preemptions:
                s, key = self._segment(p.segment)
                if s is not None and s.driver is not None:
                    s.driver.executor.ask_to_yield(*key)
                    s.preempted.add(key)
                    log.info("preempting %s/%s/%s for %s (%s), deadline in %.0fs", s.name, key[0], key[1],
                             p.beneficiary or p.team, p.reason, p.deadline - now)
            for f in decision.force_stop:
                s, key = self._segment(f.segment)
                if s is not None and s.driver is not None:
                    s.driver.stop_segment(*key, why="preempted: did not yield by its deadline")
            held = {(p.team, p.search): p.reason for p in decision.paused}
            for s in list(self._searches.values()):
                if s.state == "running" and (s.team, s.name) in held:
                    self._set_state(s, "held", held[(s.team, s.name)])
                elif s.state == "held" and (s.team, s.name) not in held and s.reason == ALLOWANCE_SPENT:
                    self._set_state(s, "running", None)
                if s.driver is None:
                    continue
                grant = grants.get(s.name, 0)
                # A search with no grant, nothing finished and nothing to watch waits for the
                # next periodic step (health, heartbeats, limits): 500 idle searches cost little.
                if (grant or s.yielding or s.demand is None or now - s.last_step >= _IDLE_STEP
                        or s.driver.executor.news()):
                    try:
                        self._step(s, s.driver, grant, now)
                    except Exception as exc:  # noqa: BLE001 (contained: this search's fault alone)
                        self._fault(s, "running", exc)
                    s.last_step = now
            self._write_ledger()
            if now - self._ledger_compacted >= _COMPACT_SECONDS:
                self._ledger_compacted = now
                self.ledger.compact(min_parts=64)

    def _step(self, s: _Search, d: SearchDriver, grant: int, now: float) -> None:
        for key, deadline in list(s.yielding.items()):
            if key not in d.running:
                del s.yielding[key]
            elif now >= deadline:
                d.stop_segment(*key, why="search paused: did not yield by its deadline")
                del s.yielding[key]
        if s.state != "running":
            grant = 0
        d.step(wait=0.0, grant=grant)
        if d.over:
            report = self._close_driver(s)
            if report is None or report.paused_reason:
                reason = report.paused_reason if report is not None else "its state could not be written"
                self._set_state(s, "faulted", reason)
                log.warning("search %s stopped: %s", s.name, reason)
            elif report.failing:  # it could only fail: faulted, with why and its first failure
                reason = f"failing: {report.failing}; first failure: {report.first_failure or 'none recorded'}"
                self._set_state(s, "faulted", reason)
                log.warning("search %s stopped: %s", s.name, reason)
            else:
                self._set_state(s, "finished", report.limit)  # the limit that ended it, if one did
                log.info("search %s finished (%d segments)", s.name, report.segments)
            return
        s.last_stats = {}
        waiting = d.backlog(_DEMAND_LIMIT) if s.state in ("running", "held") else 0
        demand = (waiting, float(s.spec.resources.cpus), int(s.spec.resources.memory_mb), s.priority)
        if demand != s.demand:
            self.sharing.apply(Demand(s.team, s.name, *demand))
            s.demand = demand

    def _open_drivers(self) -> None:
        """Searches that should run but have no driver yet (new, resumed or restored)."""
        self._want_drivers = False
        now = self.clock()
        teams = {t.name for t in self.config.teams}
        for i, s in enumerate(self._ordered()):
            if s.team not in teams:  # removed from the lab config since it was submitted
                if s.state in _ACTIVE:
                    self._close_driver(s)
                    self._set_state(s, "held", _team_missing(s.team))
                    log.warning("search %s is held: its team %s is not in the lab config", s.name, s.team)
                continue
            if s.state == "held" and s.reason == _team_missing(s.team):
                self._set_state(s, "running", None)  # its team is back in the config
            if s.driver is None and s.state in _ACTIVE:
                # Idle searches' periodic steps are spread over the interval, not all in one turn.
                s.last_step = now - _IDLE_STEP * ((i * 0.6180339887) % 1.0)
                try:
                    s.driver = SearchDriver(s.spec, s.spec_text, self.store_root, self._pool.lane(s.name),  # type: ignore[union-attr]
                                            health=self.health, listener=self, persist_seconds=_PERSIST_SECONDS,
                                            prefetch=self.config.head.queued_per_slot)
                    s.driver.begin()
                    s.driver.stagger(((i * 0.6180339887) % 1.0))
                except Exception as exc:  # noqa: BLE001 (contained: this search's fault alone)
                    s.driver = None
                    self._fault(s, "starting", exc)

    def _close_driver(self, s: _Search) -> RunReport | None:
        """End the search's driver (running segments requeued, state written) and let go of
        its share and lane; the driver stays as the search's read-only view. None when its
        final state could not be written."""
        if s.driver is None:
            return None
        d, s.driver = s.driver, None
        report = None
        try:
            report = d.end()
            s.last_stats = report.statistics
            s.viewer = d
        except StorageError as exc:
            log.warning("search %s: %s", s.name, exc)
        self._withdraw(s)
        if self._pool is not None:
            self._pool.forget(s.name)
        return report

    def _withdraw(self, s: _Search) -> None:
        if s.demand is not None:
            try:
                self.sharing.apply(Withdrawn(s.team, s.name))
            except Exception:  # never declared: nothing to forget
                pass
            s.demand = None

    # ---- the listener of every driver -------------------------------------------------------

    def started(self, search: str, trial: int, attempt: int, rung: int) -> None:
        s = self._searches[search]
        if s.demand is None:  # started before its first Demand (a drain check that found work)
            demand = (1, float(s.spec.resources.cpus), int(s.spec.resources.memory_mb), s.priority)
            self.sharing.apply(Demand(s.team, s.name, *demand))
            s.demand = demand
        s.wall_started[(trial, attempt)] = self.wall()
        at = max(self.clock(), self.sharing.now)
        self.sharing.apply(Started(_segment_id(search, trial, attempt), s.team, search, float(s.spec.resources.cpus),
                                   int(s.spec.resources.memory_mb), at))
        self._running_since[_segment_id(search, trial, attempt)] = (s.team, float(s.spec.resources.cpus), at)
        if s.demand is not None and s.demand[0] > 0:  # the sharing state counted the start down
            s.demand = (s.demand[0] - 1, *s.demand[1:])

    def ended(self, search: str, trial: int, attempt: int, rung: int, outcome: str, cpu_seconds: float,
              summary: SegmentSummary | None, node: str, reserved_seconds: float) -> None:
        s = self._searches[search]
        sid = _segment_id(search, trial, attempt)
        at = max(self.clock(), self.sharing.now)
        try:
            self.sharing.apply(Ended(sid, at=at))
        except Exception:  # not known to the sharing state (started before a restart)
            pass
        self._running_since.pop(sid, None)
        began = s.wall_started.pop((trial, attempt), None)
        cpus = float(s.spec.resources.cpus)
        if summary is not None and summary.ended >= summary.started > 0:
            start, end = summary.started, summary.ended
        else:  # the worker never answered: held for the seconds the driver saw it running
            end = self.wall()
            start = end - reserved_seconds / cpus if cpus else end
        if began is not None and summary is None:
            start = min(max(start, began), end)
        ran = max(0.0, end - start)
        memory = int(s.spec.resources.memory_mb)
        self._ledger_rows.append(LedgerRow(
            team=s.team, search=search, trial=trial, attempt=attempt, rung=rung, node=node or "",
            started=start, ended=end, cpus=cpus, cpu_seconds=max(0.0, float(cpu_seconds)),
            reserved_cpu_seconds=cpus * ran, memory_mb=memory, memory_mb_seconds=memory * ran, outcome=outcome,
            preempted=(trial, attempt) in s.preempted,
        ))
        s.preempted.discard((trial, attempt))
        self._period_used[s.team] = self._period_used.get(s.team, 0.0) + max(0.0, float(cpu_seconds))
        self._count_usage(s.team, at)

    def _count_usage(self, team: str, at: float) -> None:
        """The team's allowance usage in the sharing state, in CPU time: what its ended segments
        used this period, plus what its running ones have reserved so far (the sharing state
        accrues them by reservation until they end)."""
        running = sum(cpus * max(0.0, at - since) for t, cpus, since in self._running_since.values() if t == team)
        try:
            self.sharing.apply(QuotaChanged(team, used_cpu_hours=(self._period_used.get(team, 0.0) + running) / 3600,
                                            at=at))
        except Exception:  # the sharing state is not configured yet, or the team left the config
            pass

    # ---- helpers ---------------------------------------------------------------------------

    def _write_ledger(self) -> None:
        if self._ledger_rows:
            rows, self._ledger_rows = self._ledger_rows, []
            try:
                self.ledger.append(rows)
            except StorageError:
                self._ledger_rows = rows + self._ledger_rows  # kept for the next try
                raise

    def _configure(self, force: bool = False) -> None:
        """Tell the sharing state the cluster's size and the teams (again when the size changes)."""
        now = self.clock()
        if not force and now - self._capacity_checked < 2.0:
            return
        self._capacity_checked = now
        pool = self._pool
        assert pool is not None
        capacity = (float(pool.capacity()), int(pool.memory_mb()))
        if capacity[0] <= 0 or capacity[1] <= 0:
            log.warning("the cluster reports no CPUs or no memory yet; waiting")
            return
        if capacity == self._capacity and not force:
            return
        first = self._capacity is None
        self._capacity = capacity
        quotas = self.config.quotas()
        if first:
            used = self.ledger.cpu_seconds_by_team(since=self._period_began)
            for team, seconds in used.items():  # plus what ended before this (it is in the ledger's buffer)
                self._period_used[team] = seconds + self._period_used.get(team, 0.0)
            quotas = tuple(replace(q, used_cpu_hours=used.get(q.name, 0.0) / 3600) for q in quotas)
        promised = sum(q.guarantee_cpus for q in quotas)
        if promised > capacity[0] > 0:
            # A node is gone (or the cluster is smaller than the lab planned): guarantees shrink
            # in proportion until it is back, so that they still add up to what there is.
            scale = capacity[0] / promised
            quotas = tuple(replace(q, guarantee_cpus=math.floor(q.guarantee_cpus * scale * 1000) / 1000) for q in quotas)
            log.warning("the teams' guarantees add up to %.3g CPUs but the cluster has %.3g; scaled by %.3f",
                        promised, capacity[0], scale)
        self.sharing.apply(TeamsConfigured(capacity[0], capacity[1], quotas, self.config.head.preempt_deadline))
        log.info("cluster: %.0f CPUs, %d MB; %d teams", capacity[0], capacity[1], len(quotas))

    def _roll_period(self) -> None:
        began = period_start(self.config.head.allowance_period, self.wall())
        if began != self._period_began:
            self._period_began = began
            self._period_used.clear()
            for q in self.config.teams:
                self.sharing.apply(QuotaChanged(q.name, used_cpu_hours=0.0))
            log.info("a new allowance period began; usage counts from 0")

    def _set_state(self, s: _Search, state: str, reason: str | None) -> None:
        if (s.state, s.reason) == (state, reason):
            return
        s.state, s.reason = state, reason
        self._want_drivers = True
        self._record({"e": "state", "name": s.name, "state": state, "reason": reason})
        if state not in ("running", "held"):  # a held search keeps its demand: it is held for it
            if s.demand is not None and s.demand[0] != 0:
                self.sharing.apply(Demand(s.team, s.name, 0, *s.demand[1:]))
                s.demand = (0, *s.demand[1:])

    def _segment(self, sid: str | int) -> tuple[_Search | None, tuple[int, int]]:
        search, trial, attempt = str(sid).rsplit("/", 2)
        return self._searches.get(search), (int(trial), int(attempt))

    def _get(self, name: str) -> _Search:
        s = self._searches.get(name)
        if s is None:
            raise UnknownSearch(f"no search named {name!r}")
        return s

    def _ordered(self) -> list[_Search]:
        return sorted(self._searches.values(), key=lambda s: (s.submitted_at, s.name))

    def _stats(self, s: _Search) -> dict[str, Any]:
        if s.driver is not None:
            return s.driver.statistics()
        if not s.last_stats and s.state not in _ACTIVE:
            # Over before this head started: read its state back from the store, once.
            from rungway.scheduler.head.executor import InlineExecutor

            if s.spec is None:
                return {}
            try:
                d = SearchDriver(s.spec, s.spec_text, self.store_root, InlineExecutor(0.0), lease=False)
            except Exception as exc:  # noqa: BLE001 (shown as the search's reason, never a 500)
                log.warning("search %s: cannot read its state: %s", s.name, exc)
                if s.reason is None:
                    s.reason = f"its state cannot be read: {exc}"
                return {}
            try:
                s.last_stats = d.statistics()
                s.viewer = d  # kept for its leaderboard
            finally:
                d.journal.close()
        return s.last_stats

    def _info(self, s: _Search) -> SearchInfo:
        stats = self._stats(s)
        best = stats.get("best") or {}
        running, queued = s.driver.running_now() if s.driver is not None else (0, 0)
        return SearchInfo(
            name=s.name, team=s.team, priority=s.priority, state=s.state, reason=s.reason,  # type: ignore[arg-type]
            submitted_at=s.submitted_at, metric=s.spec.metric if s.spec else "", better=s.spec.better if s.spec else None,
            trials=int(stats.get("trials", 0)), segments=int(stats.get("segments", 0)),
            running_segments=running, queued_segments=queued,
            cpus_busy=running * float(s.spec.resources.cpus) if s.spec else 0.0,
            cpu_seconds=float(stats.get("cpu_seconds", 0.0)),
            reserved_cpu_seconds=float(stats.get("reserved_cpu_seconds", stats.get("cpu_seconds", 0.0))),
            leader_value=_finite(best.get("value")), leader=best.get("trial"),
        )


def _team_missing(team: str) -> str:
    return f"team {team!r} is not in the lab config"


def _segment_id(search: str, trial: int, attempt: int) -> str:
    return f"{search}/{trial}/{attempt}"


def _finite(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _jsonable(value: Any) -> Any:
    """Statistics as JSON (non-finite floats become None)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
