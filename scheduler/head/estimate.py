"""The live view's estimate of time left: the planner's simulation, fed with this run's costs.

Every ``every`` seconds, once a few segments have finished, the segment times measured so far
are fitted to ``overhead + units * seconds_per_unit`` (least squares) and the search is
simulated with the cluster simulator that ``rungway plan`` uses (scheduler/sim/), on the slots
the head has now. The estimate is that simulation's wall time less the time already spent.
It runs on a background thread so that the head's loop never waits for it.
"""

from __future__ import annotations

import logging
import threading
from collections import deque
from typing import Any

import numpy as np

__all__ = ["TimeLeft"]

log = logging.getLogger("rungway.head")


class TimeLeft:
    def __init__(self, spec: Any, every: float = 30.0, min_segments: int = 8, repeats: int = 3) -> None:
        self.spec = spec
        self.every = every
        self.min_segments = min_segments
        self.repeats = repeats
        self.samples: deque[tuple[float, float]] = deque(maxlen=2000)  # (budget units, seconds)
        self.predicted_total: float | None = None
        self._last = -1e18
        self._thread: threading.Thread | None = None

    def record(self, units: float, seconds: float) -> None:
        if units > 0 and seconds >= 0:
            self.samples.append((units, seconds))

    def seconds_left(self, elapsed: float) -> float | None:
        if self.predicted_total is None:
            return None
        return max(0.0, self.predicted_total - elapsed)

    def maybe_update(self, now: float, slots: int) -> None:
        if len(self.samples) < self.min_segments or now - self._last < self.every or slots < 1:
            return
        if self._thread is not None and self._thread.is_alive():
            return
        self._last = now
        samples = list(self.samples)
        self._thread = threading.Thread(target=self._simulate, args=(samples, slots), name="rungway-eta", daemon=True)
        self._thread.start()

    def _simulate(self, samples: list[tuple[float, float]], slots: int) -> None:
        from rungway.scheduler.sim import LinearCost, plan_search

        units = np.array([u for u, _ in samples])
        seconds = np.array([s for _, s in samples])
        if np.ptp(units) > 0:
            slope, intercept = np.polyfit(units, seconds, 1)
        else:
            slope, intercept = float(seconds.mean() / units.mean()), 0.0
        slope = max(float(slope), 1e-6)
        intercept = max(float(intercept), 0.0)
        try:
            estimate = plan_search(self.spec, workers=slots, cost=LinearCost(slope, intercept), repeats=self.repeats)
        except Exception as exc:  # an estimate is never worth stopping a search for
            log.debug("time-left simulation failed: %s", exc)
            return
        self.predicted_total = estimate.wall_seconds.median
