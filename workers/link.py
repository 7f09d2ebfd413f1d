"""The line between running segments and the head: a small Ray actor and its worker side.

Segments post heartbeats (how far they got) and, in ASHA's stopping form, their rung results;
the head drains the posts, answers rung results with a verdict and may ask a segment to
yield. One actor serves every search of a head; every call is small, and a segment shorter
than one beat makes no call at all, so the actor is never on the per-segment hot path of the
promotion form.

Theory of operation: no segment ever waits for the head in a blocking Ray call. When a Ray
task's *main thread* blocks in ``ray.get`` -- or in ``ray.wait`` on an object not ready yet,
even with ``timeout=0`` -- its worker tells the raylet it is blocked, the raylet lends the
task's CPU to a queued task (starting a new worker process if none is idle), and the task
takes the CPU back when it unblocks: more segments than CPUs run at once and worker processes
pile up (issue #11). Ray does this for the main thread only; a call from any other thread of
the worker releases nothing, and a task that sleeps, or waits on a ``threading`` primitive,
keeps its CPU. So the work is split:

- The segment's own thread (the objective's) never calls ``ray.get`` or ``ray.wait``. It
  submits calls (``.remote()`` only queues them) and reads and writes a local mailbox.
- One daemon thread per worker process (:class:`_Beater`) does all the listening. Every
  ``beat_seconds`` it sends the running segment's beat (``Relay.beat``, with how far it got)
  and keeps the ObjectRef; on its next turns it looks at it with ``ray.wait(timeout=0)`` and
  calls ``ray.get`` only once it is ready. At most one beat is in flight. The relay's answer
  to a beat is that segment's mail: whether the head asks it to yield, and the verdicts on
  its rung results; the thread puts them in the mailbox.
- ``asked_to_yield`` reads the mailbox's flag: no remote call, so an objective may check it
  after every step.
- ``milestone`` (stopping form) posts the rung result with ``.remote()``, tells the beat
  thread to beat every ``poll_seconds`` (growing to half a second) until the verdict is in,
  and waits for it on the mailbox's ``threading.Condition``, in steps: a sleep as far as Ray
  can tell, so the segment keeps its CPU and no queued segment starts in its place. If the
  relay fails (it died with the head's node), the beat thread keeps the error and
  ``milestone`` raises it, so the segment crashes rather than waiting forever.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Any

import ray

from .cpu import own_thread

__all__ = ["Relay", "ActorLink"]

Budget = int | float


@ray.remote(num_cpus=0, max_restarts=0)
class Relay:
    """Head-side mailbox for running segments (lives on the head node). One relay serves every
    search of a head, so posts are keyed by (search, trial, attempt)."""

    def __init__(self) -> None:
        self._milestones: list[tuple[str, int, int, int, float]] = []
        self._beats: dict[tuple[str, int, int], tuple[Budget, str]] = {}
        self._verdicts: dict[tuple[str, int, int], dict[int, bool]] = {}
        self._yields: set[tuple[str, int, int]] = set()

    def milestone(self, search: str, trial: int, attempt: int, rung: int, value: float) -> None:
        self._milestones.append((search, trial, attempt, rung, value))

    def beat(self, search: str, trial: int, attempt: int, budget: Budget, node: str = "") -> tuple[bool, dict[int, bool]]:
        """The segment is alive; ``budget`` is how far it got (-1: unknown), ``node`` where.

        Answers the segment's mail: whether the head asks it to yield, and the verdicts
        decided on its rung results since its last beat (rung -> run on), handed over once.
        """
        key = (search, trial, attempt)
        previous = self._beats.get(key)
        if budget < 0 and previous is not None:
            budget = previous[0]
        self._beats[key] = (budget, node)
        return key in self._yields, self._verdicts.pop(key, {})

    # ---- head side ----
    def drain(self) -> dict[str, Any]:
        milestones, self._milestones = self._milestones, []
        beats, self._beats = self._beats, {}
        return {"milestones": milestones, "beats": beats}

    def decide(self, verdicts: list[tuple[str, int, int, int, bool]]) -> None:
        for search, trial, attempt, rung, go in verdicts:
            self._verdicts.setdefault((search, trial, attempt), {})[rung] = go

    def ask_to_yield(self, search: str, trial: int, attempt: int) -> None:
        self._yields.add((search, trial, attempt))

    def forget(self, search: str, trial: int, attempt: int) -> None:
        self._yields.discard((search, trial, attempt))
        self._verdicts.pop((search, trial, attempt), None)


@dataclass(frozen=True, eq=False)
class _Running:
    """The segment a worker process runs now, as its beats name it (one object per segment:
    an answer is the current segment's mail only if it was sent for this very object)."""

    relay: Any
    search: str
    trial: int
    attempt: int
    node: str
    beat_seconds: float
    poll_seconds: float


_FIRST_CHECK = 0.005  # seconds to the first look at a beat's answer; doubled up to _LAST_CHECK
_LAST_CHECK = 0.1
_LONGEST_POLL = 0.5  # beats while a verdict is awaited: poll_seconds, growing 1.5x up to this
_WAIT_STEP = 0.1  # the segment's thread waits for a verdict in steps this long


class _Beater:
    """One daemon thread per worker process: beats for whatever segment runs there now and
    keeps the relay's answers in a mailbox. The only Ray calls that wait for anything are
    made on this thread (see the module docstring); everything else is guarded by ``cond``."""

    def __init__(self) -> None:
        self.cond = threading.Condition()
        self.current: _Running | None = None
        self.budget: Budget = -1  # how far the current segment got, sent with its next beat
        self.yield_asked = False
        self.verdicts: dict[int, bool] = {}  # rung -> run on
        self.awaiting = 0  # rung results posted whose verdict is not in yet: beat quickly
        self.failure: BaseException | None = None  # the relay failed to answer a beat
        self.next_beat = 0.0
        self.poll = 0.0
        self._ref: Any = None  # the beat in flight (this thread's own)
        self._ref_for: _Running | None = None
        self._check = _FIRST_CHECK
        self.thread = threading.Thread(target=self._loop, name="rungway-beat", daemon=True)
        self.thread.start()

    # ---- the segment's thread ----
    def start(self, running: _Running) -> None:
        with self.cond:
            self.current = running
            self.budget, self.yield_asked, self.verdicts, self.awaiting, self.failure = -1, False, {}, 0, None
            self.next_beat = time.monotonic() + running.beat_seconds
            self.cond.notify_all()

    def stop(self, running: _Running) -> None:
        with self.cond:
            if self.current is running:
                self.current = None
                self.verdicts, self.awaiting = {}, 0

    def posted(self, running: _Running) -> None:
        """A rung result was posted: beat now and often until its verdict is in."""
        with self.cond:
            if self.current is running:
                self.awaiting += 1
                self.poll = 0.0
                self.next_beat = time.monotonic()
                self.cond.notify_all()

    def verdict(self, running: _Running, rung: int) -> bool:
        """Waits, without any Ray call, until the beat thread brings the verdict on ``rung``."""
        with self.cond:
            try:
                while True:
                    if self.current is not running:
                        raise RuntimeError("the segment ended while it waited for a verdict")
                    if rung in self.verdicts:
                        return bool(self.verdicts.pop(rung))
                    if self.failure is not None:
                        raise RuntimeError(
                            f"the head's relay failed while this segment waited for its verdict at rung {rung}: "
                            f"{type(self.failure).__name__}"
                        ) from self.failure
                    self.cond.wait(timeout=_WAIT_STEP)  # a sleep to Ray: the task keeps its CPU
            finally:
                if self.current is running:
                    self.awaiting = max(0, self.awaiting - 1)

    # ---- the beat thread ----
    def _loop(self) -> None:
        own_thread()  # rungway's, not the objective's: never charged to a segment
        while True:
            with self.cond:
                self.cond.wait(timeout=self._nap())
            try:
                self._collect()
                self._send()
            except Exception:  # Ray is shutting down, say; never let the thread die
                self._ref = self._ref_for = None

    def _nap(self) -> float | None:
        """Seconds until there is something to do (None: until a segment starts)."""
        if self._ref is not None:
            return self._check
        if self.current is None:
            return None
        return max(0.0, self.next_beat - time.monotonic())

    def _collect(self) -> None:
        """Takes the answer to the beat in flight if it is in (never waits for it)."""
        if self._ref is None:
            return
        ready, _ = ray.wait([self._ref], timeout=0)
        if not ready:
            self._check = min(self._check * 2, _LAST_CHECK)
            return
        ref, sent_for = self._ref, self._ref_for
        self._ref = self._ref_for = None
        try:
            answer, error = ray.get(ref), None  # ready: returns at once
        except Exception as exc:  # the relay died (with the head's node)
            answer, error = None, exc
        with self.cond:
            if sent_for is None or sent_for is not self.current:
                return  # the answer of a segment that has ended
            if error is not None:
                self.failure = error
            else:
                asked, verdicts = answer
                self.yield_asked = self.yield_asked or bool(asked)  # a request is never withdrawn
                self.verdicts.update(verdicts)
            self.cond.notify_all()

    def _send(self) -> None:
        """Sends the current segment's beat when it is due and none is in flight."""
        with self.cond:
            running = self.current
            now = time.monotonic()
            if running is None or self._ref is not None or now < self.next_beat:
                return
            budget = self.budget
            if self.awaiting:
                self.poll = min(self.poll * 1.5, _LONGEST_POLL) if self.poll else running.poll_seconds
                self.next_beat = now + self.poll
            else:
                self.next_beat = now + running.beat_seconds
        try:
            self._ref = running.relay.beat.remote(running.search, running.trial, running.attempt, budget, running.node)
            self._ref_for, self._check = running, _FIRST_CHECK
        except Exception:  # the head is gone; the segment finishes on its own
            self._ref = self._ref_for = None


_beater: _Beater | None = None


class ActorLink:
    """The worker side of :class:`Relay` (implements ``runner.HeadLink``).

    While a segment runs, the process's beat thread tells the head every ``beat_seconds``
    that it is alive and how far it got (so that a plain objective that never reports is
    still seen), and brings back the head's answers: a request to yield, verdicts. Nothing
    here waits in a Ray call on the segment's thread (see the module docstring).
    """

    def __init__(self, relay: Any, node: str = "", beat_seconds: float = 1.0, poll_seconds: float = 0.02,
                 search: str = "") -> None:
        self._relay = relay
        self._search = search
        self._node = node
        self._beat_seconds = beat_seconds
        self._poll_seconds = poll_seconds
        self._running: _Running | None = None

    def start(self, trial: int, attempt: int) -> None:
        global _beater
        if _beater is None:
            _beater = _Beater()
        self._running = _Running(self._relay, self._search, trial, attempt, self._node, self._beat_seconds,
                                 self._poll_seconds)
        _beater.start(self._running)

    def stop(self) -> None:
        if _beater is not None and self._running is not None:
            _beater.stop(self._running)

    def _mine(self, trial: int, attempt: int) -> _Running:
        running = self._running
        if _beater is None or running is None or (running.trial, running.attempt) != (trial, attempt):
            raise RuntimeError(f"no segment of trial {trial}, attempt {attempt} was started on this link")
        return running

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> bool:
        running = self._mine(trial, attempt)
        assert _beater is not None
        # Posted before the quick beats are asked for: one process's calls reach the actor in order.
        self._relay.milestone.remote(self._search, trial, attempt, rung, value)
        _beater.posted(running)
        return _beater.verdict(running, rung)

    def asked_to_yield(self, trial: int, attempt: int) -> bool:
        """What the last answered beat said: a local read, never a call to the head."""
        beater, running = _beater, self._running
        if beater is None or running is None or (running.trial, running.attempt) != (trial, attempt):
            return False
        with beater.cond:
            return beater.current is running and beater.yield_asked

    def beat(self, trial: int, attempt: int, budget: Budget) -> None:
        """How far the segment got; the next beat carries it (no call to the head here)."""
        beater, running = _beater, self._running
        if beater is None or running is None or (running.trial, running.attempt) != (trial, attempt):
            return
        with beater.cond:
            if beater.current is running:
                beater.budget = budget
