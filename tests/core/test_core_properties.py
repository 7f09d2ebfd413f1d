"""Property-based checks of the scheduling core over random event sequences (hypothesis).

An independent model kept by the test (results per rung, who is running, what was promoted)
checks, after every event, the invariants of successive halving as Li et al. state them
(MLSys 2020, Algorithm 2; JMLR 2018, Algorithm 1): a promoted trial was in the top
floor(n_k / eta) of its rung when promoted; promotions out of rung k that are in the current
top floor(n_k / eta) never exceed floor(n_k / eta) when they happen; no trial runs twice at
once; a trial's budgets only grow. A twin restored from
a snapshot (through JSON) must then make exactly the same decisions as the original.
"""

from __future__ import annotations

import json
import math
from collections import defaultdict

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule

from rungway.scheduler.core.errors import RejectedEvent
from rungway.scheduler.core.events import Continue, Drained, Failed, Idle, Segment
from rungway.scheduler.core.plan import MODES, SearchPlan
from rungway.scheduler.core.ranking import to_loss
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.core.states import ACTIVE
from rungway.scheduler.testing import CountingSampler

values = st.one_of(
    st.integers(0, 5).map(float),  # many ties
    st.floats(-1e6, 1e6, allow_nan=False),
    st.sampled_from([math.nan, math.inf, -math.inf]),
)


class CoreMachine(RuleBasedStateMachine):
    @initialize(
        mode=st.sampled_from(MODES),
        eta=st.sampled_from([2, 3, 4]),
        rungs=st.integers(2, 4),
        max_trials=st.one_of(st.none(), st.integers(1, 40)),
        maximize=st.booleans(),
        sync_trials=st.integers(1, 30),
    )
    def setup(self, mode, eta, rungs, max_trials, maximize, sync_trials) -> None:
        self.plan = SearchPlan(
            mode=mode, min_budget=1, max_budget=eta ** (rungs - 1), eta=eta, max_trials=max_trials,
            maximize=maximize, max_crashes=1, sync_trials=sync_trials,
        )
        self.core = SearchCore(self.plan, CountingSampler())
        self.twin: SearchCore | None = None
        self.running: dict[int, Segment] = {}
        self.rung_now: dict[int, int] = {}  # running trial -> rung it reports next
        self.results: dict[tuple[int, int], list[tuple[float, int]]] = defaultdict(list)
        self.promoted_ids: dict[tuple[int, int], set[int]] = {}
        self.parked_at: dict[int, tuple[int, int]] = {}
        self.last_target: dict[int, float] = {}
        self.drained = False

    # Every call goes to the core and, once a snapshot was taken, to its restored twin.
    def both(self, name: str, *args):
        try:
            out = getattr(self.core, name)(*args)
        except RejectedEvent as exc:
            if self.twin is not None:
                try:
                    getattr(self.twin, name)(*args)
                except RejectedEvent as twin_exc:
                    assert str(twin_exc) == str(exc)
                else:
                    raise AssertionError("the twin accepted what the original refused") from exc
            raise
        if self.twin is not None:
            assert getattr(self.twin, name)(*args) == out
        return out

    @rule()
    def ask(self) -> None:
        out = self.both("ask")
        if isinstance(out, Drained):
            assert not self.running
            self.drained = True
            return
        assert not self.drained, "a drained search handed out work"
        if isinstance(out, Idle):
            return
        assert isinstance(out, Segment)
        tid = out.trial
        assert tid not in self.running, f"trial {tid} handed out twice at once"
        assert out.start_budget <= out.target_budget
        assert out.target_budget >= self.last_target.get(tid, 0), "a trial's budget shrank"
        self.last_target[tid] = out.target_budget
        parked = self.parked_at.pop(tid, None)
        if parked is not None and out.rung == parked[1] + 1:  # a promotion
            board = self.results[parked]
            quota = len(board) // self.plan.eta
            entry = next(e for e in board if e[1] == tid)
            rank = sum(1 for e in board if e < entry)
            assert rank < quota, "promoted a trial outside the top floor(n/eta)"
            # Promotions out of rung k, counted among the current top floor(n_k / eta), never
            # exceed floor(n_k / eta). (The plain total can: Algorithm 2 promotes from
            # top_k minus those already promoted, and an earlier promotion may have fallen out
            # of the top since. With eta = 2: results 5, 3 promote the 3; a 1 arrives, n = 3,
            # floor(3/2) = 1, and the 1 is promoted too: two promotions.)
            self.promoted_ids.setdefault(parked, set()).add(tid)
            top = sorted(board)[:quota]
            assert sum(1 for e in top if e[1] in self.promoted_ids[parked]) <= quota
        self.running[tid] = out
        self.rung_now[tid] = out.rung

    def pick(self, data) -> Segment:
        return self.running[data.draw(st.sampled_from(sorted(self.running)))]

    @precondition(lambda self: bool(self.running))
    @rule(data=st.data(), value=values)
    def report(self, data, value: float) -> None:
        seg = self.pick(data)
        rung = self.rung_now[seg.trial]
        out = self.both("report", seg.trial, seg.attempt, rung, value)
        self.results[(seg.bracket, rung)].append((to_loss(value, self.plan.maximize), seg.trial))
        if isinstance(out, Continue):
            self.rung_now[seg.trial] = out.rung
            return
        del self.running[seg.trial]
        self.parked_at[seg.trial] = (seg.bracket, rung)

    @precondition(lambda self: bool(self.running))
    @rule(data=st.data(), crash=st.booleans())
    def fail_segment(self, data, crash: bool) -> None:
        seg = self.pick(data)
        out = self.both("crashed" if crash else "lost", seg.trial, seg.attempt)
        del self.running[seg.trial]
        assert self.core.trial(seg.trial).state == ("failed" if isinstance(out, Failed) else "queued")

    @precondition(lambda self: len(self.core) > 0)
    @rule(data=st.data())
    def cancel(self, data) -> None:
        tid = data.draw(st.integers(0, len(self.core) - 1))
        try:
            self.both("cancel", tid)
        except RejectedEvent:
            assert self.core.trial(tid).state in ("done", "culled", "failed", "cancelled")
            return
        self.running.pop(tid, None)
        self.parked_at.pop(tid, None)

    @rule(tid=st.integers(-2, 50), attempt=st.integers(0, 5), rung=st.integers(-1, 5), value=values)
    def stray_report(self, tid: int, attempt: int, rung: int, value: float) -> None:
        seg = self.running.get(tid)
        if seg is not None and seg.attempt == attempt and self.rung_now[tid] == rung:
            return  # that one would be legitimate
        before = json.dumps(self.core.snapshot())
        try:
            self.both("report", tid, attempt, rung, value)
        except RejectedEvent:
            assert json.dumps(self.core.snapshot()) == before, "a refused event changed the state"
        else:
            raise AssertionError("the core accepted a result it never asked for")

    @rule()
    def stop_admitting(self) -> None:
        self.both("stop_admitting")

    @rule()
    def snapshot_and_restore(self) -> None:
        snap = json.loads(json.dumps(self.core.snapshot()))
        self.twin = SearchCore.restore(snap, CountingSampler())
        assert json.loads(json.dumps(self.twin.snapshot())) == snap

    @invariant()
    def active_count_matches(self) -> None:
        if not hasattr(self, "core"):
            return
        assert self.core.active == len(self.running)
        assert sum(1 for t in self.core.trials() if t.state == ACTIVE) == len(self.running)


    @invariant()
    def backlog_is_zero_exactly_when_ask_gives_nothing(self) -> None:
        """A fair-sharing head grants segments by ``backlog`` without asking: a search whose
        backlog is 0 must have nothing to hand out, or it would wait for ever."""
        if not hasattr(self, "core"):
            return
        probe = SearchCore.restore(json.loads(json.dumps(self.core.snapshot())), CountingSampler())
        backlog = self.core.backlog(10_000)
        assert 0 <= backlog <= 10_000
        out = probe.ask()
        assert (backlog == 0) == (not isinstance(out, Segment)), (backlog, out)


CoreMachine.TestCase.settings = settings(
    max_examples=150, stateful_step_count=60, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
TestCore = CoreMachine.TestCase


def test_a_full_random_run_always_drains() -> None:
    """Whatever the mode, answering every segment eventually drains the search."""
    for mode in MODES:
        plan = SearchPlan(mode=mode, min_budget=1, max_budget=27, eta=3, max_trials=50, sync_trials=30)
        core = SearchCore(plan, CountingSampler())
        steps = 0
        while not isinstance(out := core.ask(), Drained):
            assert isinstance(out, Segment), (mode, out)
            for rung in range(out.rung, out.rung + len(out.milestones)):
                verdict = core.report(out.trial, out.attempt, rung, float(out.config["index"] % 7))
                if not isinstance(verdict, Continue):
                    break
            steps += 1
            assert steps < 10_000
