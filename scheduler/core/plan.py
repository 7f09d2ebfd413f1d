"""What a search's ladders look like: the mode, the ladder geometry and the limits.

A :class:`SearchPlan` is plain, validated data. It turns into the list of brackets the core
runs (one for ASHA and successive halving, one per early-stopping rate for Hyperband).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Literal, get_args

from .errors import SpecError
from .ladder import Budget, HyperbandVariant, Ladder, hyperband_brackets

__all__ = ["Mode", "MODES", "SearchPlan", "BracketPlan", "bracket_name"]

Mode = Literal["asha", "asha-stopping", "sync-halving", "hyperband", "sync-hyperband", "full-budget"]
MODES: tuple[str, ...] = get_args(Mode)

ASYNC_MODES = frozenset({"asha", "asha-stopping", "hyperband", "full-budget"})


@dataclass(frozen=True)
class BracketPlan:
    """One ladder the core runs. ``counts`` is set for synchronous brackets only."""

    ladder: Ladder
    counts: tuple[int, ...] | None = None
    level_offset: int = 0
    """Rung k of this ladder has budget min_budget * eta**(level_offset + k): the *level* of a
    rung, comparable across brackets (samplers learn per level)."""
    weight: int = 1
    """Asynchronous Hyperband deals new trials to its brackets in proportion to their weights:
    n_s = ceil((s_max + 1) / (s + 1) * eta**s), the trials bracket s starts in Li et al.'s
    Algorithm 1 (JMLR 2018)."""

    @property
    def s(self) -> int:
        """The bracket's index s as Li et al. (JMLR 2018) number it: its number of rungs minus
        one, so s = s_max is the most exploratory bracket (it starts at the minimum budget)
        and s = 0 runs every trial straight to the maximum."""
        return self.ladder.top


def bracket_name(s: int, iteration: int | None = None) -> str:
    """How every surface (``show``, ``plan``, the live view) names a bracket: by Li et al.'s s,
    and, when ``sync-hyperband`` repeats its brackets, by its iteration (from 1)."""
    return f"bracket s={s}" if iteration is None else f"iteration {iteration} bracket s={s}"


@dataclass(frozen=True)
class SearchPlan:
    """Mode, geometry and limits of one search.

    - ``asha``: asynchronous successive halving, promotion form (trials pause at each rung and
      are resumed from their checkpoint when promoted).
    - ``asha-stopping``: ASHA's stopping form (a trial runs on unless it falls outside the top
      1/eta at a rung); for objectives that cannot checkpoint.
    - ``sync-halving``: successive halving with a barrier at every rung; deterministic.
    - ``hyperband``: asynchronous Hyperband, ASHA brackets for every early-stopping rate,
      new trials dealt to the brackets in proportion to Li et al.'s n_s (see ``weight``).
    - ``sync-hyperband``: Hyperband as Li et al. (JMLR 2018) write it, brackets one after the
      other, each a synchronous successive halving; ``iterations`` repeats the whole loop.
    - ``full-budget``: every trial straight to max_budget (random search as a baseline).
    """

    mode: Mode = "asha"
    min_budget: Budget = 1
    max_budget: Budget = 81
    eta: int = 3
    early_stopping_rate: int = 0
    maximize: bool = False
    max_trials: int | None = None
    max_crashes: int = 2
    max_losses: int = 3
    """A trial lost more often than this (its machine or worker went away) fails."""
    max_consecutive_failures: int = 10
    """This many trials in a row failing at their first rung make the search *failing* (0: never)."""
    sync_trials: int | None = None
    iterations: int = 1
    hyperband_counts: HyperbandVariant = "formula"

    def __post_init__(self) -> None:
        if self.mode not in MODES:
            raise SpecError(f"must be one of {', '.join(MODES)} (got {self.mode!r})", field="ladder.mode")
        for name, low in (("max_trials", 1), ("sync_trials", 1)):
            value = getattr(self, name)
            if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < low):
                raise SpecError(f"must be an integer >= {low} (got {value!r})", field=f"limits.{name}")
        for name in ("max_crashes", "max_losses", "max_consecutive_failures"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise SpecError(f"must be an integer >= 0 (got {value!r})", field=f"limits.{name}")
        if isinstance(self.iterations, bool) or not isinstance(self.iterations, int) or self.iterations < 1:
            raise SpecError(f"must be an integer >= 1 (got {self.iterations!r})", field="ladder.iterations")
        self.brackets()  # validates the geometry

    @property
    def synchronous(self) -> bool:
        return self.mode not in ASYNC_MODES

    @property
    def stopping(self) -> bool:
        return self.mode == "asha-stopping"

    def brackets(self) -> list[BracketPlan]:
        """The ladders of this plan, in the order the core runs or deals them."""
        r, big_r, eta = self.min_budget, self.max_budget, self.eta
        if self.mode == "full-budget":
            s_max = Ladder(r, big_r, eta, min_rungs=1).s_max
            return [BracketPlan(Ladder(big_r, big_r, eta, min_rungs=1), level_offset=s_max)]
        s = self.early_stopping_rate
        if self.mode in ("asha", "asha-stopping"):
            return [BracketPlan(Ladder(r, big_r, eta, s), level_offset=s)]
        if self.mode == "sync-halving":
            ladder = Ladder(r, big_r, eta, s)
            n = self.sync_trials if self.sync_trials is not None else eta ** ladder.top
            return [BracketPlan(ladder, tuple(n // eta**i for i in range(ladder.top + 1)), s)]
        brackets = hyperband_brackets(r, big_r, eta, self.hyperband_counts)
        if len(brackets) < 2:
            Ladder(r, big_r, eta)  # raises the ladder's own message
        if self.mode == "hyperband":
            return [BracketPlan(b.ladder, level_offset=b.ladder.early_stopping_rate, weight=b.n) for b in brackets]
        plans = [BracketPlan(b.ladder, b.counts, b.ladder.early_stopping_rate) for b in brackets]
        return plans * self.iterations

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> SearchPlan:
        return cls(**data)
