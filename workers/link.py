"""The line between running segments and the head: a small Ray actor and its worker side.

Segments post heartbeats (how far they got) and, in ASHA's stopping form, their rung results;
the head drains the posts, answers rung results with a verdict and may ask a segment to
yield. One actor serves a whole search; every call is small, and heartbeats are rate-limited
on the worker side, so the actor is never on the per-segment hot path of the promotion form.
"""

from __future__ import annotations

import threading
import time
from typing import Any

import ray

__all__ = ["Relay", "ActorLink"]

Budget = int | float


@ray.remote(num_cpus=0, max_restarts=0)
class Relay:
    """Head-side mailbox for running segments (lives on the head node). One relay serves every
    search of a head, so posts are keyed by (search, trial, attempt)."""

    def __init__(self) -> None:
        self._milestones: list[tuple[str, int, int, int, float]] = []
        self._beats: dict[tuple[str, int, int], tuple[Budget, str]] = {}
        self._verdicts: dict[tuple[str, int, int, int], bool] = {}
        self._yields: set[tuple[str, int, int]] = set()

    def milestone(self, search: str, trial: int, attempt: int, rung: int, value: float) -> None:
        self._milestones.append((search, trial, attempt, rung, value))

    def verdict(self, search: str, trial: int, attempt: int, rung: int) -> bool | None:
        return self._verdicts.pop((search, trial, attempt, rung), None)

    def beat(self, search: str, trial: int, attempt: int, budget: Budget, node: str = "") -> None:
        """The segment is alive; ``budget`` is how far it got (-1: unknown), ``node`` where."""
        key = (search, trial, attempt)
        previous = self._beats.get(key)
        if budget < 0 and previous is not None:
            budget = previous[0]
        self._beats[key] = (budget, node)

    def asked_to_yield(self, search: str, trial: int, attempt: int) -> bool:
        return (search, trial, attempt) in self._yields

    # ---- head side ----
    def drain(self) -> dict[str, Any]:
        milestones, self._milestones = self._milestones, []
        beats, self._beats = self._beats, {}
        return {"milestones": milestones, "beats": beats}

    def decide(self, verdicts: list[tuple[str, int, int, int, bool]]) -> None:
        for search, trial, attempt, rung, go in verdicts:
            self._verdicts[(search, trial, attempt, rung)] = go

    def ask_to_yield(self, search: str, trial: int, attempt: int) -> None:
        self._yields.add((search, trial, attempt))

    def forget(self, search: str, trial: int, attempt: int) -> None:
        self._yields.discard((search, trial, attempt))


class _Beater:
    """One daemon thread per worker process beats for whatever segment runs there now."""

    def __init__(self, beat_seconds: float) -> None:
        self.beat_seconds = beat_seconds
        self.current: tuple[Any, str, int, int, str] | None = None
        self.lock = threading.Lock()
        self.thread = threading.Thread(target=self._loop, name="rungway-beat", daemon=True)
        self.thread.start()

    def _loop(self) -> None:
        while True:
            time.sleep(self.beat_seconds)
            with self.lock:
                current = self.current
            if current is not None:
                relay, search, trial, attempt, node = current
                try:
                    relay.beat.remote(search, trial, attempt, -1, node)
                except Exception:  # the head is gone; the segment finishes on its own
                    pass


_beater: _Beater | None = None


class ActorLink:
    """The worker side of :class:`Relay` (implements ``runner.HeadLink``).

    While a segment runs, the process's beat thread tells the head every ``beat_seconds``
    that it is alive, so that a plain objective that never reports is still seen; reports
    add how far it got.
    """

    def __init__(self, relay: Any, node: str = "", beat_seconds: float = 2.0, poll_seconds: float = 0.02,
                 search: str = "") -> None:
        self._relay = relay
        self._search = search
        self._node = node
        self._beat_seconds = beat_seconds
        self._poll_seconds = poll_seconds
        self._last_beat = 0.0

    def start(self, trial: int, attempt: int) -> None:
        global _beater
        if _beater is None:
            _beater = _Beater(self._beat_seconds)
        with _beater.lock:
            _beater.current = (self._relay, self._search, trial, attempt, self._node)

    def stop(self) -> None:
        if _beater is not None:
            with _beater.lock:
                _beater.current = None

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> bool:
        ray.get(self._relay.milestone.remote(self._search, trial, attempt, rung, value))
        delay = self._poll_seconds
        while True:
            answer = ray.get(self._relay.verdict.remote(self._search, trial, attempt, rung))
            if answer is not None:
                return bool(answer)
            time.sleep(delay)
            delay = min(delay * 1.5, 0.5)

    def asked_to_yield(self, trial: int, attempt: int) -> bool:
        return bool(ray.get(self._relay.asked_to_yield.remote(self._search, trial, attempt)))

    def beat(self, trial: int, attempt: int, budget: Budget) -> None:
        now = time.monotonic()
        if now - self._last_beat >= self._beat_seconds / 2:
            self._last_beat = now
            self._relay.beat.remote(self._search, trial, attempt, budget, self._node)  # fire and forget
