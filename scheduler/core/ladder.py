"""Budget ladders: the rung budgets of successive halving, ASHA and Hyperband.

Owns the geometry only: which budgets the rungs have and how many trials each bracket of
Hyperband starts with. It never schedules anything.

A ladder is given by a minimum budget r, a maximum budget R, a reduction factor eta >= 2 and
a minimum early-stopping rate s. Rung k has budget r * eta**(s + k) for k = 0 .. s_max - s,
where s_max is the largest integer with r * eta**s_max <= R; the top rung is exactly R (when
R / r is not a power of eta, the top rung's budget is raised from r * eta**s_max to R).

All arithmetic is exact: integer budgets stay integers, float budgets are computed as
fractions of their decimal form, so that log_3(243) is 5 and 0.1 * 9 is 0.9.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from fractions import Fraction
from typing import Literal

from .errors import SpecError

__all__ = [
    "Budget",
    "Ladder",
    "HyperbandBracket",
    "max_early_stopping_rate",
    "hyperband_brackets",
]

Budget = int | float
"""A budget: epochs or iterations (int), or a fraction of the data set (float)."""


def _exact(value: Budget) -> int | Fraction:
    if isinstance(value, bool):
        raise TypeError("a budget is a number, not a bool")
    if isinstance(value, int):
        return value
    return Fraction(repr(float(value)))


def _plain(value: int | Fraction, integral: bool) -> Budget:
    if integral:
        return int(value)
    return float(value)


def max_early_stopping_rate(min_budget: Budget, max_budget: Budget, eta: int) -> int:
    """The largest integer s_max with min_budget * eta**s_max <= max_budget (exactly)."""
    r, big_r = _exact(min_budget), _exact(max_budget)
    s_max, rung = 0, r
    while rung * eta <= big_r:
        rung *= eta
        s_max += 1
    return s_max


@dataclass(frozen=True)
class Ladder:
    """The rung budgets of one successive-halving ladder.

    ``min_rungs`` is how many rungs the caller needs (2 for any early-stopping mode); a
    geometry that yields fewer is refused instead of silently degenerating to random search.
    """

    min_budget: Budget
    max_budget: Budget
    eta: int = 3
    early_stopping_rate: int = 0
    min_rungs: int = 2
    budgets: tuple[Budget, ...] = field(init=False)

    def __post_init__(self) -> None:
        for name in ("min_budget", "max_budget"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise SpecError(f"must be a number (got {value!r})", field=f"ladder.{name}")
            if value != value or value in (float("inf"), float("-inf")):
                raise SpecError(f"must be finite (got {value!r})", field=f"ladder.{name}")
        if self.min_budget <= 0:
            raise SpecError(f"must be > 0 (got {self.min_budget!r})", field="ladder.min_budget")
        if self.max_budget < self.min_budget:
            raise SpecError(
                f"must be >= min_budget = {self.min_budget!r} (got {self.max_budget!r})",
                field="ladder.max_budget",
            )
        if isinstance(self.eta, bool) or not isinstance(self.eta, int) or self.eta < 2:
            raise SpecError(f"must be an integer >= 2 (got {self.eta!r})", field="ladder.eta")
        s_max = max_early_stopping_rate(self.min_budget, self.max_budget, self.eta)
        s = self.early_stopping_rate
        if isinstance(s, bool) or not isinstance(s, int) or not 0 <= s <= s_max:
            raise SpecError(
                f"must be an integer in 0..{s_max} for this ladder (got {s!r})",
                field="ladder.early_stopping_rate",
            )
        count = s_max - s + 1
        if count < self.min_rungs:
            raise SpecError(
                f"this ladder has {count} rung(s) but {self.min_rungs} are needed: "
                f"max_budget must be at least min_budget * eta**{self.min_rungs - 1 + s} = "
                f"{_plain(_exact(self.min_budget) * self.eta ** (self.min_rungs - 1 + s), self.integral)!r}"
                f" (got {self.max_budget!r}); raise max_budget, lower min_budget or eta",
                field="ladder.max_budget",
            )
        r = _exact(self.min_budget)
        integral = self.integral
        rungs = [_plain(r * self.eta ** (s + k), integral) for k in range(count - 1)]
        rungs.append(self.max_budget if integral else float(self.max_budget))
        object.__setattr__(self, "budgets", tuple(rungs))

    @property
    def integral(self) -> bool:
        """Whether budgets are whole units (both ends given as integers)."""
        return isinstance(self.min_budget, int) and isinstance(self.max_budget, int)

    @property
    def top(self) -> int:
        """Index of the top rung."""
        return len(self.budgets) - 1

    @property
    def s_max(self) -> int:
        return max_early_stopping_rate(self.min_budget, self.max_budget, self.eta)


@dataclass(frozen=True)
class HyperbandBracket:
    """One bracket of Hyperband: its early-stopping rate and its successive-halving counts.

    ``s`` is the paper's bracket index (s_max .. 0, most aggressive first); ``ladder`` is the
    bracket's ladder (early-stopping rate s_max - s); ``counts[i]`` is n_i = floor(n * eta**-i),
    the number of trials that run at rung i.
    """

    s: int
    n: int
    ladder: Ladder
    counts: tuple[int, ...]


HyperbandVariant = Literal["formula", "table"]


def hyperband_brackets(
    min_budget: Budget,
    max_budget: Budget,
    eta: int = 3,
    variant: HyperbandVariant = "formula",
) -> list[HyperbandBracket]:
    """The brackets of one Hyperband iteration (Li et al., JMLR 2018, Algorithm 1).

    ``variant="formula"`` starts bracket s with n = ceil((s_max + 1) / (s + 1) * eta**s) trials,
    as Algorithm 1 writes it. ``variant="table"`` floors B / R / (s + 1) before multiplying
    by eta**s, which is what the paper's Table 1 (R = 81, eta = 3) prints. Both are computed
    with integers only.
    """
    if variant not in ("formula", "table"):
        raise SpecError(f"must be 'formula' or 'table' (got {variant!r})", field="ladder.hyperband_counts")
    s_max = Ladder(min_budget, max_budget, eta, min_rungs=1).s_max
    brackets = []
    for s in range(s_max, -1, -1):
        if variant == "formula":
            n = ((s_max + 1) * eta**s + s) // (s + 1)  # ceil without floats
        else:
            n = ((s_max + 1) // (s + 1)) * eta**s
        ladder = Ladder(min_budget, max_budget, eta, early_stopping_rate=s_max - s, min_rungs=1)
        counts = tuple(n // eta**i for i in range(s + 1))
        brackets.append(HyperbandBracket(s=s, n=n, ladder=ladder, counts=counts))
    return brackets
