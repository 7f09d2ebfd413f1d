"""Cost models and value models for the cluster simulator.

A *cost model* says how many seconds one segment takes: a function of the trial's
configuration, the budget it starts from, the budget it runs to and the rung. A *value model*
says what a simulated trial reports at a rung. Both are plain parameter holders; ``bind(rng)``
turns one into the callable the simulator calls per event, drawing from the seeded numpy
``Generator`` it is given (never from global random state). Binding the same model to
generators seeded alike gives the same draws.

Random draws are taken in blocks (a few thousand at a time) and handed out one by one: one
numpy call per block instead of one per event keeps the simulator's per-event cost low.

Cost models:

- :class:`FixedCost`: every segment takes the same time.
- :class:`LinearCost`: ``overhead + (target - start) * seconds_per_unit``.
- :class:`HeavyTailCost`: the linear cost times a random multiplier with mean 1 drawn per
  segment, lognormal (default) or Pareto (Lomax-shifted, shape ``alpha``).
- :class:`FittedCost`: slope and overhead fitted by least squares to a finished search's
  measurements; each simulated segment adds a residual drawn from the fit's own residuals.

Value model: :class:`CurveValue`, a seeded random learning curve per trial plus noise.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    import pandas as pd

    from ..core.plan import SearchPlan

__all__ = [
    "CostFn",
    "CostModel",
    "CurveValue",
    "FittedCost",
    "FixedCost",
    "HeavyTailCost",
    "LinearCost",
    "ValueFn",
    "ValueModel",
    "segments_from_measurements",
]

CostFn = Callable[[Mapping[str, Any], float, float, int], float]
"""``(config, start_budget, target_budget, rung) -> seconds``."""

ValueFn = Callable[[int, Mapping[str, Any], float, int], float]
"""``(trial, config, budget, rung) -> loss`` (lower is better)."""

_BLOCK = 4096


def _per(unit: str) -> str:
    """``"budget unit"``, or ``"budget unit (epochs)"`` for a named unit."""
    return "budget unit" if unit in ("budget", "budget unit") else f"budget unit ({unit})"


def _stream(draw: Callable[[int], np.ndarray]) -> Callable[[], float]:
    """One value at a time from ``draw(n)`` called in blocks of ``_BLOCK``."""
    buffer: list[float] = []

    def next_value() -> float:
        if not buffer:
            buffer.extend(draw(_BLOCK).tolist()[::-1])
        return buffer.pop()

    return next_value


class CostModel(ABC):
    """How long a segment takes."""

    @abstractmethod
    def bind(self, rng: np.random.Generator) -> CostFn:
        """The per-segment cost function, drawing from ``rng``."""

    @abstractmethod
    def describe(self, unit: str = "budget unit") -> str:
        """One line saying what the model assumes."""

    def to_dict(self) -> dict[str, Any]:
        return {"kind": type(self).__name__}


@dataclass(frozen=True)
class FixedCost(CostModel):
    """Every segment takes ``seconds``, whatever its budget."""

    seconds: float

    def __post_init__(self) -> None:
        if not (self.seconds > 0 and math.isfinite(self.seconds)):
            raise ValueError(f"seconds must be a finite number > 0 (got {self.seconds!r})")

    def bind(self, rng: np.random.Generator) -> CostFn:
        seconds = float(self.seconds)
        return lambda config, start, target, rung: seconds

    def describe(self, unit: str = "budget unit") -> str:
        return f"fixed: every segment takes {self.seconds:g} s"

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "fixed", "seconds": self.seconds}


@dataclass(frozen=True)
class LinearCost(CostModel):
    """``overhead + (target_budget - start_budget) * seconds_per_unit`` seconds, no noise."""

    seconds_per_unit: float
    overhead: float = 0.0

    def __post_init__(self) -> None:
        if not (self.seconds_per_unit > 0 and math.isfinite(self.seconds_per_unit)):
            raise ValueError(f"seconds_per_unit must be a finite number > 0 (got {self.seconds_per_unit!r})")
        if not (self.overhead >= 0 and math.isfinite(self.overhead)):
            raise ValueError(f"overhead must be a finite number >= 0 (got {self.overhead!r})")

    def bind(self, rng: np.random.Generator) -> CostFn:
        rate, overhead = float(self.seconds_per_unit), float(self.overhead)
        return lambda config, start, target, rung: overhead + (target - start) * rate

    def describe(self, unit: str = "budget unit") -> str:
        return f"linear: {self.seconds_per_unit:g} s per {_per(unit)} + {self.overhead:g} s per segment"

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "linear", "seconds_per_unit": self.seconds_per_unit, "overhead": self.overhead}


@dataclass(frozen=True)
class HeavyTailCost(CostModel):
    """The linear cost times a random multiplier with mean 1, drawn anew for every segment.

    ``distribution="lognormal"``: ``exp(sigma * Z - sigma**2 / 2)`` with Z standard normal
    (mean 1, median ``exp(-sigma**2 / 2)``). ``distribution="pareto"``: ``(1 + L) * (alpha - 1)
    / alpha`` with L Lomax(alpha) (numpy's ``Generator.pareto``), i.e. a classical Pareto with
    minimum ``(alpha - 1) / alpha`` and mean 1; needs ``alpha > 1`` (infinite variance for
    ``alpha <= 2``).
    """

    seconds_per_unit: float
    sigma: float = 1.0
    overhead: float = 0.0
    distribution: str = "lognormal"
    alpha: float = 2.5

    def __post_init__(self) -> None:
        LinearCost(self.seconds_per_unit, self.overhead)  # same checks
        if self.distribution not in ("lognormal", "pareto"):
            raise ValueError(f"distribution must be 'lognormal' or 'pareto' (got {self.distribution!r})")
        if not (self.sigma >= 0 and math.isfinite(self.sigma)):
            raise ValueError(f"sigma must be a finite number >= 0 (got {self.sigma!r})")
        if self.distribution == "pareto" and not self.alpha > 1:
            raise ValueError(f"a Pareto multiplier with mean 1 needs alpha > 1 (got {self.alpha!r})")

    def bind(self, rng: np.random.Generator) -> CostFn:
        rate, overhead = float(self.seconds_per_unit), float(self.overhead)
        if self.distribution == "lognormal":
            sigma = float(self.sigma)
            mu = -sigma * sigma / 2
            draw = _stream(lambda n: rng.lognormal(mu, sigma, n))
        else:
            alpha = float(self.alpha)
            scale = (alpha - 1) / alpha
            draw = _stream(lambda n: (1.0 + rng.pareto(alpha, n)) * scale)
        return lambda config, start, target, rung: (overhead + (target - start) * rate) * draw()

    def describe(self, unit: str = "budget unit") -> str:
        base = f"{self.seconds_per_unit:g} s per {_per(unit)} + {self.overhead:g} s per segment"
        if self.distribution == "lognormal":
            return f"heavy-tailed: ({base}) x lognormal multiplier (sigma {self.sigma:g}, mean 1)"
        return f"heavy-tailed: ({base}) x Pareto multiplier (alpha {self.alpha:g}, mean 1)"

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "heavy-tail", "seconds_per_unit": self.seconds_per_unit, "sigma": self.sigma,
                "overhead": self.overhead, "distribution": self.distribution, "alpha": self.alpha}


def segments_from_measurements(frame: pd.DataFrame, *, from_scratch: bool = False) -> pd.DataFrame:
    """One row per completed segment of a finished search: ``trial``, ``attempt``, ``start``
    and ``target`` budgets, ``advance`` (target - start) and ``seconds`` (wall time).

    ``frame`` is the long measurements table (``SearchFiles.read_measurements()``). A segment
    is one (trial, attempt): the stopping form reports several rungs in one attempt. Only
    attempts with a final row count (a lost or crashed attempt has none). ``seconds`` is the
    last ``ended_at`` of its final rows minus its ``started_at``; ``target`` the largest
    budget of its final rows; ``start`` the largest final budget of the trial's earlier
    attempts (0 for its first), or 0 for every segment when ``from_scratch`` (an objective of
    the plain form trains again from nothing at every rung).
    """
    import pandas as pd

    needed = {"trial", "attempt", "budget", "final", "started_at", "ended_at"}
    missing = needed - set(frame.columns)
    if missing:
        raise ValueError(f"the measurements frame lacks the column(s) {', '.join(sorted(missing))}")
    rows = frame[frame["final"].astype(bool)].dropna(subset=["started_at", "ended_at"])
    if rows.empty:
        return pd.DataFrame(columns=["trial", "attempt", "start", "target", "advance", "seconds", "warmup"])
    if "node" not in rows.columns:
        rows = rows.assign(node="")
    seg = rows.groupby(["trial", "attempt"], sort=True).agg(
        target=("budget", "max"), started=("started_at", "min"), ended=("ended_at", "max"), node=("node", "first")
    ).reset_index()
    seg["seconds"] = (seg["ended"] - seg["started"]).dt.total_seconds()
    if from_scratch:
        seg["start"] = 0.0
    else:
        # the largest target of the same trial's earlier attempts (rows are sorted by attempt)
        seg["start"] = seg.groupby("trial")["target"].transform(lambda t: t.cummax().shift(1)).fillna(0.0)
    seg["advance"] = seg["target"] - seg["start"]
    # The first wave on each node (segments that started before any segment there ended) also
    # paid for starting the worker processes (imports, data loading): marked, so that a fit
    # can leave them out.
    first_end = seg.groupby("node")["ended"].transform("min")
    seg["warmup"] = seg["started"] < first_end
    seg = seg[(seg["advance"] > 0) & (seg["seconds"] >= 0)]
    return seg[["trial", "attempt", "start", "target", "advance", "seconds", "warmup"]].reset_index(drop=True)


def dispatch_gap_from_measurements(frame: pd.DataFrame, *, longest: float = 1.0) -> float:
    """The typical time a worker slot stands empty between one segment's end and the next
    segment's start on the same node, in a finished search's measurements: the head's and
    Ray's round trip, which a cost model of the segments alone does not see.

    The median, over segment ends, of the wait until the node's next segment start; waits
    of ``longest`` seconds or more are left out (the search had nothing to run then, e.g.
    at a barrier or in its last rung, which the simulator plays out itself). 0 when no
    segment followed another.
    """
    rows = frame[frame["final"].astype(bool)].dropna(subset=["started_at", "ended_at"])
    if rows.empty:
        return 0.0
    node = rows["node"] if "node" in rows.columns else None
    seg = rows.assign(_node=node if node is not None else "").groupby(["trial", "attempt"], sort=False).agg(
        node=("_node", "first"), started=("started_at", "min"), ended=("ended_at", "max"))
    waits: list[float] = []
    for _, on_node in seg.groupby("node"):
        starts = np.sort(on_node["started"].to_numpy(dtype="datetime64[ns]").astype(np.int64)) / 1e9
        ends = np.sort(on_node["ended"].to_numpy(dtype="datetime64[ns]").astype(np.int64)) / 1e9
        following = np.searchsorted(starts, ends, side="left")
        found = following < len(starts)
        gaps = starts[following[found]] - ends[found]
        waits.extend(g for g in gaps.tolist() if 0 <= g < longest)
    return float(np.median(waits)) if waits else 0.0


@dataclass(frozen=True)
class FittedCost(CostModel):
    """``overhead + (target - start) * seconds_per_unit + e`` with ``e`` drawn uniformly from
    the fit's residuals (a bootstrap of what the line did not explain); never below 0 s.

    Build it with :meth:`from_measurements`; ``segments`` is how many segments the fit used.
    """

    seconds_per_unit: float
    overhead: float = 0.0
    residuals: tuple[float, ...] = field(default=(), repr=False)
    segments: int = 0

    @classmethod
    def from_measurements(cls, frame: pd.DataFrame, *, from_scratch: bool = False) -> FittedCost:
        """Fit slope and overhead (both >= 0, non-negative least squares) to the segments of
        a finished search's measurements (see :func:`segments_from_measurements`)."""
        from scipy.optimize import nnls

        seg = segments_from_measurements(frame, from_scratch=from_scratch)
        if len(seg) == 0:
            raise ValueError("no completed segment with a start and end time in these measurements")
        if (~seg["warmup"]).sum() >= max(4, len(seg) // 2):
            # Plans are for workers that are up: the first wave's start-up cost is left out
            # when enough segments ran after it.
            seg = seg[~seg["warmup"]]
        x = seg["advance"].to_numpy(dtype=float)
        y = seg["seconds"].to_numpy(dtype=float)
        if len(seg) < 2 or np.ptp(x) == 0:
            rate = float(y.sum() / x.sum()) if x.sum() > 0 else 0.0
            overhead = 0.0
        else:
            (overhead, rate), _ = nnls(np.column_stack([np.ones_like(x), x]), y)
            overhead, rate = float(overhead), float(rate)
        if rate <= 0:
            raise ValueError("the fitted time per budget unit is 0: the measurements do not show time growing with budget")
        residuals = y - (overhead + rate * x)
        return cls(rate, overhead, tuple(residuals.tolist()), len(seg))

    def bind(self, rng: np.random.Generator) -> CostFn:
        rate, overhead = float(self.seconds_per_unit), float(self.overhead)
        if not self.residuals:
            return lambda config, start, target, rung: overhead + (target - start) * rate
        pool = np.asarray(self.residuals, dtype=float)
        draw = _stream(lambda n: rng.choice(pool, n))

        def cost(config: Mapping[str, Any], start: float, target: float, rung: int) -> float:
            seconds = overhead + (target - start) * rate + draw()
            return seconds if seconds > 0.0 else 0.0

        return cost

    @property
    def residual_std(self) -> float:
        return float(np.std(self.residuals)) if self.residuals else 0.0

    def describe(self, unit: str = "budget unit") -> str:
        return (f"fitted to {self.segments} measured segments: {self.seconds_per_unit:.4g} s per {_per(unit)} + "
                f"{self.overhead:.4g} s per segment, residual spread {self.residual_std:.3g} s (resampled)")

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "fitted", "seconds_per_unit": self.seconds_per_unit, "overhead": self.overhead,
                "segments": self.segments, "residual_std": self.residual_std}


# ---- value models -----------------------------------------------------------------------------


class ValueModel(ABC):
    """What a simulated trial reports: a *loss* (lower is better) per (trial, budget)."""

    @abstractmethod
    def bind(self, rng: np.random.Generator, plan: SearchPlan) -> ValueFn:
        """The per-report function, drawing from ``rng``."""


@dataclass(frozen=True)
class CurveValue(ValueModel):
    """A random learning curve per trial, plus noise on every report.

    Trial t has a final loss ``a_t ~ U(floor, floor + spread)`` and a gap ``g_t ~ U(0, gap)``;
    at budget b it reports ``a_t + g_t * (1 - (b / max_budget) ** shape) + noise * Z`` with Z
    standard normal. The gap makes rankings at low budgets imperfect predictors of the final
    ranking, as real learning curves are. The curves are drawn per trial id (each trial is one
    configuration); the configuration's values are not read.
    """

    floor: float = 0.05
    spread: float = 0.4
    gap: float = 0.5
    shape: float = 0.5
    noise: float = 0.01

    def bind(self, rng: np.random.Generator, plan: SearchPlan) -> ValueFn:
        finals: list[float] = []
        gaps: list[float] = []
        floor, spread, gap_max, shape = self.floor, self.spread, self.gap, self.shape
        top = float(plan.max_budget)
        noise = float(self.noise)
        normal = _stream(lambda n: rng.standard_normal(n)) if noise > 0 else (lambda: 0.0)

        def value(trial: int, config: Mapping[str, Any], budget: float, rung: int) -> float:
            while trial >= len(finals):
                finals.extend((floor + spread * rng.random(_BLOCK)).tolist())
                gaps.extend((gap_max * rng.random(_BLOCK)).tolist())
            return finals[trial] + gaps[trial] * (1.0 - (budget / top) ** shape) + noise * normal()

        return value
