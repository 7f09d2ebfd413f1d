"""The sharing rules (``rungway.scheduler.core.sharing``), checked against outside sources.

- Dominant resource fairness: the worked example of Ghodsi et al., "Dominant Resource
  Fairness: Fair Allocation of Multiple Resource Types", NSDI 2011 (recalled from memory of
  the paper, section 4: 9 CPUs and 18 GB; user A's tasks need <1 CPU, 4 GB>, user B's
  <3 CPUs, 1 GB>; DRF gives A three tasks and B two), and random small instances against
  the continuous DRF allocation computed independently by progressive filling as a sequence
  of linear programs with ``scipy.optimize.linprog``.
- Weighted max-min fairness: in a saturated steady state with CPU-only demands, each team's
  allocation is compared with the weighted max-min fair allocation computed by the same
  independent LP progressive filling (maximise the smallest weighted share t, freeze the
  teams that cannot grow beyond it, repeat).
- A property test (hypothesis, stateful) drives the state with random arrivals, finishes,
  failures and quota changes through a small cluster model kept by the test, which applies
  the grants, preemptions and force stops and advances time, and checks after every round:
  caps, guarantees reached within one preemption deadline, no idle capacity while work that
  caps and allowances allow is waiting, priorities and the round-robin bound inside a team,
  allowances (usage computed by the model), and that a twin restored from a JSON snapshot
  decides exactly the same.
"""

from __future__ import annotations

import json
import random
import re
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule
from scipy.optimize import linprog

from rungway.scheduler.core.errors import RejectedEvent, SpecError
from rungway.scheduler.core.sharing import (
    ALLOWANCE_SPENT,
    Demand,
    Ended,
    ForceStop,
    Grant,
    Paused,
    Preempt,
    QuotaChanged,
    RoundDecision,
    SharingState,
    Started,
    TeamQuota,
    TeamsConfigured,
    Tick,
    Withdrawn,
    plan_round,
)

GB = 1024


# ---- an independent solver: progressive filling as a sequence of LPs -----------------------


def progressive_filling(base, slope, upper, usage, capacity, eps=1e-7):
    """Max-min fair x by progressive filling, each step a linear program (scipy's HiGHS).

    Every team i gets ``x_i >= base_i + slope_i * t``; maximise t subject to
    ``sum_i usage[k][i] * x_i <= capacity[k]`` and ``base_i <= x_i <= upper_i``; then freeze
    every team that cannot grow beyond its level at that t (a second LP per team: maximise
    x_i while the others keep their level) and repeat with the rest.
    """
    n = len(base)
    usage = np.asarray(usage, float)
    capacity = np.asarray(capacity, float)
    fixed: dict[int, float] = {}

    def bounds(t_bounds):
        return [(fixed[i], fixed[i]) if i in fixed else (base[i], upper[i]) for i in range(n)] + [t_bounds]

    def resource_rows():
        return [np.append(usage[k], 0.0) for k in range(len(capacity))], list(capacity)

    while len(fixed) < n:
        free = [i for i in range(n) if i not in fixed]
        a, b = resource_rows()
        for i in free:
            row = np.zeros(n + 1)
            row[i], row[-1] = -1.0, slope[i]
            a.append(row)
            b.append(-base[i])
        c = np.zeros(n + 1)
        c[-1] = -1.0
        res = linprog(c, A_ub=np.array(a), b_ub=np.array(b), bounds=bounds((0, None)), method="highs")
        assert res.status == 0, res.message
        t = res.x[-1]
        froze = False
        for i in free:
            a, b = resource_rows()
            for j in free:
                if j != i:
                    row = np.zeros(n + 1)
                    row[j] = -1.0
                    a.append(row)
                    b.append(-(base[j] + slope[j] * t))
            c = np.zeros(n + 1)
            c[i] = -1.0
            r2 = linprog(c, A_ub=np.array(a), b_ub=np.array(b), bounds=bounds((0, 0)), method="highs")
            assert r2.status == 0, r2.message
            if r2.x[i] <= base[i] + slope[i] * t + eps:
                fixed[i] = min(upper[i], base[i] + slope[i] * t)
                froze = True
        assert froze
    return [fixed[i] for i in range(n)]


def test_the_lp_solver_itself_on_a_hand_computed_case() -> None:
    # 10 CPUs, weights 1 and 3, no guarantees, team 0 wants at most 2: it gets 2, team 1 the rest.
    assert progressive_filling([0, 0], [1, 3], [2, 100], [[1, 1]], [10]) == pytest.approx([2, 8])
    # weights 1 and 3, unbounded: 2.5 and 7.5
    assert progressive_filling([0, 0], [1, 3], [100, 100], [[1, 1]], [10]) == pytest.approx([2.5, 7.5])


# ---- dominant resource fairness ----------------------------------------------------------


def _configured(capacity_cpus, memory_mb, teams, deadline=60.0) -> SharingState:
    state = SharingState()
    state.apply(TeamsConfigured(capacity_cpus, memory_mb, tuple(teams), preempt_deadline=deadline))
    return state


def _granted(decision: RoundDecision) -> dict[str, int]:
    out: dict[str, int] = defaultdict(int)
    for g in decision.grants:
        out[g.team] += g.count
    return dict(out)


def test_drf_worked_example_from_the_paper() -> None:
    """Ghodsi et al., NSDI 2011 (recalled from memory of the paper): 9 CPUs, 18 GB; A's tasks
    <1 CPU, 4 GB>, B's <3 CPUs, 1 GB>; DRF gives A 3 tasks and B 2 tasks."""
    state = _configured(9, 18 * GB, [TeamQuota("A"), TeamQuota("B")])
    state.apply(Demand("A", "a", 100, 1, 4 * GB))
    state.apply(Demand("B", "b", 100, 3, 1 * GB))
    decision = plan_round(state, 0)
    assert _granted(decision) == {"A": 3, "B": 2}
    # the same, whichever team is named first
    state = _configured(9, 18 * GB, [TeamQuota("B"), TeamQuota("A")])
    state.apply(Demand("B", "b", 100, 3, 1 * GB))
    state.apply(Demand("A", "a", 100, 1, 4 * GB))
    assert _granted(state.apply(Tick(0))) == {"A": 3, "B": 2}


drf_instances = st.tuples(
    st.integers(20, 80),  # CPUs
    st.integers(20, 160),  # memory, GB
    st.lists(
        st.tuples(st.integers(1, 4), st.integers(0, 8), st.integers(1, 120), st.sampled_from([1, 1, 2, 3])),
        min_size=2,
        max_size=4,
    ),  # per team: task CPUs, task memory (in 512 MB), tasks wanted, weight
)


@settings(max_examples=80, deadline=None)
@given(drf_instances)
def test_drf_against_the_continuous_lp_on_dominant_shares(instance) -> None:
    """One round on an empty cluster against continuous DRF (progressive filling on weighted
    dominant shares, solved with linprog). Tasks are indivisible, so the round cannot match
    the continuous optimum exactly; what must hold is that no team is shorted by more than
    one task of the largest weighted dominant share (the granularity of the round), and
    that the round leaves nothing that fits and is wanted."""
    cpus, mem_gb, tasks = instance
    memory = mem_gb * GB
    state = _configured(cpus, memory, [TeamQuota(f"t{i}", weight=w) for i, (*_, w) in enumerate(tasks)])
    for i, (c, m, n, _w) in enumerate(tasks):
        state.apply(Demand(f"t{i}", "s", n, c, m * 512))
    got = _granted(state.apply(Tick(0)))
    disc = [got.get(f"t{i}", 0) for i in range(len(tasks))]
    dom = [max(c / cpus, m * 512 / memory) for c, m, _n, _w in tasks]
    cont = progressive_filling(
        [0.0] * len(tasks),
        [w / d for (*_, w), d in zip(tasks, dom)],
        [n for _c, _m, n, _w in tasks],
        [[c for c, *_ in tasks], [m * 512 for _c, m, *_ in tasks]],
        [cpus, memory],
    )
    step = max(d / w for (*_, w), d in zip(tasks, dom))
    for i, (_c, _m, _n, w) in enumerate(tasks):
        assert disc[i] * dom[i] / w >= cont[i] * dom[i] / w - step - 1e-9, (i, disc, cont)
    used_c = sum(n * c for n, (c, *_) in zip(disc, tasks))
    used_m = sum(n * m * 512 for n, (_c, m, *_) in zip(disc, tasks))
    assert used_c <= cpus and used_m <= memory
    for n, (c, m, want, _w) in zip(disc, tasks):
        assert n == want or c > cpus - used_c or m * 512 > memory - used_m


# ---- weighted max-min fairness in a steady state ------------------------------------------

fair_instances = st.tuples(
    st.integers(8, 40),  # cluster CPUs
    st.sampled_from([1, 2]),  # segment CPUs, the same for every team
    st.lists(
        st.tuples(
            st.integers(0, 8),  # guarantee, in half CPUs of the (later scaled) cluster
            st.one_of(st.none(), st.integers(0, 40)),  # extra cap above the guarantee, CPUs
            st.sampled_from([0.5, 1, 1, 2, 3]),  # weight
            st.one_of(st.just(10_000), st.integers(1, 30)),  # segments wanted in flight
        ),
        min_size=2,
        max_size=5,
    ),
    st.integers(0, 2**32 - 1),  # seed of the segment durations
)


@settings(max_examples=40, deadline=None)
@given(fair_instances)
def test_shares_converge_to_the_weighted_max_min_fair_lp(instance) -> None:
    capacity, size, teams, seed = instance
    quotas, budget = [], capacity
    for i, (g2, extra, w, _want) in enumerate(teams):
        g = min(g2 / 2, budget)
        budget -= g
        quotas.append(TeamQuota(f"t{i}", guarantee_cpus=g, cap_cpus=None if extra is None else g + extra, weight=w))
    state = _configured(capacity, 10**6, quotas)
    rnd = random.Random(seed)
    want = {f"t{i}": t[3] for i, t in enumerate(teams)}
    running: dict[str, list[tuple[int, str]]] = {q.name: [] for q in quotas}  # (end time, id)
    counter = 0
    for now in range(200):
        for name, segs in running.items():
            for end, sid in [x for x in segs if x[0] <= now]:
                segs.remove((end, sid))
                state.apply(Ended(sid, at=now))
            # saturated: every segment that ends is replaced by one waiting
            state.apply(Demand(name, "s", max(0, want[name] - len(segs)), size))
        decision = state.apply(Tick(now))
        assert not decision.preemptions  # nobody borrows what another team is guaranteed here
        for g in decision.grants:
            for _ in range(g.count):
                counter += 1
                running[g.team].append((now + rnd.randint(1, 6), f"s{counter}"))
                state.apply(Started(f"s{counter}", g.team, "s", size, 0, now))
    # the independent LP: x_i >= g_i + w_i t, x_i <= min(cap_i, demand_i), sum x_i <= capacity
    # (a team holds whole segments, so a cap counts down to a multiple of the segment)
    upper = [min(capacity if q.cap_cpus is None else q.cap_cpus // size * size, want[q.name] * size) for q in quotas]
    base = [min(q.guarantee_cpus, u) for q, u in zip(quotas, upper)]
    fair = progressive_filling(base, [q.weight for q in quotas], upper, [[1] * len(quotas)], [capacity])
    for q, x in zip(quotas, fair):
        got = len(running[q.name]) * size
        assert abs(got - x) <= size + 1e-6, (q, got, x, fair)


# ---- configuration errors, allowances, simple cases ---------------------------------------


@pytest.mark.parametrize(
    ("teams", "capacity", "field"),
    [
        ([TeamQuota("a", guarantee_cpus=9)], 8, "teams.a.guarantee_cpus"),
        ([TeamQuota("a", guarantee_cpus=4, cap_cpus=3)], 8, "teams.a.cap_cpus"),
        ([TeamQuota("a", guarantee_cpus=5), TeamQuota("b", guarantee_cpus=4)], 8, "teams"),
        ([TeamQuota("a", weight=0)], 8, "teams.a.weight"),
        ([TeamQuota("a", allowance_cpu_hours=-1)], 8, "teams.a.allowance_cpu_hours"),
        ([TeamQuota("a", guarantee_cpus=0.0005)], 8, "teams.a.guarantee_cpus"),
        ([TeamQuota("a"), TeamQuota("a")], 8, "teams.a"),
        ([TeamQuota("a")], 0, "capacity_cpus"),
    ],
)
def test_invalid_configuration_is_a_spec_error_naming_the_field(teams, capacity, field) -> None:
    state = SharingState()
    with pytest.raises(SpecError) as info:
        state.apply(TeamsConfigured(capacity, 1000, tuple(teams)))
    assert info.value.field == field
    assert field in str(info.value)


def test_quota_changes_are_checked_and_a_refused_one_changes_nothing() -> None:
    state = _configured(8, 1000, [TeamQuota("a", guarantee_cpus=4, cap_cpus=6), TeamQuota("b", guarantee_cpus=2)])
    before = state.snapshot()
    with pytest.raises(SpecError) as info:
        state.apply(QuotaChanged("a", cap_cpus=3))
    assert info.value.field == "teams.a.cap_cpus"
    with pytest.raises(SpecError) as info:
        state.apply(QuotaChanged("b", guarantee_cpus=5))
    assert info.value.field == "teams.b.guarantee_cpus"
    assert state.snapshot() == before
    state.apply(QuotaChanged("b", guarantee_cpus=4, cap_cpus=None))
    assert state.statistics()["teams"]["b"]["guarantee_cpus"] == 4
    assert state.statistics()["teams"]["a"]["cap_cpus"] == 6


def test_events_that_make_no_sense_are_rejected() -> None:
    with pytest.raises(RejectedEvent):
        SharingState().apply(Demand("a", "s", 1, 1))  # not configured yet
    state = _configured(8, 1000, [TeamQuota("a")])
    with pytest.raises(RejectedEvent):
        state.apply(Demand("nobody", "s", 1, 1))
    with pytest.raises(RejectedEvent):
        state.apply(Demand("a", "s", 1, 0))  # a segment needs CPUs
    with pytest.raises(RejectedEvent):
        state.apply(Started("x", "a", "unknown search", 1, 0, 0))
    state.apply(Demand("a", "s", 1, 1))
    state.apply(Started("x", "a", "s", 1, 0, 0))
    with pytest.raises(RejectedEvent):
        state.apply(Started("x", "a", "s", 1, 0, 0))  # already running
    with pytest.raises(RejectedEvent):
        state.apply(Ended("y"))
    state.apply(Tick(10))
    with pytest.raises(RejectedEvent):
        state.apply(Tick(5))  # time went backwards
    with pytest.raises(RejectedEvent):
        state.apply(TeamsConfigured(8, 1000, (TeamQuota("b"),)))  # a still runs a segment
    with pytest.raises(RejectedEvent):
        state.apply("not an event")  # type: ignore[arg-type]


def test_a_spent_allowance_pauses_the_team_with_the_reason() -> None:
    # A 1 CPU-hour allowance with 0.5 used; a then runs 7 CPUs for 15 minutes: spent.
    state = _configured(8, 1000, [TeamQuota("a", allowance_cpu_hours=1, used_cpu_hours=0.5), TeamQuota("b")])
    state.apply(Demand("a", "s1", 5, 1, priority=1))
    state.apply(Demand("a", "s2", 5, 1))
    state.apply(Demand("b", "t", 1, 1))
    d = state.apply(Tick(0))
    assert _granted(d) == {"a": 7, "b": 1}  # b wants only one; a takes the rest
    assert d.paused == ()
    for g in d.grants:
        for k in range(g.count):
            state.apply(Started(f"{g.search}-{k}", g.team, g.search, 1, 0, 0))
    state.apply(Ended("s1-0", at=900))
    state.apply(Ended("s1-1", at=900))
    state.apply(Demand("a", "s1", 3, 1, priority=1))
    # a ran 7 CPUs for 900 s (1.75 CPU-hours) on top of 0.5: spent
    d = state.apply(Tick(900))
    assert d.grants == ()
    assert d.paused == (Paused("a", "s1", ALLOWANCE_SPENT), Paused("a", "s2", ALLOWANCE_SPENT))
    assert state.statistics()["teams"]["a"]["paused"]
    assert state.statistics()["teams"]["a"]["used_cpu_hours"] == pytest.approx(0.5 + 7 * 900 / 3600)
    # a new period: usage back to 0, the team is served again
    state.apply(QuotaChanged("a", used_cpu_hours=0))
    d = state.apply(Tick(900))
    assert d.paused == () and _granted(d) == {"a": 2}


def test_preemption_takes_the_newest_borrowed_segments_of_the_team_most_above_its_share() -> None:
    # 12 CPUs. b and c borrow everything while a is idle; then a (guarantee 4) wants 4.
    state = _configured(12, 1000, [TeamQuota("a", guarantee_cpus=4), TeamQuota("b"), TeamQuota("c", weight=2)],
                        deadline=30)
    state.apply(Demand("b", "s", 6, 1))
    state.apply(Demand("c", "s", 6, 1))
    for k in range(6):
        state.apply(Started(f"b{k}", "b", "s", 1, 0, k))
        state.apply(Started(f"c{k}", "c", "s", 1, 0, k))
    state.apply(Demand("a", "s", 4, 1))
    d = state.apply(Tick(100))
    # Fair shares: a 4 (its guarantee); b and c share the other 8 by weight 1:2, 2.67 and
    # 5.33. Above them: b 3.33, c 0.67. Victims, one at a time from the team furthest
    # above, newest first: b5 (b 2.33 above), b4 (1.33), b3 (0.33, now below c's 0.67), c5.
    assert [p.segment for p in d.preemptions] == ["b5", "b4", "b3", "c5"]
    assert all(p.deadline == 130 and p.reason == "guarantee" and p.beneficiary == "a" for p in d.preemptions)
    assert d.grants == ()
    # a second round before the deadline preempts nothing more; at the deadline, force stops
    assert state.apply(Tick(110)).preemptions == ()
    state.apply(Ended("b5", at=115))
    d = state.apply(Tick(130))
    assert d.force_stop == (ForceStop("b3", "b"), ForceStop("b4", "b"), ForceStop("c5", "c"))
    assert _granted(d) == {"a": 1}  # the room b5 left
    state.apply(Started("a0", "a", "s", 1, 0, 130))
    for sid in ("b3", "b4", "c5"):
        state.apply(Ended(sid, at=130))
    d = state.apply(Tick(131))
    assert _granted(d) == {"a": 3}
    for k in range(3):
        state.apply(Started(f"a{k + 1}", "a", "s", 1, 0, 131))
    stats = state.statistics()["teams"]
    assert [stats[t]["running_cpus"] for t in "abc"] == [4, 3, 5]


def test_capacity_held_for_a_guarantee_is_not_lent_meanwhile() -> None:
    state = _configured(8, 1000, [TeamQuota("a", guarantee_cpus=4), TeamQuota("b")], deadline=10)
    state.apply(Demand("b", "s", 7, 1))
    for k in range(7):
        state.apply(Started(k, "b", "s", 1, 0, 0))
    state.apply(Demand("b", "s", 5, 1))
    state.apply(Demand("a", "big", 1, 4))
    d = state.apply(Tick(1))
    assert len(d.preemptions) == 3 and d.grants == ()
    assert [(h.team, h.cpus) for h in d.held] == [("a", 1.0)]  # the free CPU waits for a


def test_within_a_team_priorities_first_then_round_robin() -> None:
    state = _configured(3, 1000, [TeamQuota("a")])
    state.apply(Demand("a", "low", 10, 1, priority=0))
    for name in ("x", "y", "z", "w"):
        state.apply(Demand("a", name, 10, 1, priority=5))
    served = []
    for now in range(8):
        d = state.apply(Tick(now))
        for g in d.grants:
            served.extend([g.search] * g.count)
            for k in range(g.count):
                state.apply(Started(f"{now}-{g.search}-{k}", "a", g.search, 1, 0, now))
        for seg in state.segments():
            state.apply(Ended(seg.segment, at=now))
    # four searches of priority 5 take turns by name, three slots a round; "low" never runs
    assert served[:12] == ["w", "x", "y", "z"] * 3
    assert "low" not in served
    counts = {name: served.count(name) for name in "wxyz"}
    assert max(counts.values()) - min(counts.values()) <= 1


@settings(max_examples=100, deadline=None)
@given(
    searches=st.integers(1, 8),
    slots=st.integers(1, 4),
    waiting=st.lists(st.integers(1, 30), min_size=8, max_size=8),
    rival=st.booleans(),
)
def test_every_waiting_search_gets_a_slot_within_a_bounded_number_of_rounds(searches, slots, waiting, rival) -> None:
    """n searches of equal priority in a team capped at k slots (and, maybe, a rival team
    wanting the rest of the cluster): each waiting search is served within ceil(n / k)
    rounds of the last time it was, however many segments the others have waiting."""
    teams = [TeamQuota("a", cap_cpus=slots)] + ([TeamQuota("b")] if rival else [])
    state = _configured(2 * slots + 2, 1000, teams)  # its fair share is above its cap
    left = {f"s{j}": waiting[j] for j in range(searches)}
    for name, n in left.items():
        state.apply(Demand("a", name, n, 1))
    if rival:
        state.apply(Demand("b", "r", 10**6, 1))
    last = dict.fromkeys(left, 0)
    bound = -(-searches // slots)
    for now in range(1, 200):
        for seg in state.segments():
            state.apply(Ended(seg.segment, at=now))
        d = state.apply(Tick(now))
        wanted = sum(left.values())
        for g in d.grants:
            for k in range(g.count):
                state.apply(Started(f"{now}.{g.team}.{g.search}.{k}", g.team, g.search, 1, 0, now))
            if g.team == "a":
                left[g.search] -= g.count
                last[g.search] = now
        assert sum(g.count for g in d.grants if g.team == "a") == min(slots, wanted)  # its cap, all of it
        for name, n in left.items():
            if n > 0:
                assert now - last[name] < bound, (name, now, last[name], bound)
        if not any(left.values()):
            break
    assert not any(left.values())


def test_a_lowered_cap_preempts_down_to_it() -> None:
    state = _configured(8, 1000, [TeamQuota("a", cap_cpus=8)], deadline=5)
    state.apply(Demand("a", "s", 8, 1))
    for k in range(8):
        state.apply(Started(k, "a", "s", 1, 0, k))
    state.apply(QuotaChanged("a", cap_cpus=5))
    d = state.apply(Tick(10))
    assert [(p.segment, p.reason) for p in d.preemptions] == [(7, "cap"), (6, "cap"), (5, "cap")]


def test_withdrawn_search_is_no_longer_served() -> None:
    state = _configured(4, 1000, [TeamQuota("a")])
    state.apply(Demand("a", "s", 3, 1))
    state.apply(Demand("a", "t", 3, 1))
    state.apply(Withdrawn("a", "s"))
    assert state.apply(Tick(0)).grants == (Grant("a", "t", 3),)


# ---- the property test --------------------------------------------------------------------

TICK = 360  # seconds between rounds
DEADLINE_TICKS = 2
DEADLINE = DEADLINE_TICKS * TICK
MCS_PER_CPU_HOUR = 3_600_000


class SharingMachine(RuleBasedStateMachine):
    """A cluster model that carries out the decisions and checks the rules after each round.

    In the uniform variant each team has one segment shape (its searches differ in
    priority), so "a team below its guarantee", priorities and the round-robin bound do not
    depend on which search is served next; those are checked there. The mixed variant gives
    every search its own shape and checks caps, capacity, idle capacity and allowances.
    The model keeps CPUs in thousandths and usage in milli-CPU-seconds, as integers.
    """

    def __init__(self) -> None:
        super().__init__()
        self.twin: SharingState | None = None

    @initialize(
        capacity=st.integers(4, 16),
        teams=st.lists(
            st.tuples(
                st.integers(0, 6),  # guarantee (scaled to fit below)
                st.one_of(st.none(), st.integers(0, 6)),  # cap above the guarantee
                st.sampled_from([1, 2, 3]),  # weight
                st.sampled_from([500, 1000, 2000, 3000]),  # segment milli-CPUs
                st.sampled_from([0, 256, 1024]),  # segment memory
                st.one_of(st.none(), st.none(), st.integers(1, 12)),  # allowance, CPU-hours
                st.integers(1, 3),  # searches
            ),
            min_size=1,
            max_size=4,
        ),
        tight_memory=st.booleans(),
        mixed=st.one_of(st.none(), st.lists(st.tuples(st.sampled_from([500, 1000, 2000, 3000]),
                                                      st.sampled_from([0, 256, 1024])), min_size=3, max_size=3)),
    )
    def setup(self, capacity, teams, tight_memory, mixed) -> None:
        self.capacity = capacity * 1000
        budget = self.capacity
        quotas, self.shape, self.searches = [], {}, {}
        for i, (g, extra, w, mc, mem, allowance, n) in enumerate(teams):
            name = f"t{i}"
            g_mc = min(g * 1000, budget)
            budget -= g_mc
            quotas.append(TeamQuota(name, guarantee_cpus=g_mc / 1000,
                                    cap_cpus=None if extra is None else (g_mc + extra * 1000) / 1000,
                                    weight=w, allowance_cpu_hours=allowance))
            self.searches[name] = [(f"s{j}", j % 2) for j in range(n)]  # (name, priority)
            for j in range(n):
                self.shape[(name, f"s{j}")] = (mc, mem) if mixed is None else mixed[(i + j) % 3]
        self.uniform = mixed is None
        # ample memory: nothing can run out of it; tight: about half of what could run
        self.memory = 10**6 if not tight_memory else max(1024, capacity * 256)
        self.tight = tight_memory
        self.quota = {q.name: q for q in quotas}
        self.state = SharingState()
        self.state.apply(TeamsConfigured(capacity, self.memory, tuple(quotas), preempt_deadline=DEADLINE))
        self.now = 0
        self.waiting = {(t, s): 0 for t in self.searches for s, _p in self.searches[t]}
        self.running: dict[str, tuple[str, str, int, int, int]] = {}  # id -> team, search, mc, mem, start
        self.yield_at: dict[str, int] = {}  # preempted segments that will yield on their own
        self.used = {t: 0 for t in self.quota}  # milli-CPU-seconds of ended segments and the base
        self.cap_lowered_at: dict[str, int] = {}
        self.deficits: dict[str, list[list[int]]] = {}  # team -> [round, segments owed, received since]
        self.pair = defaultdict(lambda: [0, 0])  # (team, s, o) -> [grants(o) - grants(s), min so far]
        self.counter = 0
        self.rounds = 0

    # -- carrying events to the state (and the twin) --

    def send(self, event):
        out = self.state.apply(event)
        if self.twin is not None:
            assert self.twin.apply(event) == out
        return out

    def demand(self, team, search):
        mc, mem = self.shape[(team, search)]
        prio = dict(self.searches[team])[search]
        self.send(Demand(team, search, self.waiting[(team, search)], mc / 1000, mem, prio))

    def end(self, sid, requeue):
        team, search, mc, _mem, start = self.running.pop(sid)
        self.yield_at.pop(sid, None)
        self.used[team] += mc * (self.now - start)
        self.send(Ended(sid, at=self.now))
        if requeue:
            self.waiting[(team, search)] += 1
            self.demand(team, search)

    def usage(self, team, now):
        return self.used[team] + sum(mc * (now - start) for t, _s, mc, _m, start in self.running.values() if t == team)

    def spent(self, team, now):
        a = self.quota[team].allowance_cpu_hours
        return a is not None and self.usage(team, now) >= a * MCS_PER_CPU_HOUR

    def team_run(self, team):
        return sum(mc for t, _s, mc, _m, _st in self.running.values() if t == team)

    # -- rules --

    @rule(data=st.data())
    def arrive(self, data) -> None:
        team = data.draw(st.sampled_from(sorted(self.searches)))
        search = data.draw(st.sampled_from([s for s, _p in self.searches[team]]))
        self.waiting[(team, search)] += data.draw(st.integers(1, 12))
        self.demand(team, search)

    @precondition(lambda self: self.running)
    @rule(data=st.data(), failed=st.booleans())
    def finish(self, data, failed) -> None:
        """A segment finishes (its search has one less to run) or fails (it goes back)."""
        sid = data.draw(st.sampled_from(sorted(self.running)))
        self.end(sid, requeue=failed)

    @rule(data=st.data())
    def change_quota(self, data) -> None:
        team = data.draw(st.sampled_from(sorted(self.quota)))
        q = self.quota[team]
        others = sum(int(round(x.guarantee_cpus * 1000)) for x in self.quota.values() if x.name != team)
        g = data.draw(st.integers(0, (self.capacity - others) // 1000 + 1)) * 1000  # may be one too many
        cap = data.draw(st.one_of(st.none(), st.integers(-1, 6)))
        cap_mc = None if cap is None else g + cap * 1000
        weight = data.draw(st.sampled_from([1, 2, 3]))
        new_period = data.draw(st.booleans())
        event = QuotaChanged(team, guarantee_cpus=g / 1000, cap_cpus=None if cap_mc is None else cap_mc / 1000,
                             weight=weight, used_cpu_hours=0 if new_period else None, at=self.now)
        if g + others > self.capacity or (cap_mc is not None and cap_mc < g):
            with pytest.raises(SpecError):
                self.send(event)
            return
        self.send(event)
        old_cap = None if q.cap_cpus is None else q.cap_cpus * 1000
        self.quota[team] = TeamQuota(team, g / 1000, None if cap_mc is None else cap_mc / 1000, weight,
                                     q.allowance_cpu_hours)
        if new_period:
            self.used[team] = -sum(mc * (self.now - s) for t, _x, mc, _m, s in self.running.values() if t == team)
        if cap_mc is not None and (old_cap is None or cap_mc < old_cap):
            self.cap_lowered_at[team] = self.now
        self.deficits.pop(team, None)

    @rule()
    def snapshot_twin(self) -> None:
        self.twin = SharingState.restore(json.loads(json.dumps(self.state.snapshot())))
        assert self.twin.statistics() == self.state.statistics()

    @rule(ticks=st.integers(1, 3))
    def tick(self, ticks) -> None:
        for _ in range(ticks):
            self.one_round()

    # -- one round and its checks --

    def one_round(self) -> None:
        self.now += TICK
        now = self.now
        for sid, at in sorted(self.yield_at.items()):
            if at <= now:
                self.end(sid, requeue=True)
        spent = {t: self.spent(t, now) for t in self.quota}
        before = {t: self.team_run(t) for t in self.quota}
        waiting_before = dict(self.waiting)
        d = self.send(Tick(now))
        # allowances: paused exactly the searches with work waiting of spent teams
        expect_paused = sorted((t, s) for (t, s), w in self.waiting.items() if w > 0 and spent[t])
        assert sorted((p.team, p.search) for p in d.paused) == expect_paused
        assert all(p.reason == ALLOWANCE_SPENT for p in d.paused)
        got = defaultdict(int)
        for g in d.grants:
            assert not spent[g.team]
            got[(g.team, g.search)] += g.count
        for (t, s), n in got.items():
            assert n <= self.waiting[(t, s)], "granted more than waits"
            mc, mem = self.shape[(t, s)]
            for _ in range(n):
                self.counter += 1
                sid = f"g{self.counter}"
                self.running[sid] = (t, s, mc, mem, now)
                self.waiting[(t, s)] -= 1
                self.send(Started(sid, t, s, mc / 1000, mem, now))
        for p in d.preemptions:
            assert p.segment in self.running and p.deadline == now + DEADLINE
            delay = (int(p.segment[1:]) % (DEADLINE_TICKS + 2)) * TICK  # some yield in time, some not
            if delay < DEADLINE:
                self.yield_at[p.segment] = now + max(delay, TICK)
        self.rounds += 1
        self.check(d, before, got, spent, waiting_before)
        for f in d.force_stop:  # stopped now; the room is the next round's
            assert self.state.segments() and f.segment in self.running
            self.end(f.segment, requeue=True)

    def check(self, d, before, got, spent, waiting_before) -> None:
        now = self.now
        run = {t: self.team_run(t) for t in self.quota}
        mem_run = sum(m for _t, _s, _mc, m, _st in self.running.values())
        cpu_run = sum(run.values())
        assert cpu_run <= self.capacity and mem_run <= self.memory
        held_c = sum(int(round(h.cpus * 1000)) for h in d.held)
        held_m = sum(h.memory_mb for h in d.held)
        for t, q in self.quota.items():
            cap = None if q.cap_cpus is None else int(round(q.cap_cpus * 1000))
            if cap is None:
                continue
            # caps: a grant never takes a team above its cap; a lowered cap is reached in time
            if any(n for (tt, _s), n in got.items() if tt == t):
                assert run[t] <= cap
            lowered = self.cap_lowered_at.get(t)
            if lowered is None or now - lowered > DEADLINE + TICK:
                assert run[t] <= cap, (t, run[t], cap)
        # no idle capacity while allowed work waits (held capacity excepted)
        free_c, free_m = self.capacity - cpu_run - held_c, self.memory - mem_run - held_m
        for (t, s), w in self.waiting.items():
            if w == 0 or spent[t]:
                continue
            mc, mem = self.shape[(t, s)]
            q = self.quota[t]
            cap = None if q.cap_cpus is None else int(round(q.cap_cpus * 1000))
            fits = mc <= free_c and mem <= free_m and (cap is None or run[t] + mc <= cap)
            assert not fits, (f"{t}/{s} waits and fits in the idle capacity", d)
        # guarantees: what a team below its guarantee had waiting (and fitting under it) after
        # a round is granted within one preemption deadline plus the round after the force
        # stops, unless the team is no longer below its guarantee by then
        for t, q in self.quota.items():
            g = int(round(q.guarantee_cpus * 1000))
            mc, _mem = self.shape[(t, self.searches[t][0][0])]
            waits = sum(w for (tt, _s), w in self.waiting.items() if tt == t)
            below = waits > 0 and not spent[t] and run[t] + mc <= g
            log = self.deficits.setdefault(t, [])
            if spent[t] or self.tight or not self.uniform:
                log.clear()
                continue
            granted = sum(n for (tt, _s), n in got.items() if tt == t)
            for entry in log:
                entry[2] += granted
            for entry in [e for e in log if now >= e[0] + DEADLINE + TICK]:
                since, owed, received = entry
                assert not below or received >= owed, f"{t}: owed {owed} segments since {since}, got {received} by {now}"
                log.remove(entry)
            if below:
                log.append([now, min(waits, (g - run[t]) // mc), 0])
        if not self.uniform:
            return
        # priorities: a grant at priority p leaves nothing waiting above p in that team
        for (t, s), n in got.items():
            prio = dict(self.searches[t])[s]
            for s2, p2 in self.searches[t]:
                if p2 > prio:
                    assert self.waiting[(t, s2)] == 0
        # round-robin: while s waits throughout, no other search of its team and priority gets
        # more than one grant more than s over any stretch of rounds
        for t, searches in self.searches.items():
            for s, p in searches:
                for o, po in searches:
                    if o == s or po != p:
                        continue
                    key = (t, s, o)
                    if waiting_before[(t, s)] == 0 or self.waiting[(t, s)] == 0:
                        self.pair.pop(key, None)
                        continue
                    diff = self.pair[key]
                    diff[0] += got.get((t, o), 0) - got.get((t, s), 0)
                    diff[1] = min(diff[1], diff[0])
                    assert diff[0] - diff[1] <= 1, (t, s, o, diff)

    @invariant()
    def statistics_agree_with_the_model(self) -> None:
        if not hasattr(self, "state"):
            return
        stats = self.state.statistics()["teams"]
        for t in self.quota:
            assert stats[t]["running_cpus"] == self.team_run(t) / 1000
            assert stats[t]["waiting_segments"] == sum(w for (tt, _s), w in self.waiting.items() if tt == t)
            assert stats[t]["running_segments"] == sum(1 for x in self.running.values() if x[0] == t)


SharingMachine.TestCase.settings = settings(
    max_examples=300, stateful_step_count=50, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
TestSharingProperties = SharingMachine.TestCase


# ---- snapshot and restore ----------------------------------------------------------------


def test_snapshot_restore_gives_identical_decisions() -> None:
    rnd = random.Random(7)
    teams = [TeamQuota("a", guarantee_cpus=4, cap_cpus=12, weight=1, allowance_cpu_hours=3),
             TeamQuota("b", guarantee_cpus=2, weight=2), TeamQuota("c", weight=1)]
    state = _configured(16, 8 * GB, teams, deadline=120)
    shapes = {"a": (1, 512), "b": (2, 256), "c": (0.5, 1024)}
    running: dict[str, tuple[str, int]] = {}
    twin = None
    n = 0
    for now in range(0, 600 * 60, 60):
        events = []
        for sid, (team, end) in sorted(running.items()):
            if end <= now:
                events.append(Ended(sid, at=now))
                del running[sid]
        team = rnd.choice("abc")
        events.append(Demand(team, rnd.choice(["x", "y"]), rnd.randint(0, 8), *shapes[team], priority=rnd.randint(0, 1)))
        if now == 300 * 60:
            twin = SharingState.restore(json.loads(json.dumps(state.snapshot())))
        for e in events:
            state.apply(e)
            if twin is not None:
                twin.apply(e)
        d = state.apply(Tick(now))
        if twin is not None:
            assert twin.apply(Tick(now)) == d
            assert twin.snapshot() == state.snapshot()
        for g in d.grants:
            for _ in range(g.count):
                n += 1
                running[f"x{n}"] = (g.team, now + rnd.randint(1, 20) * 60)
                e = Started(f"x{n}", g.team, g.search, *shapes[g.team], now)
                state.apply(e)
                if twin is not None:
                    twin.apply(e)
        for p in d.force_stop:
            running.pop(p.segment, None)
            state.apply(Ended(p.segment, at=now))
            if twin is not None:
                twin.apply(Ended(p.segment, at=now))
    assert twin is not None and n > 100


def test_the_code_in_docs_sharing_md_runs() -> None:
    doc = Path(__file__).resolve().parents[2] / "docs" / "sharing.md"
    blocks = re.findall(r"```python\n(.*?)\n```", doc.read_text(encoding="utf-8"), flags=re.S)
    assert blocks
    for block in blocks:
        namespace: dict = {}
        exec(compile(block, str(doc), "exec"), namespace)  # noqa: S102 - our own documentation
        assert isinstance(namespace["decision"], RoundDecision)
        assert namespace["decision"].grants == (Grant("vision", "resnet", 6),)


def test_the_worked_example_in_docs_sharing_md() -> None:
    """The rounds docs/sharing.md walks through, decision by decision."""
    state = _configured(16, 64 * GB, [
        TeamQuota("vision", guarantee_cpus=6, cap_cpus=12, weight=2),
        TeamQuota("speech", guarantee_cpus=4, weight=1),
        TeamQuota("nlp", cap_cpus=8, weight=1, allowance_cpu_hours=2),
    ], deadline=60)
    state.apply(Demand("vision", "resnet", 20, 2, 4 * GB, priority=1))
    state.apply(Demand("vision", "vit", 20, 2, 4 * GB, priority=1))
    state.apply(Demand("nlp", "bert", 20, 1, 2 * GB))
    d = state.apply(Tick(0))
    assert d == RoundDecision(0, grants=(Grant("vision", "resnet", 3), Grant("vision", "vit", 3), Grant("nlp", "bert", 4)))
    sid = 0
    for g in d.grants:
        for _ in range(g.count):
            sid += 1
            cpus, mem = (2, 4 * GB) if g.team == "vision" else (1, 2 * GB)
            state.apply(Started(sid, g.team, g.search, cpus, mem, 0))
    assert state.statistics()["teams"]["vision"]["fair_share_cpus"] == pytest.approx(12)
    assert state.statistics()["teams"]["nlp"]["fair_share_cpus"] == pytest.approx(4)
    state.apply(Demand("speech", "wav2vec", 10, 1, 1 * GB))
    d = state.apply(Tick(60))
    assert d == RoundDecision(60, preemptions=(
        Preempt(6, "vision", 120, "guarantee", "speech"),
        Preempt(10, "nlp", 120, "guarantee", "speech"),
        Preempt(9, "nlp", 120, "guarantee", "speech"),
    ))
    fair = {t: v["fair_share_cpus"] for t, v in state.statistics()["teams"].items()}
    assert fair == pytest.approx({"vision": 9, "speech": 5.5, "nlp": 1.5})
    state.apply(Ended(6, at=90))
    state.apply(Demand("vision", "vit", 18, 2, 4 * GB, priority=1))
    state.apply(Ended(10, at=95))
    state.apply(Demand("nlp", "bert", 17, 1, 2 * GB))
    d = state.apply(Tick(120))
    assert d == RoundDecision(120, grants=(Grant("speech", "wav2vec", 3),), force_stop=(ForceStop(9, "nlp"),))
    for k in range(3):
        state.apply(Started(11 + k, "speech", "wav2vec", 1, 1 * GB, 120))
    state.apply(Ended(9, at=120))
    state.apply(Demand("nlp", "bert", 18, 1, 2 * GB))
    d = state.apply(Tick(180))
    assert d == RoundDecision(180, grants=(Grant("speech", "wav2vec", 1),))
    state.apply(Started(14, "speech", "wav2vec", 1, 1 * GB, 180))
    running = {t: v["running_cpus"] for t, v in state.statistics()["teams"].items()}
    assert running == {"vision": 10, "speech": 4, "nlp": 2}
    d = state.apply(Tick(3600))
    assert d == RoundDecision(3600, paused=(Paused("nlp", "bert", ALLOWANCE_SPENT),))
    assert state.statistics()["teams"]["nlp"]["used_cpu_hours"] == pytest.approx((2 * 3600 + 120 + 95) / 3600)
