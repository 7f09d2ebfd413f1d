"""The line between running segments and the head: a small Ray actor and its worker side.

Segments post heartbeats (how far they got) and, in ASHA's stopping form, their rung results;
the head drains the posts, answers rung results with a verdict and may ask a segment to
yield. One actor serves a whole search; every call is small, and heartbeats are rate-limited
on the worker side, so the actor is never on the per-segment hot path of the promotion form.
"""

from __future__ import annotations

import time
from typing import Any

import ray

__all__ = ["Relay", "ActorLink"]

Budget = int | float


@ray.remote(num_cpus=0, max_restarts=0)
class Relay:
    """Head-side mailbox for running segments (lives on the head node)."""

    def __init__(self) -> None:
        self._milestones: list[tuple[int, int, int, float]] = []
        self._beats: dict[tuple[int, int], tuple[float, Budget]] = {}
        self._verdicts: dict[tuple[int, int, int], bool] = {}
        self._yields: set[tuple[int, int]] = set()

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> None:
        self._milestones.append((trial, attempt, rung, value))
        self._beats[(trial, attempt)] = (time.time(), -1)

    def verdict(self, trial: int, attempt: int, rung: int) -> bool | None:
        return self._verdicts.pop((trial, attempt, rung), None)

    def beat(self, trial: int, attempt: int, budget: Budget) -> None:
        self._beats[(trial, attempt)] = (time.time(), budget)

    def should_yield(self, trial: int, attempt: int) -> bool:
        return (trial, attempt) in self._yields

    # ---- head side ----
    def drain(self) -> dict[str, Any]:
        milestones, self._milestones = self._milestones, []
        beats, self._beats = self._beats, {}
        return {"milestones": milestones, "beats": beats}

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None:
        for trial, attempt, rung, go in verdicts:
            self._verdicts[(trial, attempt, rung)] = go

    def ask_to_yield(self, trial: int, attempt: int) -> None:
        self._yields.add((trial, attempt))

    def forget(self, trial: int, attempt: int) -> None:
        self._yields.discard((trial, attempt))


class ActorLink:
    """The worker side of :class:`Relay` (implements ``runner.HeadLink``)."""

    def __init__(self, relay: Any, beat_seconds: float = 2.0, poll_seconds: float = 0.02) -> None:
        self._relay = relay
        self._beat_seconds = beat_seconds
        self._poll_seconds = poll_seconds
        self._last_beat = 0.0

    def milestone(self, trial: int, attempt: int, rung: int, value: float) -> bool:
        ray.get(self._relay.milestone.remote(trial, attempt, rung, value))
        delay = self._poll_seconds
        while True:
            answer = ray.get(self._relay.verdict.remote(trial, attempt, rung))
            if answer is not None:
                return bool(answer)
            time.sleep(delay)
            delay = min(delay * 1.5, 0.5)

    def should_yield(self, trial: int, attempt: int) -> bool:
        return bool(ray.get(self._relay.should_yield.remote(trial, attempt)))

    def beat(self, trial: int, attempt: int, budget: Budget) -> None:
        now = time.monotonic()
        if now - self._last_beat >= self._beat_seconds:
            self._last_beat = now
            self._relay.beat.remote(trial, attempt, budget)  # fire and forget
