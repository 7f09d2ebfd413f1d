"""The scheduling core of one search: a deterministic state machine.

Theory of operation. The core owns the trials of one search, the rung boards of each
bracket and the queue of segments waiting for a slot. It is driven entirely from outside:
``apply(event)`` (or the method of the same meaning) changes the state and returns what to do.
It never does I/O, never reads a clock and never draws a random number itself; the sampler it
is given owns the only randomness, seeded by the caller. Given the same events in the same
order, two cores make the same decisions, and ``snapshot()`` / ``restore()`` carry that state
across a restart.

Asynchronous modes follow ASHA (Li et al., MLSys 2020, Algorithm 2): on every free slot, a
requeued segment goes first; else scan the rungs top-down and promote the best trial of a rung
that is in the top floor(n_k / eta) and not yet promoted; else start a new trial at the bottom
rung. Synchronous modes wait at a barrier until every trial of a rung has a result, then
promote the top floor(n_k / eta) of them.

Asynchronous Hyperband runs one such ladder per bracket. A free slot goes to a promotion if
any bracket has one ready (the brackets are checked in turn, starting after the one that
promoted last); else a new trial starts in the bracket the quota method picks (``_deal``):
of the brackets whose count is below the upper quota of N + 1 trials, the one with the
smallest (created + 1) / n_s, so after N new trials bracket s holds floor or ceil of
N * n_s / sum(n), Li et al.'s proportions (JMLR 2018, Algorithm 1), whatever order the
results come in. Checking for a promotion reads every bracket's K boards, O(K**2) reads for
K = s_max + 1 brackets, and the pick is one pass over the brackets, O(K): both independent of
the number of trials (K is log_eta(R / r) + 1).

Cost, for K rungs and n results per rung (see ranking.py for the boards). Each promotion
board keeps ASHA's answer for its rung up to date as results arrive and leave, so scanning the
rungs on a free slot is one read per rung, O(K); a promotion then costs the board's heap pop,
O(log n), and amortised O(1) more for the board's bar. A result costs a heap push at a
promotion board (O(1) on average) and a sorted-list insertion, O(log n), at any other board
(the stopping form adds one O(log n) rank). Configurations come from the sampler, a block at a
time for the random sampler.

Failures. A crash is retried up to ``plan.max_crashes`` times and a counted loss requeued up
to ``plan.max_losses`` times; one more fails the trial. ``plan.max_consecutive_failures``
trials in a row failing at their first rung, or every trial failing, make the search
``failing``: the adapter ends the run and says so (a later run applies ``Resume``).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Mapping
from typing import Any

from .errors import RejectedEvent, UnknownTrial
from .events import (
    DRAINED,
    IDLE,
    Ask,
    Cancel,
    Cancelled,
    Continue,
    Crashed,
    Drained,
    Event,
    Failed,
    Finished,
    Idle,
    Lost,
    Outcome,
    Parked,
    Report,
    Requeued,
    Resume,
    Culled,
    Segment,
    StopAdmitting,
    Yielded,
)
from .ladder import Budget
from .plan import SearchPlan
from .ranking import PromotionBoard, RungBoard, to_loss
from .samplers.base import Sampler
from .states import ACTIVE, CANCELLED, FAILED, FINAL_STATES, PARKED, QUEUED, STATES, TRANSITIONS, advance

__all__ = ["SearchCore", "TrialView", "SNAPSHOT_FORMAT"]

SNAPSHOT_FORMAT = 1


def _move(move: str) -> dict[str, str]:
    """State -> new state for one move: the part of the transition table the hot path reads
    with one dict lookup instead of calling :func:`advance`. A state the table does not allow
    the move from is missing, and ``_MOVE.get(state) or advance(state, move)`` then raises
    exactly what ``advance`` does (states are non-empty strings)."""
    return {state: target for (state, name), target in TRANSITIONS.items() if name == move}


_DISPATCH = _move("dispatch")
_PROMOTE = _move("promote")
_PARK = _move("park")
_FINISH = _move("finish")
_CONTINUE = _move("continue")
_CULL = _move("cull")


class _Trial:
    """The core's record of one trial. ``rung`` is the rung worked towards while queued or
    active, and the last rung with a result otherwise; ``saved`` is the budget reached."""

    __slots__ = ("id", "bracket", "state", "rung", "attempt", "saved", "loss", "record", "crashes", "losses", "config")

    def __init__(self, tid: int, bracket: int, config: dict[str, Any]) -> None:
        self.id = tid
        self.bracket = bracket
        self.state = QUEUED
        self.rung = 0
        self.attempt = 0
        self.saved: Budget = 0
        self.loss: float | None = None  # the latest result
        self.record: float | None = None  # the best result at any rung
        self.crashes = 0
        self.losses = 0  # counted losses (machine died, segment silent)
        self.config = config


class _Bracket:
    """Rung boards of one ladder, plus barrier bookkeeping when it is synchronous."""

    __slots__ = (
        "budgets", "top", "level_offset", "boards", "descending", "milestones", "remaining", "counts", "level",
        "created", "outstanding",
    )

    def __init__(
        self, budgets: tuple[Budget, ...], level_offset: int, counts: tuple[int, ...] | None, eta: int, promoting: bool
    ) -> None:
        self.budgets = budgets
        self.top = len(budgets) - 1
        self.level_offset = level_offset
        # Results wait for promotion only at the rungs below the top of an asynchronous
        # ladder in the promotion form.
        self.boards: list[RungBoard | PromotionBoard] = [
            PromotionBoard(eta) if promoting and k < self.top else RungBoard() for k in range(len(budgets))
        ]
        # (rung, board) of the promotion boards, top-down: the order ASHA checks them in.
        self.descending = tuple((k, self.boards[k]) for k in range(self.top - 1, -1, -1)) if promoting else ()
        # A segment's milestones, per rung it starts at: made once, handed out many times.
        self.milestones = tuple((b,) for b in budgets)  # promotion form: up to the next rung
        self.remaining = tuple(budgets[k:] for k in range(len(budgets)))  # stopping form: to the top
        self.counts = counts
        self.level = 0  # synchronous: the rung whose barrier is open
        self.created = 0  # trials started in this bracket
        self.outstanding = 0  # synchronous: trials at ``level`` without a result yet


class TrialView:
    """A read-only look at one trial (for adapters, the CLI and tests)."""

    __slots__ = ("id", "bracket", "state", "rung", "attempt", "budget", "loss", "record", "crashes", "losses", "config")

    def __init__(self, t: _Trial) -> None:
        self.id, self.bracket, self.state, self.rung = t.id, t.bracket, t.state, t.rung
        self.attempt, self.budget, self.loss, self.crashes = t.attempt, t.saved, t.loss, t.crashes
        self.losses = t.losses
        self.record = t.record
        self.config = dict(t.config)

    def __repr__(self) -> str:
        return f"TrialView(id={self.id}, state={self.state!r}, rung={self.rung}, loss={self.loss!r})"


class SearchCore:
    """One search's ladders, trials and queue."""

    def __init__(self, plan: SearchPlan, sampler: Sampler) -> None:
        self.plan = plan
        self.sampler = sampler
        self._eta = plan.eta
        self._maximize = plan.maximize
        self._stopping = plan.stopping
        self._synchronous = plan.synchronous
        self._max_trials = plan.max_trials
        # The default Sampler.observe ignores results: skip the call on every report then.
        observe = sampler.observe
        self._observe = None if getattr(observe, "__func__", None) is Sampler.observe else observe
        promoting = not plan.synchronous and not plan.stopping
        plans = plan.brackets()
        self._brackets = [
            _Bracket(bp.ladder.budgets, bp.level_offset, bp.counts, plan.eta, promoting) for bp in plans
        ]
        # Asynchronous: the weights new trials are dealt to the brackets by (see ``_deal``), and
        # per starting bracket the promotion boards in the order ``ask`` checks them (that
        # bracket's top-down, then the next bracket's, wrapping) with the bracket to check first
        # after a promotion there: one flat pass instead of a loop per bracket.
        self._weights = tuple(bp.weight for bp in plans)
        self._weight_total = sum(self._weights)
        count = len(self._brackets)
        self._scans = tuple(
            tuple(
                ((i + 1) % count, k, board)
                for i in (*range(start, count), *range(start))
                for k, board in self._brackets[i].descending
            )
            for start in range(count)
        )
        self._trials: list[_Trial] = []
        self._queue: deque[int] = deque()
        self._active = 0
        self._admitting = True
        self._cursor = 0  # asynchronous: next bracket to check for a promotion; synchronous: bracket running
        self._streak_limit = plan.max_consecutive_failures
        self._streak = 0  # trials failed at their first rung since the last first-rung result
        self._failed = 0  # trials failed
        self._handlers = {
            Ask: lambda e: self.ask(),
            Report: lambda e: self.report(e.trial, e.attempt, e.rung, e.value),
            Lost: lambda e: self.lost(e.trial, e.attempt, e.counted),
            Crashed: lambda e: self.crashed(e.trial, e.attempt, e.reason),
            Yielded: lambda e: self.yielded(e.trial, e.attempt),
            Cancel: lambda e: self.cancel(e.trial),
            StopAdmitting: lambda e: self.stop_admitting(),
            Resume: lambda e: self.resume(),
        }

    # ---- the one entry point ------------------------------------------------------------

    def apply(self, event: Event) -> Outcome | None:
        """Apply one event; return the command or verdict it produces."""
        try:
            handler = self._handlers[type(event)]
        except KeyError:
            raise RejectedEvent(f"not an event the core knows: {event!r}") from None
        return handler(event)

    # ---- decisions ------------------------------------------------------------------------

    def ask(self) -> Segment | Idle | Drained:
        """A slot is free: the segment to run there, ``Idle`` or ``Drained``."""
        if self._streak >= self._streak_limit > 0:  # failing: hand out nothing more
            return IDLE if self._active else DRAINED
        if self._queue:
            return self._dispatch(self._trials[self._queue.popleft()])
        if self._synchronous:
            return self._ask_synchronous()
        # Each board keeps its answer up to date (``ready``), so checking the rungs is a read
        # per rung.
        for following, k, board in self._scans[self._cursor]:
            if board.ready is not None:
                self._cursor = following
                return self._promote(board, k)
        if self._admitting:
            trial = self._new_trial(self._deal() if len(self._brackets) > 1 else 0)
            if trial is not None:
                return self._dispatch(trial)
        if self._active == 0 and not self._admitting:
            return DRAINED
        return IDLE

    def _deal(self) -> int:
        """The bracket the next new trial starts in (asynchronous Hyperband): the quota method
        of apportionment (Balinski and Young, 1975) with the brackets' weights n_s as the
        populations and the trials as the seats. Trial N + 1 may go to a bracket whose count
        c is below its upper quota, c * W < (N + 1) * w (W the sum of the weights); of those,
        it goes to the one with the smallest (c + 1) / w, the lowest index (largest s) on a
        tie. Every count then stays within its quota, floor or ceil of N * w / W, for every
        N. Integers only; O(number of brackets)."""
        total = self._weight_total
        seats = len(self._trials) + 1  # every trial was dealt to one bracket
        best, best_next, best_weight = 0, 0, 0
        for index, (bracket, weight) in enumerate(zip(self._brackets, self._weights)):
            created = bracket.created
            if created * total < seats * weight and (best_weight == 0 or (created + 1) * best_weight < best_next * weight):
                best, best_next, best_weight = index, created + 1, weight
        return best

    def _promote(self, board: PromotionBoard, k: int) -> Segment:
        trial = self._trials[board.promote()[1]]
        state = trial.state
        trial.state = _PROMOTE.get(state) or advance(state, "promote", trial.id)
        trial.rung = k + 1
        return self._dispatch(trial)

    def _ask_synchronous(self) -> Segment | Idle | Drained:
        brackets = self._brackets
        while self._cursor < len(brackets):
            bracket = brackets[self._cursor]
            assert bracket.counts is not None
            if bracket.level == 0 and self._admitting and bracket.created < bracket.counts[0]:
                trial = self._new_trial(self._cursor)
                if trial is not None:
                    bracket.outstanding += 1
                    return self._dispatch(trial)
            if bracket.outstanding > 0:
                return IDLE  # the barrier
            if not self._open_next_level(bracket):
                self._cursor += 1
                continue
            if self._queue:
                return self._dispatch(self._trials[self._queue.popleft()])
        return DRAINED if self._active == 0 else IDLE

    def _open_next_level(self, bracket: _Bracket) -> bool:
        """Barrier reached at ``bracket.level``: promote the top floor(n / eta) of its n results
        (a trial that failed has no result and does not count). False when the bracket is over
        (top rung done, or nobody left to promote)."""
        board = bracket.boards[bracket.level]
        if bracket.level == bracket.top or len(board) == 0:
            return False
        keep = len(board) // self._eta
        promoted = 0
        # A cancelled trial keeps its place in the ranking: the places are the top floor(n/eta)
        # of the results, not the top floor(n/eta) of the trials still around.
        for rank, (_loss, tid) in enumerate(board.results()):
            trial = self._trials[tid]
            if trial.state != PARKED or trial.rung != bracket.level:
                continue
            if rank < keep:
                trial.state = advance(trial.state, "promote", tid)
                trial.rung = bracket.level + 1
                self._queue.append(tid)
                promoted += 1
            else:
                trial.state = advance(trial.state, "cull", tid)
        board.promoted = promoted
        if promoted == 0:
            return False
        bracket.level += 1
        bracket.outstanding = promoted
        return True

    def _new_trial(self, bracket_index: int) -> _Trial | None:
        trials = self._trials
        max_trials = self._max_trials
        if max_trials is not None and len(trials) >= max_trials:
            self._admitting = False
            return None
        config = self.sampler.propose()
        if config is None:
            self._admitting = False
            return None
        trial = _Trial(len(trials), bracket_index, config)
        trials.append(trial)
        self._brackets[bracket_index].created += 1
        return trial

    def _dispatch(self, trial: _Trial) -> Segment:
        state = trial.state
        trial.state = _DISPATCH.get(state) or advance(state, "dispatch", trial.id)
        attempt = trial.attempt = trial.attempt + 1
        self._active += 1
        b = trial.bracket
        bracket = self._brackets[b]
        rung = trial.rung
        if self._stopping:
            return Segment(
                trial.id, attempt, rung, b, trial.saved, bracket.budgets[-1], trial.config, bracket.remaining[rung]
            )
        milestones = bracket.milestones[rung]
        return Segment(trial.id, attempt, rung, b, trial.saved, milestones[0], trial.config, milestones)

    # ---- results and failures -------------------------------------------------------------

    def _running(self, tid: int, attempt: int) -> _Trial:
        if not 0 <= tid < len(self._trials):
            raise UnknownTrial(f"trial {tid} was never created by this search")
        trial = self._trials[tid]
        if trial.state != ACTIVE:
            raise RejectedEvent(f"trial {tid} is {trial.state}; no segment of it is running")
        if attempt != trial.attempt:
            raise RejectedEvent(f"trial {tid}: attempt {attempt} is not the running attempt {trial.attempt}")
        return trial

    def report(self, tid: int, attempt: int, rung: int, value: float) -> Parked | Finished | Continue | Culled:
        """Segment ``attempt`` of trial ``tid`` measured ``value`` at ``rung``."""
        trials = self._trials
        trial = trials[tid] if 0 <= tid < len(trials) else None
        if trial is None or trial.state != ACTIVE or attempt != trial.attempt:
            trial = self._running(tid, attempt)  # raises, saying why
        if rung != trial.rung:
            raise RejectedEvent(f"trial {tid}: a result for rung {rung} arrived, but it is running to rung {trial.rung}")
        if rung == 0:
            self._streak = 0  # a first-rung result: the objective can work
        loss = to_loss(float(value), self._maximize)
        bracket = self._brackets[trial.bracket]
        board = bracket.boards[rung]
        trial.loss = loss
        if trial.record is None or loss < trial.record:
            trial.record = loss
        trial.saved = bracket.budgets[rung]
        observe = self._observe
        if observe is not None:
            observe(tid, trial.config, rung + bracket.level_offset, loss)
        top = rung == bracket.top
        state = trial.state  # ACTIVE
        if self._stopping:
            entry = board.record(loss, tid)
            if not top and board.rank(entry) * self._eta < len(board):
                trial.state = _CONTINUE.get(state) or advance(state, "continue", tid)
                trial.rung = rung + 1
                return Continue(tid, rung + 1)
            self._active -= 1
            if top:
                trial.state = _FINISH.get(state) or advance(state, "finish", tid)
                return Finished(tid)
            trial.state = _CULL.get(state) or advance(state, "cull", tid)
            return Culled(tid, rung)
        self._active -= 1
        board.record(loss, tid)
        if self._synchronous:
            bracket.outstanding -= 1
        if top:
            trial.state = _FINISH.get(state) or advance(state, "finish", tid)
            return Finished(tid)
        trial.state = _PARK.get(state) or advance(state, "park", tid)
        return Parked(tid, rung)

    def lost(self, tid: int, attempt: int, counted: bool = True) -> Requeued | Failed:
        """The machine went away (or the head stopped the segment): requeue from the last
        checkpoint. A ``counted`` loss beyond ``plan.max_losses`` fails the trial instead."""
        trial = self._running(tid, attempt)
        if counted:
            trial.losses += 1
            if trial.losses > self.plan.max_losses:
                return self._fail(trial, f"lost {trial.losses} time{'s' if trial.losses > 1 else ''}")
        return self._requeue(trial, "requeue")

    def yielded(self, tid: int, attempt: int) -> Requeued:
        """The segment saved and stopped when asked: requeue it at its rung."""
        trial = self._running(tid, attempt)
        return self._requeue(trial, "requeue")

    def crashed(self, tid: int, attempt: int, reason: str = "") -> Requeued | Failed:
        """User code failed: retry up to ``plan.max_crashes`` times, then fail the trial."""
        trial = self._running(tid, attempt)
        trial.crashes += 1
        if trial.crashes <= self.plan.max_crashes:
            return self._requeue(trial, "retry")
        return self._fail(trial, reason)

    def _fail(self, trial: _Trial, reason: str) -> Failed:
        trial.state = advance(trial.state, "fail", trial.id)
        self._active -= 1
        self._failed += 1
        if trial.rung == 0:  # no result yet, at any rung
            self._streak += 1
        self._leave_barrier(trial)
        return Failed(trial.id, reason)

    def _requeue(self, trial: _Trial, move: str) -> Requeued:
        trial.state = advance(trial.state, move, trial.id)
        self._active -= 1
        self._queue.append(trial.id)
        return Requeued(trial.id, trial.rung)

    def _leave_barrier(self, trial: _Trial) -> None:
        # Only the running bracket has unfinished trials, all at its open level.
        if self._synchronous:
            self._brackets[trial.bracket].outstanding -= 1

    def cancel(self, tid: int) -> Cancelled:
        """Withdraw a trial. A running segment's later result will be refused."""
        if not 0 <= tid < len(self._trials):
            raise UnknownTrial(f"trial {tid} was never created by this search")
        trial = self._trials[tid]
        state = trial.state
        if state in FINAL_STATES:
            raise RejectedEvent(f"trial {tid} is already {state}")
        trial.state = advance(state, "cancel", tid)
        if state == ACTIVE:
            self._active -= 1
            self._leave_barrier(trial)
        elif state == QUEUED:
            self._queue.remove(tid)
            self._leave_barrier(trial)
        elif state == PARKED and trial.loss is not None:
            # Asynchronous: its result waits at that rung's promotion board; synchronous: the
            # board has no queue (and withdraw does nothing).
            self._brackets[trial.bracket].boards[trial.rung].withdraw((trial.loss, tid))
        return Cancelled(tid)

    def backlog(self, limit: int) -> int:
        """How many segments ``ask`` would hand out now, before any new result, up to ``limit``.

        An estimate, exact where it matters: it is 0 exactly when ``ask`` would hand out no
        segment. It counts requeued trials, one promotion per rung with one ready (a promotion
        can make the next one ready), the barrier's promotions in the synchronous modes, and
        new trials while admitting (the trial limit left, or ``limit`` when there is none; a
        sampler that runs dry makes that an overcount). A fair-sharing head uses it as the
        search's demand without asking, so nothing is committed early.
        """
        if self._streak >= self._streak_limit > 0:
            return 0  # failing: ``ask`` hands out nothing
        count = len(self._queue)
        if count >= limit:
            return limit
        if self._synchronous:
            return min(count + self._synchronous_backlog(), limit)
        for bracket in self._brackets:
            count += sum(1 for _k, board in bracket.descending if board.ready is not None)
        if self._admitting:
            left = limit if self._max_trials is None else self._max_trials - len(self._trials)
            count += max(0, left)
        return min(count, limit)

    def _synchronous_backlog(self) -> int:
        """``backlog``'s count beyond the queue in the synchronous modes, read-only: the new
        trials the open bracket still admits, else what its barrier (or the next bracket)
        would release."""
        left = None if self._max_trials is None else self._max_trials - len(self._trials)
        for index in range(self._cursor, len(self._brackets)):
            bracket = self._brackets[index]
            assert bracket.counts is not None
            if bracket.level == 0 and self._admitting and bracket.created < bracket.counts[0]:
                new = bracket.counts[0] - bracket.created
                new = new if left is None else min(new, left)
                if new > 0:
                    return new
            if bracket.outstanding > 0:
                return 0  # the barrier
            board = bracket.boards[bracket.level]
            if bracket.level < bracket.top and len(board):
                keep = len(board) // self._eta
                promoted = sum(
                    1 for rank, (_loss, tid) in enumerate(board.results())
                    if rank < keep and self._trials[tid].state == PARKED and self._trials[tid].rung == bracket.level
                )
                if promoted:
                    return promoted
        return 0

    def stop_admitting(self) -> None:
        """Start no new trials from now on (limits reached, or the user asked)."""
        self._admitting = False

    def resume(self) -> None:
        """A new run of the search: its run of first-rung failures starts over."""
        self._streak = 0

    @property
    def failing(self) -> str | None:
        """Why this search can only fail, or None: ``plan.max_consecutive_failures`` trials in
        a row failed at their first rung (``ask`` then hands out nothing more), or every trial
        failed and no new one will start."""
        limit = self._streak_limit
        if self._streak >= limit > 0:
            return (f"{self._streak} trials in a row failed at their first rung "
                    f"(limits.max_consecutive_failures = {limit})")
        n = len(self._trials)
        if n and self._failed == n and not self._admitting:
            return f"every trial failed ({n} of {n})"
        return None

    # ---- reading ----------------------------------------------------------------------------

    @property
    def admitting(self) -> bool:
        return self._admitting

    @property
    def active(self) -> int:
        return self._active

    def __len__(self) -> int:
        return len(self._trials)

    def trial(self, tid: int) -> TrialView:
        if not 0 <= tid < len(self._trials):
            raise UnknownTrial(f"trial {tid} was never created by this search")
        return TrialView(self._trials[tid])

    def trials(self) -> list[TrialView]:
        return [TrialView(t) for t in self._trials]

    def value_of(self, loss: float) -> float:
        """The measured value a loss stands for (inverse of the direction normalisation)."""
        return -loss if self._maximize else loss

    def leaderboard(self, limit: int = 10) -> list[TrialView]:
        """Best trials first: the highest rung reached, then the best result there.

        Reads the rung boards, whose budgets are comparable within a level across brackets.
        """
        by_level: dict[int, list[RungBoard | PromotionBoard]] = {}
        for bracket in self._brackets:
            for k, board in enumerate(bracket.boards):
                if len(board):
                    by_level.setdefault(k + bracket.level_offset, []).append(board)
        seen: set[int] = set()
        out: list[TrialView] = []
        for level in sorted(by_level, reverse=True):
            merged = sorted(e for board in by_level[level] for e in board.best(limit + len(seen)))
            for _loss, tid in merged:
                if tid in seen:
                    continue
                seen.add(tid)
                out.append(TrialView(self._trials[tid]))
                if len(out) >= limit:
                    return out
        return out

    def statistics(self) -> dict[str, Any]:
        """A read-only summary: trials per state, rung occupancy per bracket, the best so far."""
        states = dict.fromkeys(STATES, 0)
        for t in self._trials:
            states[t.state] += 1
        brackets = []
        # Brackets are named by Li et al.'s s (the number of rungs minus one: s_max is the
        # bracket that starts at the minimum budget), and by iteration when sync-hyperband
        # repeats them; the list index is internal.
        repeats = self.plan.mode == "sync-hyperband" and self.plan.iterations > 1
        per_iteration = len(self._brackets) // self.plan.iterations if repeats else 0
        for index, bracket in enumerate(self._brackets):
            rungs = []
            for k, board in enumerate(bracket.boards):
                rungs.append({"budget": bracket.budgets[k], "results": len(board), "promoted": board.promoted, "running": 0})
            entry: dict[str, Any] = {"s": bracket.top}
            if per_iteration:
                entry["iteration"] = index // per_iteration + 1
            entry.update(rungs=rungs, created=bracket.created)
            brackets.append(entry)
        for t in self._trials:
            if t.state == ACTIVE:
                brackets[t.bracket]["rungs"][t.rung]["running"] += 1
        best = self.leaderboard(1)
        return {
            "trials": len(self._trials),
            "states": states,
            "active": self._active,
            "queued": len(self._queue),
            "admitting": self._admitting,
            "failing": self.failing,
            "brackets": brackets,
            "best": None if not best or best[0].loss is None else {
                "trial": best[0].id,
                "value": self.value_of(best[0].loss),
                "rung": best[0].rung,
                "budget": best[0].budget,
            },
        }

    # ---- snapshot ---------------------------------------------------------------------------

    def snapshot(self) -> dict[str, Any]:
        """The whole state as JSON-compatible data (losses may be +inf)."""
        t = self._trials
        return {
            "format": SNAPSHOT_FORMAT,
            "plan": self.plan.to_dict(),
            "trials": {
                "bracket": [x.bracket for x in t],
                "state": [x.state for x in t],
                "rung": [x.rung for x in t],
                "attempt": [x.attempt for x in t],
                "saved": [x.saved for x in t],
                "loss": [x.loss for x in t],
                "record": [x.record for x in t],
                "crashes": [x.crashes for x in t],
                "losses": [x.losses for x in t],
                "config": [x.config for x in t],
            },
            "brackets": [
                {
                    "boards": [
                        {"results": [list(e) for e in results], "unpromoted": [list(e) for e in waiting],
                         "promoted": board.promoted}
                        for board in b.boards
                        for results, waiting in (board.dump(),)
                    ],
                    "level": b.level,
                    "created": b.created,
                    "outstanding": b.outstanding,
                }
                for b in self._brackets
            ],
            "queue": list(self._queue),
            "active": self._active,
            "admitting": self._admitting,
            "cursor": self._cursor,
            "streak": self._streak,
            "sampler": self.sampler.state(),
        }

    @classmethod
    def restore(cls, snapshot: Mapping[str, Any], sampler: Sampler) -> SearchCore:
        """A core equal to the one the snapshot was taken from. ``sampler`` must be built with
        the same arguments as the original's; its state is restored from the snapshot."""
        if snapshot.get("format") != SNAPSHOT_FORMAT:
            raise RejectedEvent(f"snapshot format {snapshot.get('format')!r} is not {SNAPSHOT_FORMAT}")
        core = cls(SearchPlan.from_dict(dict(snapshot["plan"])), sampler)
        cols = snapshot["trials"]
        for tid, bracket in enumerate(cols["bracket"]):
            trial = _Trial(tid, bracket, cols["config"][tid])
            trial.state = cols["state"][tid]
            trial.rung = cols["rung"][tid]
            trial.attempt = cols["attempt"][tid]
            trial.saved = cols["saved"][tid]
            trial.loss = cols["loss"][tid]
            trial.record = cols["record"][tid] if "record" in cols else trial.loss
            trial.crashes = cols["crashes"][tid]
            trial.losses = cols["losses"][tid] if "losses" in cols else 0  # older snapshots counted none
            core._failed += trial.state == FAILED
            core._trials.append(trial)
        for bracket, data in zip(core._brackets, snapshot["brackets"], strict=True):
            for board, bdata in zip(bracket.boards, data["boards"], strict=True):
                board.load(
                    sorted((float(loss), int(tid)) for loss, tid in bdata["results"]),
                    sorted((float(loss), int(tid)) for loss, tid in bdata["unpromoted"]),
                )
                board.promoted = bdata["promoted"]
            bracket.level = data["level"]
            bracket.created = data["created"]
            bracket.outstanding = data["outstanding"]
            if "record" not in cols:  # an older snapshot: every result is on a rung board
                for board in bracket.boards:
                    for loss, tid in board.results():
                        trial = core._trials[tid]
                        if trial.record is None or loss < trial.record:
                            trial.record = loss
        core._queue.extend(snapshot["queue"])
        core._active = snapshot["active"]
        core._admitting = snapshot["admitting"]
        core._cursor = snapshot["cursor"]
        core._streak = snapshot.get("streak", 0)
        sampler.restore(snapshot["sampler"])
        return core
