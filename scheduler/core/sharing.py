"""Sharing one CPU cluster among teams: guarantees, caps, weights and allowances.

Theory of operation. ``SharingState`` is a deterministic state machine. It is told what the
cluster holds and what each team is promised (``TeamsConfigured``, ``QuotaChanged``), what each
search has waiting (``Demand``), which segments run (``Started``, ``Ended``) and what time it is
(``Tick``). On every tick it plans one round (``plan_round``): which searches may start how
many segments on the free capacity (``Grant``), which running segments are asked to save and
yield by a deadline (``Preempt``), which of those are past their deadline and still running
(``ForceStop``), and which searches are held back (``Paused``). It never reads a clock and
never draws a random number; time is passed in as numbers (seconds). The caller carries the
decision out and reports back with events: a granted segment that starts is a ``Started``; a
preempted segment that stops is an ``Ended`` (putting it back in its search's queue, and
telling us so with a ``Demand``, is the caller's business). A grant holds for the round it
was made in: what the caller does not start before the next round is simply planned again.

The rules (a round first sets aside the teams whose allowance is spent, rule 5, then applies
1 to 3 in that order):

1. **Guarantees first.** A team is *below its guarantee* when one of its waiting segments
   would still fit under ``guarantee_cpus`` on top of what it runs; guarantees are honoured in
   whole segments. Such teams are served first from the free capacity, the team that has been
   below its guarantee the longest first, then the one with the smallest fraction of its
   guarantee.
2. **What is left is lent by weight, up to caps.** Each round computes every team's *fair
   share* of the CPUs by water-filling (weighted max-min fairness by progressive filling):
   each team starts from the part of its guarantee it wants, then a common level rises and
   every team's share grows with it at the rate ``weight / dominant share per CPU``, where the
   dominant share per CPU is the larger of one CPU's share of the cluster's CPUs and of the
   memory that comes with a CPU in the team's demand as a share of the cluster's memory
   (dominant resource fairness, Ghodsi et al., NSDI 2011). A team stops at its cap or at what
   it wants (running plus waiting); everybody stops when the CPUs run out, and every team that
   needs memory stops when the memory does. With CPU-only demands this gives each team its
   guarantee plus a share of what is left proportional to its weight. The free capacity then
   goes one segment at a time to the team that is the most segments below its fair share
   (rounding the water-filling to whole segments, largest remainder first), if the segment
   fits and keeps the team within ``cap_cpus``, which is never exceeded, idle cluster or not.
   A team whose next segment does not fit is passed over for the rest of the round, so no
   free capacity that an allowed waiting segment could use stays idle.
3. **Preemption for guarantees only.** When a team below its guarantee has a segment waiting
   and the free capacity (plus what segments already asked to yield will free) cannot take
   it, borrowed segments are preempted: a team's running segments, oldest first, are *within
   its guarantee* while they add up to no more than ``guarantee_cpus``; the rest are
   *borrowed*. Victims come from the team furthest above its fair share (in CPUs, not
   counting what it already yields), one segment at a time, newest first so that the least
   work is lost, and never so many that the victim drops below its guarantee. Each victim
   gets a deadline, ``now + preempt_deadline``; the first round at or after the deadline
   orders a force stop if it still runs. Until the victims end, the free capacity the waiting
   segment will also need is *held* (``Hold``), not lent, and later rounds serve the team
   that has been below its guarantee the longest first, so what was preempted for it goes
   to it. A team whose cap was lowered below what it runs has its newest segments preempted
   the same way, down to the cap.
4. **No starvation inside a team.** A team's next segment goes to its highest-priority search
   with waiting work that fits; searches of equal priority take turns (round-robin, by name,
   from a cursor kept in the state), so a waiting search waits at most as many of its team's
   grants at that priority as there are searches there. A search whose segment does not fit
   the room left is skipped for the rest of that step, so a smaller one may fill the room.
5. **Allowances.** A team with a CPU-hour allowance whose usage (passed in, then accrued from
   the segments it sees: CPUs x seconds run) has reached it gets nothing new; its searches
   with waiting work are reported ``Paused(..., "allowance spent")``. What runs keeps running.

CPU amounts are kept in thousandths of a CPU (integers), so sums are exact and a restored
state adds up exactly as the original did. Ties are broken by team name, then search name.

Known limit: lending is work-conserving, so a team whose segments are larger than what frees
at a time can be kept from borrowing while smaller segments of other teams fill the room; its
guarantee is still honoured by preemption.

Cost: an event is O(log n) comparisons (plus a list insertion); a round is
O(T log T + S + (g + p) log T) for T teams, S searches with waiting work in the teams it
serves, g segments granted and p preempted, independent of how many segments wait in each
search.
See ``docs/sharing.md`` for a worked example and ``bench/sharing_round.py`` for the figures.
"""

from __future__ import annotations

import heapq
import math
from bisect import bisect_left, bisect_right, insort
from collections import deque
from collections.abc import Mapping
from dataclasses import dataclass
from itertools import chain
from typing import Any

from .errors import RejectedEvent, SpecError

__all__ = [
    # configuration and events
    "TeamQuota",
    "TeamsConfigured",
    "QuotaChanged",
    "Demand",
    "Withdrawn",
    "Started",
    "Ended",
    "Tick",
    "SharingEvent",
    "KEEP",
    # decisions
    "Grant",
    "Preempt",
    "ForceStop",
    "Paused",
    "Hold",
    "RoundDecision",
    # the state machine
    "SharingState",
    "SegmentView",
    "plan_round",
    "ALLOWANCE_SPENT",
    "SNAPSHOT_FORMAT",
]

SNAPSHOT_FORMAT = 1
ALLOWANCE_SPENT = "allowance spent"
REASON_GUARANTEE = "guarantee"
REASON_CAP = "cap"

_MILLI = 1000  # CPU amounts are kept in thousandths of a CPU
_MCS_PER_CPU_HOUR = 3600 * _MILLI  # milli-CPU-seconds in a CPU-hour
_NO_CAP = 1 << 62


class _Keep:
    """Marker for a ``QuotaChanged`` field that keeps its current value."""

    __slots__ = ()

    def __repr__(self) -> str:
        return "KEEP"


KEEP: Any = _Keep()


# ---- configuration and events ---------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class TeamQuota:
    """What one team is promised. ``cap_cpus=None``: no cap. ``allowance_cpu_hours=None``: no
    allowance. ``used_cpu_hours``: usage so far in the allowance's period (``None`` keeps what
    the state has accrued; a new team starts at 0)."""

    name: str
    guarantee_cpus: float = 0
    cap_cpus: float | None = None
    weight: float = 1.0
    allowance_cpu_hours: float | None = None
    used_cpu_hours: float | None = None


@dataclass(frozen=True, slots=True)
class TeamsConfigured:
    """The cluster and its teams. May be applied again: teams that remain keep their searches,
    segments and usage; a team that still runs segments cannot be removed."""

    capacity_cpus: float
    capacity_memory_mb: int
    teams: tuple[TeamQuota, ...]
    preempt_deadline: float = 60.0


@dataclass(frozen=True, slots=True)
class QuotaChanged:
    """Change one team's quota; fields left at ``KEEP`` keep their value. ``used_cpu_hours``
    (when given) resets the usage accounting to that figure as of ``at`` (default: the time
    of the last tick), e.g. 0 at the start of a new allowance period."""

    team: str
    guarantee_cpus: Any = KEEP
    cap_cpus: Any = KEEP
    weight: Any = KEEP
    allowance_cpu_hours: Any = KEEP
    used_cpu_hours: float | None = None
    at: float | None = None


@dataclass(frozen=True, slots=True)
class Demand:
    """Search ``search`` of ``team`` has ``waiting`` segments waiting, each needing ``cpus`` and
    ``memory_mb``. Absolute, not a difference; the latest one wins."""

    team: str
    search: str
    waiting: int
    cpus: float
    memory_mb: int = 0
    priority: int = 0


@dataclass(frozen=True, slots=True)
class Withdrawn:
    """Forget a search's demand; its running segments stay accounted to the team until they end."""

    team: str
    search: str


@dataclass(frozen=True, slots=True)
class Started:
    """A segment started. It was one of its search's waiting segments (the count goes down)."""

    segment: str | int
    team: str
    search: str
    cpus: float
    memory_mb: int
    started_at: float


@dataclass(frozen=True, slots=True)
class Ended:
    """A segment stopped: finished, failed, yielded or was stopped. ``at`` defaults to the time
    of the last tick (or to its start, if that is later)."""

    segment: str | int
    at: float | None = None


@dataclass(frozen=True, slots=True)
class Tick:
    """Time is ``now``: plan a round."""

    now: float


SharingEvent = TeamsConfigured | QuotaChanged | Demand | Withdrawn | Started | Ended | Tick


# ---- decisions ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Grant:
    """Start up to ``count`` waiting segments of ``search`` of ``team`` now."""

    team: str
    search: str
    count: int


@dataclass(frozen=True, slots=True)
class Preempt:
    """Ask ``segment`` to save and yield by ``deadline``. ``reason``: ``"guarantee"`` (for the
    guarantee of team ``beneficiary``) or ``"cap"`` (its team runs above a lowered cap)."""

    segment: str | int
    team: str
    deadline: float
    reason: str
    beneficiary: str | None = None


@dataclass(frozen=True, slots=True)
class ForceStop:
    """``segment`` was asked to yield, its deadline has passed and it still runs: stop it."""

    segment: str | int
    team: str


@dataclass(frozen=True, slots=True)
class Paused:
    """``search`` has work waiting but gets nothing new, for ``reason``."""

    team: str
    search: str
    reason: str


@dataclass(frozen=True, slots=True)
class Hold:
    """Free capacity kept for ``team``'s guarantee until preempted segments end."""

    team: str
    cpus: float
    memory_mb: int


@dataclass(frozen=True, slots=True)
class RoundDecision:
    now: float
    grants: tuple[Grant, ...] = ()
    preemptions: tuple[Preempt, ...] = ()
    force_stop: tuple[ForceStop, ...] = ()
    paused: tuple[Paused, ...] = ()
    held: tuple[Hold, ...] = ()


@dataclass(frozen=True, slots=True)
class SegmentView:
    """A read-only look at one running segment. ``borrowed``: beyond the oldest-first prefix
    of its team's segments that fits in the guarantee. ``deadline``: when asked to yield."""

    segment: str | int
    team: str
    search: str
    cpus: float
    memory_mb: int
    started_at: float
    borrowed: bool
    deadline: float | None
    forced: bool


# ---- validation helpers ---------------------------------------------------------------------


def _fail(error: type[Exception], message: str, field: str) -> Exception:
    if error is SpecError:
        return SpecError(message, field=field)
    return error(f"{field}: {message}")


def _number(value: Any, field: str, error: type[Exception]) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _fail(error, f"must be a finite number, got {value!r}", field)
    return value


def _milli(value: Any, field: str, error: type[Exception], *, positive: bool = False) -> int:
    value = _number(value, field, error)
    scaled = value * _MILLI
    m = round(scaled)
    if abs(scaled - m) > 1e-6:
        raise _fail(error, f"CPUs are counted in steps of 0.001, got {value!r}", field)
    if m < 0 or (positive and m == 0):
        raise _fail(error, f"must be {'> 0' if positive else '>= 0'}, got {value!r}", field)
    return int(m)


def _count(value: Any, field: str, error: type[Exception]) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value != int(value) or value < 0:
        raise _fail(error, f"must be a whole number >= 0, got {value!r}", field)
    return int(value)


def _cpus(m: int) -> float:
    return m / _MILLI


def _name(value: Any, field: str, error: type[Exception]) -> str:
    if not isinstance(value, str) or not value:
        raise _fail(error, f"must be a non-empty string, got {value!r}", field)
    return value


# ---- internal records -----------------------------------------------------------------------


class _Search:
    __slots__ = ("name", "priority", "waiting", "mc", "mem")

    def __init__(self, name: str, priority: int, mc: int, mem: int) -> None:
        self.name = name
        self.priority = priority
        self.waiting = 0
        self.mc = mc
        self.mem = mem


class _Segment:
    __slots__ = ("id", "team", "search", "mc", "mem", "started_at", "seq", "deadline", "forced")

    def __init__(self, sid: str | int, team: str, search: str, mc: int, mem: int, started_at: float, seq: int) -> None:
        self.id = sid
        self.team = team
        self.search = search
        self.mc = mc
        self.mem = mem
        self.started_at = started_at
        self.seq = seq
        self.deadline: float | None = None  # set when asked to yield
        self.forced = False


class _Team:
    __slots__ = (
        "name", "index", "guarantee", "cap", "limit", "weight", "allowance_h", "allowance", "acc", "start_sum",
        "running", "memory", "yield_mc", "yield_mem", "order", "searches", "rings", "levels",
        "cursor", "since", "waiting", "wait_mc", "wait_mem", "fair",
    )

    def __init__(self, name: str) -> None:
        self.name = name
        self.index = 0
        self.guarantee = 0  # milli-CPUs
        self.cap: int | None = None
        self.limit = _NO_CAP  # cap, or "no cap"
        self.weight = 1.0
        self.allowance_h: float | None = None  # CPU-hours, as given
        self.allowance: float | None = None  # the same in milli-CPU-seconds
        self.acc = 0.0  # usage accounting, milli-CPU-seconds: usage(t) = acc + t * running - start_sum
        self.start_sum = 0.0
        self.running = 0  # milli-CPUs of running segments
        self.memory = 0
        self.yield_mc = 0  # of those, asked to yield
        self.yield_mem = 0
        self.order: list[tuple[float, int, str | int]] = []  # running segments by (started_at, seq)
        self.searches: dict[str, _Search] = {}
        self.rings: dict[int, list[str]] = {}  # priority -> names of searches with work waiting
        self.levels: list[int] = []  # priorities with work waiting, highest first
        self.cursor: dict[int, str] = {}  # priority -> the search served last
        self.since: float | None = None  # below its guarantee since (a round's time)
        self.waiting = 0  # segments waiting, over all searches
        self.wait_mc = 0  # and what they need
        self.wait_mem = 0
        self.fair = 0.0  # fair share at the last round, milli-CPUs (for reading only)

    def usage(self, now: float) -> float:
        return self.acc + now * self.running - self.start_sum

    def spent(self, now: float) -> bool:
        return self.allowance is not None and self.usage(now) >= self.allowance


def _fair_shares(base: list[float], upper: list[float], rate: list[float], per_cpu_mem: list[float],
                 cpu: int, mem: int) -> list[float]:
    """Weighted max-min fair CPU amounts by water-filling (progressive filling).

    Team i gets ``min(upper_i, base_i + rate_i * t)`` for a water level t raised until the
    CPUs run out, or the memory does (``per_cpu_mem_i``: memory per CPU of what the team
    wants); a team stops rising at its upper bound, and every team that uses memory stops
    when the memory runs out. ``rate_i = weight_i / dominant share per CPU`` makes the level
    a weighted dominant share (DRF). O(n log n) for n teams.
    """
    n = len(base)
    x = list(base)
    fixed_c = fixed_m = 0.0
    active = []
    for i in range(n):
        if upper[i] > base[i] and rate[i] > 0:
            active.append(i)
        else:
            fixed_c += base[i]
            fixed_m += base[i] * per_cpu_mem[i]
    base_c = fixed_c + sum(base[i] for i in active)
    base_m = fixed_m + sum(base[i] * per_cpu_mem[i] for i in active)
    rate_c = sum(rate[i] for i in active)
    rate_m = sum(rate[i] * per_cpu_mem[i] for i in active)
    order = sorted(((upper[i] - base[i]) / rate[i], i) for i in active)
    alive = set(active)
    level = 0.0
    k = 0
    while alive:
        t_cpu = (cpu - base_c) / rate_c
        t_mem = (mem - base_m) / rate_m if rate_m > 0 else math.inf
        while order[k][1] not in alive:
            k += 1
        t_top, j = order[k]
        t = min(t_cpu, t_mem, t_top)
        level = max(level, t)
        if t == t_cpu:  # the CPUs ran out: everybody stops here
            break
        if t == t_mem:  # the memory ran out: every team that uses memory stops here
            for i in [i for i in alive if per_cpu_mem[i] > 0]:
                alive.discard(i)
                x[i] = min(upper[i], base[i] + rate[i] * level)
                rate_c -= rate[i]
                rate_m -= rate[i] * per_cpu_mem[i]
                base_c += x[i] - base[i]
                base_m += (x[i] - base[i]) * per_cpu_mem[i]
            rate_m = 0.0 if not any(per_cpu_mem[i] > 0 for i in alive) else rate_m
            continue
        alive.discard(j)  # team j reached its bound
        x[j] = upper[j]
        rate_c -= rate[j]
        rate_m -= rate[j] * per_cpu_mem[j]
        base_c += upper[j] - base[j]
        base_m += (upper[j] - base[j]) * per_cpu_mem[j]
        if not alive:
            break
        if rate_c <= 0:
            break
    for i in alive:
        x[i] = min(upper[i], base[i] + rate[i] * level)
    return x


class _Picker:
    """A team's queue as one round sees it: priority levels top-down, round-robin inside a
    level from the team's cursor. ``peek`` finds the next search whose segment fits the room
    given; one that does not is skipped for the rest of the step (``restart`` begins a step)."""

    __slots__ = ("team", "left", "last", "granted", "level", "queue", "frozen")

    def __init__(self, team: _Team) -> None:
        self.team = team
        self.left: dict[str, int] = {}
        self.last = dict(team.cursor)
        self.granted: dict[int, str] = {}
        self.level = 0
        self.queue: deque[_Search] | None = None
        self.frozen = False  # the team reserved this round: keep its cursor where it was

    def restart(self) -> None:
        self.level = 0
        self.queue = None

    def peek(self, max_mc: int, max_mem: int) -> _Search | None:
        team = self.team
        levels = team.levels
        while self.level < len(levels):
            queue = self.queue
            if queue is None:
                p = levels[self.level]
                ring = team.rings[p]
                k = bisect_right(ring, self.last.get(p, ""))
                searches, left = team.searches, self.left
                queue = deque()
                for name in chain(ring[k:], ring[:k]):
                    n = left.get(name)
                    if n is None:
                        s = searches[name]
                        n = left[name] = s.waiting
                    if n > 0:
                        queue.append(searches[name])
                self.queue = queue
            while queue:
                s = queue[0]
                if s.mc <= max_mc and s.mem <= max_mem:
                    return s
                queue.popleft()
            self.level += 1
            self.queue = None
        return None

    def take(self, granted: bool) -> None:
        queue = self.queue
        assert queue
        s = queue.popleft()
        n = self.left[s.name] - 1
        self.left[s.name] = n
        if n > 0:
            queue.append(s)
        self.last[s.priority] = s.name
        if granted and not self.frozen:
            self.granted[s.priority] = s.name


# ---- the state machine ----------------------------------------------------------------------


class SharingState:
    """The sharing rules for one cluster. Apply events; ``plan_round`` (or ``Tick``) decides."""

    def __init__(self) -> None:
        self._configured = False
        self._cpu = 0  # milli-CPUs
        self._mem = 0
        self._deadline = 60.0
        self._teams: list[_Team] = []  # by name
        self._by_name: dict[str, _Team] = {}
        self._segments: dict[str | int, _Segment] = {}
        self._deadlines: list[tuple[float, int, str | int]] = []  # heap of (deadline, seq, segment)
        self._now = -math.inf
        self._seq = 0
        self._run_mc = 0
        self._run_mem = 0
        self._handlers = {
            TeamsConfigured: self._configure,
            QuotaChanged: self._quota,
            Demand: self._demand,
            Withdrawn: self._withdraw,
            Started: self._started,
            Ended: self._ended,
            Tick: lambda e: self.plan_round(e.now),
        }

    # ---- the one entry point ------------------------------------------------------------

    def apply(self, event: SharingEvent) -> RoundDecision | None:
        """Apply one event. ``Tick`` returns the round's decision; the others return None.
        A refused event (``RejectedEvent``, ``SpecError``) leaves the state unchanged."""
        try:
            handler = self._handlers[type(event)]
        except KeyError:
            raise RejectedEvent(f"not an event the sharing rules know: {event!r}") from None
        if not self._configured and type(event) is not TeamsConfigured:
            raise RejectedEvent("no teams configured yet: apply TeamsConfigured first")
        return handler(event)

    # ---- configuration ------------------------------------------------------------------

    def _configure(self, e: TeamsConfigured) -> None:
        cpu = _milli(e.capacity_cpus, "capacity_cpus", SpecError, positive=True)
        mem = _count(e.capacity_memory_mb, "capacity_memory_mb", SpecError)
        if mem == 0:
            raise SpecError("must be > 0", field="capacity_memory_mb")
        deadline = _number(e.preempt_deadline, "preempt_deadline", SpecError)
        if deadline < 0:
            raise SpecError(f"must be >= 0 seconds, got {deadline!r}", field="preempt_deadline")
        quotas: dict[str, tuple[int, int | None, float, float | None, float | None]] = {}
        for q in e.teams:
            if not isinstance(q, TeamQuota):
                raise SpecError(f"each team must be a TeamQuota, got {q!r}", field="teams")
            name = _name(q.name, "teams.name", SpecError)
            if name in quotas:
                raise SpecError("appears twice", field=f"teams.{name}")
            quotas[name] = self._check_quota(name, q.guarantee_cpus, q.cap_cpus, q.weight, q.allowance_cpu_hours,
                                             q.used_cpu_hours, cpu)
        total = sum(g for g, *_ in quotas.values())
        if total > cpu:
            raise SpecError(f"the guarantees add up to {_cpus(total)} CPUs, more than the cluster's {_cpus(cpu)}",
                            field="teams")
        for team in self._teams:
            if team.name not in quotas and (team.order or team.waiting):
                raise RejectedEvent(f"team {team.name!r} still has running segments or waiting work; it cannot be removed")
        # all checked: commit
        now = self._now if math.isfinite(self._now) else 0.0
        teams = []
        for name in sorted(quotas):
            team = self._by_name.get(name) or _Team(name)
            guarantee, cap, weight, allowance, used = quotas[name]
            self._set_quota(team, guarantee, cap, weight, allowance, used, now)
            teams.append(team)
        for i, team in enumerate(teams):
            team.index = i
        self._teams = teams
        self._by_name = {t.name: t for t in teams}
        self._cpu, self._mem, self._deadline = cpu, mem, deadline
        self._configured = True

    @staticmethod
    def _check_quota(name: str, guarantee: Any, cap: Any, weight: Any, allowance: Any, used: Any,
                     cpu: int) -> tuple[int, int | None, float, float | None, float | None]:
        prefix = f"teams.{name}"
        g = _milli(guarantee, f"{prefix}.guarantee_cpus", SpecError)
        if g > cpu:
            raise SpecError(f"{_cpus(g)} CPUs is more than the cluster's {_cpus(cpu)}", field=f"{prefix}.guarantee_cpus")
        c = None if cap is None else _milli(cap, f"{prefix}.cap_cpus", SpecError)
        if c is not None and c < g:
            raise SpecError(f"{_cpus(c)} CPUs is below the team's guarantee of {_cpus(g)}; a cap must be >= the guarantee",
                            field=f"{prefix}.cap_cpus")
        w = _number(weight, f"{prefix}.weight", SpecError)
        if w <= 0:
            raise SpecError(f"must be > 0, got {w!r}", field=f"{prefix}.weight")
        a = None
        if allowance is not None:
            a = _number(allowance, f"{prefix}.allowance_cpu_hours", SpecError)
            if a < 0:
                raise SpecError(f"must be >= 0, got {a!r}", field=f"{prefix}.allowance_cpu_hours")
        u = None
        if used is not None:
            u = _number(used, f"{prefix}.used_cpu_hours", SpecError)
            if u < 0:
                raise SpecError(f"must be >= 0, got {u!r}", field=f"{prefix}.used_cpu_hours")
        return g, c, float(w), a, u

    @staticmethod
    def _set_quota(team: _Team, guarantee: int, cap: int | None, weight: float, allowance: float | None,
                   used: float | None, at: float) -> None:
        if guarantee != team.guarantee:
            team.since = None
        team.guarantee = guarantee
        team.cap = cap
        team.limit = _NO_CAP if cap is None else cap
        team.weight = weight
        team.allowance_h = allowance
        team.allowance = None if allowance is None else allowance * _MCS_PER_CPU_HOUR
        if used is not None:
            # usage(at) = used: segments running now count only from ``at`` on
            team.acc = used * _MCS_PER_CPU_HOUR - (at * team.running - team.start_sum)

    def _quota(self, e: QuotaChanged) -> None:
        team = self._team(e.team)
        keep = lambda value, current: current if value is KEEP else value  # noqa: E731
        guarantee = keep(e.guarantee_cpus, _cpus(team.guarantee))
        cap = keep(e.cap_cpus, None if team.cap is None else _cpus(team.cap))
        weight = keep(e.weight, team.weight)
        allowance = keep(e.allowance_cpu_hours, team.allowance_h)
        g, c, w, a, u = self._check_quota(team.name, guarantee, cap, weight, allowance, e.used_cpu_hours, self._cpu)
        total = sum(t.guarantee for t in self._teams if t is not team) + g
        if total > self._cpu:
            raise SpecError(f"the guarantees would add up to {_cpus(total)} CPUs, more than the cluster's {_cpus(self._cpu)}",
                            field=f"teams.{team.name}.guarantee_cpus")
        if e.at is None:
            at = self._now if math.isfinite(self._now) else 0.0
        else:
            at = _number(e.at, "QuotaChanged.at", RejectedEvent)
        if e.guarantee_cpus is not KEEP or e.cap_cpus is not KEEP:
            team.since = None
        self._set_quota(team, g, c, w, a, u, at)

    # ---- demand and segments ------------------------------------------------------------

    def _team(self, name: Any) -> _Team:
        team = self._by_name.get(name)
        if team is None:
            raise RejectedEvent(f"team {name!r} is not configured")
        return team

    @staticmethod
    def _ring_add(team: _Team, s: _Search) -> None:
        ring = team.rings.get(s.priority)
        if ring is None:
            ring = team.rings[s.priority] = []
            team.levels = sorted(team.rings, reverse=True)
        insort(ring, s.name)

    @staticmethod
    def _ring_remove(team: _Team, s: _Search) -> None:
        ring = team.rings[s.priority]
        del ring[bisect_left(ring, s.name)]
        if not ring:
            del team.rings[s.priority]
            team.levels = sorted(team.rings, reverse=True)

    def _set_waiting(self, team: _Team, s: _Search, waiting: int) -> None:
        if s.waiting > 0 and waiting == 0:
            self._ring_remove(team, s)
        elif s.waiting == 0 and waiting > 0:
            self._ring_add(team, s)
        delta = waiting - s.waiting
        team.waiting += delta
        team.wait_mc += delta * s.mc
        team.wait_mem += delta * s.mem
        s.waiting = waiting

    def _demand(self, e: Demand) -> None:
        team = self._team(e.team)
        name = _name(e.search, "Demand.search", RejectedEvent)
        waiting = _count(e.waiting, "Demand.waiting", RejectedEvent)
        mc = _milli(e.cpus, "Demand.cpus", RejectedEvent, positive=True)
        mem = _count(e.memory_mb, "Demand.memory_mb", RejectedEvent)
        if isinstance(e.priority, bool) or not isinstance(e.priority, int):
            raise RejectedEvent(f"Demand.priority: must be an integer, got {e.priority!r}")
        s = team.searches.get(name)
        if s is None:
            s = team.searches[name] = _Search(name, e.priority, mc, mem)
        elif (s.priority, s.mc, s.mem) != (e.priority, mc, mem):
            self._set_waiting(team, s, 0)
            s.priority, s.mc, s.mem = e.priority, mc, mem
        self._set_waiting(team, s, waiting)

    def _withdraw(self, e: Withdrawn) -> None:
        team = self._team(e.team)
        s = team.searches.get(e.search)
        if s is None:
            raise RejectedEvent(f"team {team.name!r} has no search {e.search!r}")
        self._set_waiting(team, s, 0)
        del team.searches[e.search]

    def _started(self, e: Started) -> None:
        team = self._team(e.team)
        sid = e.segment
        if isinstance(sid, bool) or not isinstance(sid, (str, int)):
            raise RejectedEvent(f"Started.segment: must be a string or an integer, got {sid!r}")
        if sid in self._segments:
            raise RejectedEvent(f"segment {sid!r} is already running")
        s = team.searches.get(e.search)
        if s is None:
            raise RejectedEvent(f"team {team.name!r} has no search {e.search!r}: declare it with Demand first")
        mc = _milli(e.cpus, "Started.cpus", RejectedEvent, positive=True)
        mem = _count(e.memory_mb, "Started.memory_mb", RejectedEvent)
        at = _number(e.started_at, "Started.started_at", RejectedEvent)
        self._seq += 1
        seg = _Segment(sid, team.name, s.name, mc, mem, at, self._seq)
        self._segments[sid] = seg
        self._add_running(team, seg)
        if s.waiting > 0:
            self._set_waiting(team, s, s.waiting - 1)

    def _add_running(self, team: _Team, seg: _Segment) -> None:
        order = team.order
        key = (seg.started_at, seg.seq, seg.id)
        if not order or order[-1][:2] < key[:2]:
            order.append(key)
        else:
            order.insert(bisect_left(order, key[:2]), key)
        team.running += seg.mc
        team.memory += seg.mem
        team.start_sum += seg.mc * seg.started_at
        self._run_mc += seg.mc
        self._run_mem += seg.mem
        if seg.deadline is not None:
            team.yield_mc += seg.mc
            team.yield_mem += seg.mem

    def _ended(self, e: Ended) -> None:
        seg = self._segments.get(e.segment)
        if seg is None:
            raise RejectedEvent(f"segment {e.segment!r} is not running")
        if e.at is None:
            at = max(self._now, seg.started_at)
        else:
            at = _number(e.at, "Ended.at", RejectedEvent)
            if at < seg.started_at:
                raise RejectedEvent(f"segment {seg.id!r} cannot end at {at!r}, before it started ({seg.started_at!r})")
        del self._segments[seg.id]
        team = self._by_name[seg.team]
        order = team.order
        del order[bisect_left(order, (seg.started_at, seg.seq))]
        team.running -= seg.mc
        team.memory -= seg.mem
        team.start_sum -= seg.mc * seg.started_at
        team.acc += seg.mc * (at - seg.started_at)
        self._run_mc -= seg.mc
        self._run_mem -= seg.mem
        if seg.deadline is not None:
            team.yield_mc -= seg.mc
            team.yield_mem -= seg.mem

    # ---- a round ------------------------------------------------------------------------

    def plan_round(self, now: float) -> RoundDecision:
        """Plan one round at time ``now`` (not before the last round's)."""
        if not self._configured:
            raise RejectedEvent("no teams configured yet: apply TeamsConfigured first")
        now = _number(now, "now", RejectedEvent)
        if now < self._now:
            raise RejectedEvent(f"time went backwards: {now!r} is before the last round at {self._now!r}")
        self._now = now
        return _Round(self, now).run()

    # ---- reading ------------------------------------------------------------------------

    @property
    def now(self) -> float:
        return self._now

    def segments(self) -> list[SegmentView]:
        """Running segments, by team, oldest first."""
        out = []
        for team in self._teams:
            total = 0
            for _at, _seq, sid in team.order:
                seg = self._segments[sid]
                total += seg.mc
                out.append(SegmentView(sid, team.name, seg.search, _cpus(seg.mc), seg.mem, seg.started_at,
                                       total > team.guarantee, seg.deadline, seg.forced))
        return out

    def statistics(self) -> dict[str, Any]:
        """A read-only snapshot: the cluster's totals and, per team, what it runs, is promised
        and has waiting."""
        now = self._now if math.isfinite(self._now) else 0.0
        teams = {}
        for team in self._teams:
            total = borrowed = 0
            for _at, _seq, sid in team.order:
                mc = self._segments[sid].mc
                total += mc
                if total > team.guarantee:
                    borrowed += mc
            waiting_mc = sum(s.waiting * s.mc for s in team.searches.values())
            teams[team.name] = {
                "running_cpus": _cpus(team.running),
                "running_memory_mb": team.memory,
                "running_segments": len(team.order),
                "guarantee_cpus": _cpus(team.guarantee),
                "cap_cpus": None if team.cap is None else _cpus(team.cap),
                "weight": team.weight,
                "waiting_segments": team.waiting,
                "waiting_cpus": _cpus(waiting_mc),
                "borrowed_cpus": _cpus(borrowed),
                "fair_share_cpus": team.fair / _MILLI,
                "yielding_cpus": _cpus(team.yield_mc),
                "searches": len(team.searches),
                "allowance_cpu_hours": team.allowance_h,
                "used_cpu_hours": team.usage(now) / _MCS_PER_CPU_HOUR,
                "paused": team.waiting > 0 and team.spent(now),
                "below_guarantee_since": team.since,
            }
        return {
            "now": self._now if math.isfinite(self._now) else None,
            "capacity_cpus": _cpus(self._cpu),
            "capacity_memory_mb": self._mem,
            "running_cpus": _cpus(self._run_mc),
            "running_memory_mb": self._run_mem,
            "teams": teams,
        }

    # ---- snapshot -----------------------------------------------------------------------

    def snapshot(self) -> dict[str, Any]:
        """The whole state as JSON-compatible data."""
        if not self._configured:
            raise RejectedEvent("nothing to snapshot: no teams configured yet")
        teams = []
        for t in self._teams:
            teams.append({
                "name": t.name,
                "guarantee": t.guarantee,
                "cap": t.cap,
                "weight": t.weight,
                "allowance": t.allowance_h,
                "acc": t.acc,
                "start_sum": t.start_sum,
                "since": t.since,
                "fair": t.fair,
                "cursor": [[p, name] for p, name in sorted(t.cursor.items())],
                "searches": [[s.name, s.priority, s.waiting, s.mc, s.mem] for s in t.searches.values()],
            })
        segments = [
            [s.id, s.team, s.search, s.mc, s.mem, s.started_at, s.seq, s.deadline, s.forced]
            for s in self._segments.values()
        ]
        return {
            "format": SNAPSHOT_FORMAT,
            "capacity": [self._cpu, self._mem],
            "preempt_deadline": self._deadline,
            "now": self._now if math.isfinite(self._now) else None,
            "seq": self._seq,
            "teams": teams,
            "segments": segments,
        }

    @classmethod
    def restore(cls, snapshot: Mapping[str, Any]) -> SharingState:
        """A state equal to the one the snapshot was taken from."""
        if snapshot.get("format") != SNAPSHOT_FORMAT:
            raise RejectedEvent(f"snapshot format {snapshot.get('format')!r} is not {SNAPSHOT_FORMAT}")
        state = cls()
        state._cpu, state._mem = (int(x) for x in snapshot["capacity"])
        state._deadline = snapshot["preempt_deadline"]
        state._now = -math.inf if snapshot["now"] is None else snapshot["now"]
        state._seq = int(snapshot["seq"])
        for i, data in enumerate(snapshot["teams"]):
            team = _Team(data["name"])
            team.index = i
            team.guarantee = int(data["guarantee"])
            team.cap = None if data["cap"] is None else int(data["cap"])
            team.limit = _NO_CAP if team.cap is None else team.cap
            team.weight = data["weight"]
            team.allowance_h = data["allowance"]
            team.allowance = None if team.allowance_h is None else team.allowance_h * _MCS_PER_CPU_HOUR
            team.since = data["since"]
            team.fair = data["fair"]
            team.cursor = {int(p): name for p, name in data["cursor"]}
            for name, priority, waiting, mc, mem in data["searches"]:
                s = team.searches[name] = _Search(name, int(priority), int(mc), int(mem))
                state._set_waiting(team, s, int(waiting))
            state._teams.append(team)
            state._by_name[team.name] = team
        for sid, tname, search, mc, mem, started_at, seq, deadline, forced in snapshot["segments"]:
            seg = _Segment(sid, tname, search, int(mc), int(mem), started_at, int(seq))
            seg.deadline = deadline
            seg.forced = bool(forced)
            state._segments[sid] = seg
            state._add_running(state._by_name[tname], seg)
            if deadline is not None and not seg.forced:
                state._deadlines.append((deadline, seg.seq, sid))
        heapq.heapify(state._deadlines)
        # the running sums were rebuilt in another order; take the recorded ones
        for team, data in zip(state._teams, snapshot["teams"], strict=True):
            team.acc = data["acc"]
            team.start_sum = data["start_sum"]
        state._configured = True
        return state


class _Round:
    """One round's working numbers: tentative allocations, the free and yielding pools."""

    __slots__ = ("st", "now", "teams", "alloc", "mem", "pickers", "free_mc", "free_mem", "yield_mc", "yield_mem",
                 "held", "grants", "preemptions", "victims", "vptr", "reserving", "stuck", "fair", "unit")

    def __init__(self, st: SharingState, now: float) -> None:
        self.st = st
        self.now = now
        self.teams = st._teams
        self.alloc = [t.running for t in self.teams]  # tentative: running + granted + reserved
        self.mem = [t.memory for t in self.teams]
        self.pickers: dict[int, _Picker] = {}
        self.free_mc = st._cpu - st._run_mc
        self.free_mem = st._mem - st._run_mem
        self.yield_mc = 0
        self.yield_mem = 0
        self.held: dict[int, list[int]] = {}
        self.grants: dict[tuple[int, str], int] = {}
        self.preemptions: list[Preempt] = []
        self.victims: list[tuple[float, int]] | None = None
        self.vptr: dict[int, int] = {}
        self.reserving: set[int] = set()
        self.stuck: set[int] = set()
        self.fair: list[float] = []  # fair share per team, milli-CPUs
        self.unit: list[float] = []  # a team's typical segment, milli-CPUs

    def picker(self, i: int) -> _Picker:
        p = self.pickers.get(i)
        if p is None:
            p = self.pickers[i] = _Picker(self.teams[i])
        return p

    def grant(self, i: int, s: _Search) -> None:
        key = (i, s.name)
        self.grants[key] = self.grants.get(key, 0) + 1

    def run(self) -> RoundDecision:
        now, teams = self.now, self.teams
        force = self._force_stops()
        eligible = []
        paused: list[Paused] = []
        for t in teams:
            if t.waiting == 0:
                continue
            if t.spent(now):
                for p in t.levels:
                    paused.extend(Paused(t.name, name, ALLOWANCE_SPENT) for name in t.rings[p])
            else:
                eligible.append(t)
        for t in teams:
            if t.cap is not None and t.running - t.yield_mc > t.cap:
                self._cut_to_cap(t)
        for t in teams:
            self.yield_mc += t.yield_mc
            self.yield_mem += t.yield_mem
        self.fair = self._fair(eligible)
        for t, x in zip(teams, self.fair):
            t.fair = x
        self._guarantees(eligible)
        self._lend(eligible)
        # bookkeeping for the next round
        below = self.reserving | self.stuck
        for t in teams:
            if t.index in below:
                if t.since is None:
                    t.since = now
            else:
                t.since = None
        for i, pk in self.pickers.items():
            teams[i].cursor.update(pk.granted)
        return RoundDecision(
            now=now,
            grants=tuple(Grant(teams[i].name, name, n) for (i, name), n in self.grants.items()),
            preemptions=tuple(self.preemptions),
            force_stop=tuple(force),
            paused=tuple(paused),
            held=tuple(Hold(teams[i].name, _cpus(c), m) for i, (c, m) in sorted(self.held.items()) if c or m),
        )

    def _fair(self, eligible: list[_Team]) -> list[float]:
        """Every team's fair share of the CPUs for what runs and waits now (rule 2), and the
        size of its typical waiting segment."""
        st = self.st
        cpu, mem = st._cpu, st._mem
        wants = {t.index for t in eligible}
        base, upper, rate, per_cpu, unit = [], [], [], [], self.unit
        for t in self.teams:
            want_mc, want_mem = t.running, t.memory
            if t.index in wants:
                want_mc += t.wait_mc
                want_mem += t.wait_mem
                unit.append(t.wait_mc / t.waiting)
            else:
                unit.append(1.0)
            ub = min(t.limit, want_mc)
            if ub < want_mc and t.running < ub:  # the cap binds: whole segments under it
                step = min(t.searches[name].mc for p in t.levels for name in t.rings[p])
                ub = t.running + (ub - t.running) // step * step
            ub = float(ub)
            mu = want_mem / want_mc if want_mc else 0.0
            upper.append(ub)
            base.append(min(float(t.guarantee), ub))
            per_cpu.append(mu)
            rate.append(t.weight / max(1.0 / cpu, mu / mem))
        return _fair_shares(base, upper, rate, per_cpu, cpu, mem)

    def _force_stops(self) -> list[ForceStop]:
        st, heap, out = self.st, self.st._deadlines, []
        while heap and heap[0][0] <= self.now:
            _deadline, seq, sid = heapq.heappop(heap)
            seg = st._segments.get(sid)
            if seg is None or seg.seq != seq or seg.forced:
                continue
            seg.forced = True
            out.append(ForceStop(sid, seg.team))
        return out

    def _preempt(self, seg: _Segment, reason: str, beneficiary: str | None) -> None:
        st = self.st
        team = st._by_name[seg.team]
        if seg.deadline is None:  # not a tentative victim already counted
            team.yield_mc += seg.mc
            team.yield_mem += seg.mem
        seg.deadline = self.now + st._deadline
        heapq.heappush(st._deadlines, (seg.deadline, seg.seq, seg.id))
        self.preemptions.append(Preempt(seg.id, team.name, seg.deadline, reason, beneficiary))

    def _newest_free(self, t: _Team) -> _Segment | None:
        """The team's newest segment not asked to yield (nor picked as a victim this round)."""
        segs = self.st._segments
        i = self.vptr.get(t.index, len(t.order) - 1)
        while i >= 0:
            seg = segs[t.order[i][2]]
            if seg.deadline is None:
                self.vptr[t.index] = i - 1
                return seg
            i -= 1
        self.vptr[t.index] = -1
        return None

    def _cut_to_cap(self, t: _Team) -> None:
        assert t.cap is not None
        while t.running - t.yield_mc > t.cap:
            seg = self._newest_free(t)
            if seg is None:
                break
            self._preempt(seg, REASON_CAP, None)

    # -- rule 1 and 3: guarantees, preempting for them --

    def _guarantees(self, eligible: list[_Team]) -> None:
        run, now = self.alloc, self.now
        heap = [
            (now if t.since is None else t.since, t.running / t.guarantee, t.index)
            for t in eligible
            if t.guarantee > 0 and t.running < t.guarantee
        ]
        heapq.heapify(heap)
        while heap:
            since, _frac, i = heapq.heappop(heap)
            t = self.teams[i]
            pk = self.picker(i)
            s = pk.peek(t.guarantee - run[i], _NO_CAP)
            if s is None:
                continue  # no waiting segment fits under the guarantee: reached
            if i not in self.reserving and s.mc <= self.free_mc and s.mem <= self.free_mem:
                pk.take(True)
                self.grant(i, s)
                self.free_mc -= s.mc
                self.free_mem -= s.mem
            else:
                if not self._reserve(t, s):
                    self.stuck.add(i)
                    continue
                self.reserving.add(i)
                pk.frozen = True
                pk.take(False)
            run[i] += s.mc
            self.mem[i] += s.mem
            heapq.heappush(heap, (since, run[i] / t.guarantee, i))

    def _reserve(self, t: _Team, s: _Search) -> bool:
        """Claim room for ``s`` from what yielding segments will free, then from the free
        capacity; preempt borrowed segments for what is still missing."""
        tentative: list[_Segment] = []
        while s.mc > self.yield_mc + self.free_mc or s.mem > self.yield_mem + self.free_mem:
            seg = self._next_victim()
            if seg is None:
                self._roll_back(tentative)
                return False
            tentative.append(seg)
            self.yield_mc += seg.mc
            self.yield_mem += seg.mem
        for seg in tentative:
            seg.deadline = None  # _preempt counts it as yielding now
            team = self.st._by_name[seg.team]
            team.yield_mc -= seg.mc
            team.yield_mem -= seg.mem
            self._preempt(seg, REASON_GUARANTEE, t.name)
        from_yield_mc = min(s.mc, self.yield_mc)
        from_yield_mem = min(s.mem, self.yield_mem)
        self.yield_mc -= from_yield_mc
        self.yield_mem -= from_yield_mem
        hold_mc, hold_mem = s.mc - from_yield_mc, s.mem - from_yield_mem
        self.free_mc -= hold_mc
        self.free_mem -= hold_mem
        h = self.held.setdefault(t.index, [0, 0])
        h[0] += hold_mc
        h[1] += hold_mem
        return True

    def _next_victim(self) -> _Segment | None:
        if self.victims is None:
            self.victims = [
                (-self._victim_share(t), t.index) for t in self.teams if t.running - t.yield_mc > t.guarantee
            ]
            heapq.heapify(self.victims)
        heap = self.victims
        while heap:
            _share, i = heapq.heappop(heap)
            t = self.teams[i]
            if t.running - t.yield_mc <= t.guarantee:
                continue
            seg = self._newest_free(t)
            if seg is None:
                continue
            seg.deadline = math.inf  # tentative: marks it taken; counted as yielding below
            t.yield_mc += seg.mc
            t.yield_mem += seg.mem
            if t.running - t.yield_mc > t.guarantee:
                heapq.heappush(heap, (-self._victim_share(t), i))
            return seg
        return None

    def _victim_share(self, t: _Team) -> float:
        """How far the team runs above its fair share, not counting what already yields."""
        return t.running - t.yield_mc - self.fair[t.index]

    def _roll_back(self, tentative: list[_Segment]) -> None:
        for seg in tentative:
            seg.deadline = None
            team = self.st._by_name[seg.team]
            team.yield_mc -= seg.mc
            team.yield_mem -= seg.mem
            self.yield_mc -= seg.mc
            self.yield_mem -= seg.mem
            self.vptr.pop(team.index, None)
        self.victims = None  # rebuilt on demand

    # -- rule 2: lending what is left by weight --

    def _lend(self, eligible: list[_Team]) -> None:
        """Free capacity to the team the most segments below its fair share, one segment at
        a time (rounding the water-filling to whole segments, largest remainder first)."""
        run, mem, pickers, fair, unit = self.alloc, self.mem, self.pickers, self.fair, self.unit
        free_mc, free_mem = self.free_mc, self.free_mem
        heap = []
        for t in eligible:
            i = t.index
            if run[i] < t.limit:
                heap.append(((run[i] - fair[i]) / unit[i], i))
                pk = pickers.get(i)
                if pk is not None:
                    pk.restart()
        heapq.heapify(heap)
        teams, grants = self.teams, self.grants
        while heap and free_mc > 0:
            over, i = heap[0]
            t = teams[i]
            pk = pickers.get(i)
            if pk is None:
                pk = pickers[i] = _Picker(t)
            room = t.limit - run[i]
            s = pk.peek(free_mc if free_mc < room else room, free_mem)
            if s is None:
                heapq.heappop(heap)
                continue
            pk.take(True)
            key = (i, s.name)
            grants[key] = grants.get(key, 0) + 1
            free_mc -= s.mc
            free_mem -= s.mem
            run[i] += s.mc
            mem[i] += s.mem
            heapq.heapreplace(heap, (over + s.mc / unit[i], i))
        self.free_mc, self.free_mem = free_mc, free_mem


def plan_round(state: SharingState, now: float) -> RoundDecision:
    """Plan one round of ``state`` at time ``now``; the same as ``state.apply(Tick(now))``."""
    return state.plan_round(now)
