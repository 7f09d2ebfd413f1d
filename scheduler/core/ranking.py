"""Rung boards: the sorted results recorded at one rung.

Owns ordering only. Every result is turned into a *loss* (lower is better; maximised metrics
are negated; NaN and +-inf become +inf, ranked worst) and stored as ``(loss, trial)`` in a
sorted list, so ties fall to the older trial (trial ids are creation order). Each insertion,
rank query and promotion check costs O(log n) in the rung's size.
"""

from __future__ import annotations

import math

from sortedcontainers import SortedList

__all__ = ["to_loss", "RungBoard"]

_INF = math.inf
_isfinite = math.isfinite


def to_loss(value: float, maximize: bool) -> float:
    """Direction-normalised loss: lower is better; any non-finite value is the worst."""
    if not _isfinite(value):
        return _INF
    return -value if maximize else value


class RungBoard:
    """All results recorded at one rung, plus the subset not yet promoted."""

    __slots__ = ("results", "unpromoted", "promoted")

    def __init__(self) -> None:
        self.results: SortedList = SortedList()
        self.unpromoted: SortedList = SortedList()
        self.promoted = 0  # how many trials left this rung for the next one

    def __len__(self) -> int:
        return len(self.results)

    def record(self, loss: float, trial: int, promotable: bool) -> tuple[float, int]:
        entry = (loss, trial)
        self.results.add(entry)
        if promotable:
            self.unpromoted.add(entry)
        return entry

    def rank(self, entry: tuple[float, int]) -> int:
        """How many recorded results are strictly better than ``entry``."""
        return self.results.bisect_left(entry)

    def promotable(self, eta: int) -> tuple[float, int] | None:
        """The best unpromoted entry if it is in the top floor(n / eta), else None.

        Equivalent to ASHA's "best of top_k(rung, floor(n/eta)) not yet promoted": if the best
        unpromoted entry is outside the top floor(n / eta), every other unpromoted one is too.
        """
        unpromoted = self.unpromoted
        if not unpromoted:
            return None
        quota = len(self.results) // eta
        if quota == 0:
            return None
        best = unpromoted[0]
        if self.results.bisect_left(best) < quota:
            return best
        return None

    def withdraw(self, entry: tuple[float, int]) -> None:
        """Take an entry out of the promotion queue (it was promoted, or its trial left)."""
        self.unpromoted.discard(entry)
