"""Rung boards: the results recorded at one rung, and which of them may be promoted.

Owns ordering only. Every result is turned into a *loss* (lower is better; maximised metrics
are negated; NaN and +-inf become +inf, ranked worst) and stored as a ``(loss, trial)`` entry,
so ties fall to the older trial (trial ids are creation order) and no two entries are equal
(a trial has at most one result per rung).

Two kinds of board. A :class:`RungBoard` keeps its results in one sorted list: the rungs whose
results never wait for a promotion (the top rung, a synchronous rung, the stopping form, which
ranks every new result on arrival). A :class:`PromotionBoard` serves a rung below the top of
an asynchronous ladder in the promotion form, where ASHA asks, on every free slot, "is the best
result not yet promoted in the top floor(n / eta) of the rung?".

Theory of operation of a promotion board. Its results are split into

- *waiting*: not promoted and not withdrawn, in a binary heap (``heapq``). A withdrawn entry
  that is not at the top stays in the heap, marked in a set, until it reaches the top;
- *taken*: promoted or withdrawn (a cancelled trial keeps its place in the ranking).

Everything better than the heap's top w has left the heap, so w's rank among all n results is
the number of taken entries below it, and w is in the top q = floor(n / eta) iff it is below
the *bar*, the q-th best taken entry (every entry is below the bar while fewer than q are
taken; none while q = 0). The board keeps the bar, and with it the answer ``ready``, up to
date on every change, rather than searching for a rank on every question: with millions of
results, each comparison of such a search is a cache miss, and that, not the count of
comparisons, is what made a decision slow. For that the taken entries are split at the bar:

- *below*: the q best taken entries (all of them while fewer than q are taken). Only the
  largest are kept in order, in a short list (*near*) whose last entry is the bar. The others
  are all below near's first entry: in a sorted list (*deep*), or, until near needs them, in a
  plain list in no order (*pending*);
- *above*: the other taken entries, in a heap (usually few: taken entries are mostly
  promotions, and ASHA promotes about q).

The bar only moves to a neighbour. A promotion takes the heap's top, which was below the bar,
into *below* (inserted in near if it falls in near's range, else appended to pending), and the
bar comes down to near's previous entry (the old bar goes above). q growing by one moves the
best entry above into near, as the new bar. Near is cut back into pending when it grows long,
and refilled from deep when it runs empty, after sorting pending into deep. An entry is sorted
into deep at most once, and only when near runs empty or the whole order is asked for (a
snapshot, a leaderboard); in a search whose results show no trend, near seldom runs empty.

Cost, for n results at the rung. Promotion board: recording is a heap push (O(1) on average
for results that arrive in random order, O(log n) at worst); the question is answered by
reading ``ready``; a promotion is a heap pop, O(log n), plus for the bar O(1) touching only
near and the small heap above, or O(log n) amortised while the bar keeps coming down (results
that keep improving). Other boards: recording and ranking a result are O(log n). The whole
ranking (snapshots, synchronous barriers) is assembled on demand in O(n log n) (O(n) once
deep is sorted); the best m results (leaderboards) in O(log n + m log m) from a sorted board,
and from a promotion board the same plus sorting in its pending entries and a pass over above.
"""

from __future__ import annotations

import math
from bisect import insort
from collections.abc import Iterator
from heapq import heappop, heappush, merge, nsmallest
from itertools import chain, islice

from sortedcontainers import SortedList

__all__ = ["to_loss", "RungBoard", "PromotionBoard", "Entry"]

_INF = math.inf
_isfinite = math.isfinite

Entry = tuple[float, int]

# Bars that every entry is above (losses are finite or +inf) and below.
_BELOW_ALL: Entry = (-_INF, -_INF)  # type: ignore[assignment]
_ABOVE_ALL: Entry = (_INF, _INF)  # type: ignore[assignment]

# Near's length after a refill or a cut, and the length that triggers a cut. Small enough that
# near stays in cache and an insertion into it is cheap; large enough that it seldom runs dry.
_NEAR = 256
_NEAR_MAX = 4 * _NEAR


def to_loss(value: float, maximize: bool) -> float:
    """Direction-normalised loss: lower is better; any non-finite value is the worst."""
    if not _isfinite(value):
        return _INF
    return -value if maximize else value


class RungBoard:
    """All results recorded at a rung whose results do not wait for promotion, sorted."""

    __slots__ = ("_sorted", "promoted")

    ready: Entry | None = None  # nothing here waits for promotion

    def __init__(self) -> None:
        self._sorted: SortedList = SortedList()
        self.promoted = 0  # how many trials left this rung for the next one

    def __len__(self) -> int:
        return len(self._sorted)

    def record(self, loss: float, trial: int) -> Entry:
        entry = (loss, trial)
        self._sorted.add(entry)
        return entry

    def withdraw(self, entry: Entry) -> None:
        """Nothing waits here: a withdrawn trial keeps its result's place."""

    def rank(self, entry: Entry) -> int:
        """How many recorded results are strictly better than ``entry``."""
        return self._sorted.bisect_left(entry)

    def results(self) -> list[Entry]:
        """Every recorded result, best first."""
        return list(self._sorted)

    def waiting(self) -> list[Entry]:
        return []

    def best(self, m: int) -> list[Entry]:
        """The ``m`` best recorded results, best first."""
        return list(self._sorted.islice(0, max(m, 0)))

    def dump(self) -> tuple[list[Entry], list[Entry]]:
        """A snapshot's lists: every result and those waiting for promotion, best first."""
        return list(self._sorted), []

    def load(self, results: list[Entry], waiting: list[Entry]) -> None:
        """Fill an empty board from a snapshot's lists (``waiting`` is empty here)."""
        self._sorted.update(results)


class PromotionBoard:
    """All results recorded at a rung below the top of an asynchronous ladder (promotion
    form), and those waiting for promotion. ``ready`` is always ASHA's answer for the rung:
    the entry to promote next, or None."""

    __slots__ = (
        "_eta", "_count", "_taken", "_heap", "_gone", "_near", "_deep", "_pending", "_above", "_bar", "ready",
        "promoted",
    )

    def __init__(self, eta: int) -> None:
        self._eta = eta
        self._count = 0  # results recorded
        self._taken = 0  # of which promoted or withdrawn
        self._heap: list[Entry] = []  # waiting entries (and withdrawn ones in _gone), a heap
        self._gone: set[Entry] = set()  # withdrawn entries still inside _heap, below its top
        # Taken entries at or below the bar: the largest in order in near (the bar last), the
        # others in deep, or in pending (no order) until near needs them. All < near[0].
        self._near: list[Entry] = []
        self._deep: SortedList = SortedList()
        self._pending: list[Entry] = []
        self._above: list[Entry] = []  # taken entries above the bar, a heap
        self._bar: Entry = _BELOW_ALL
        self.ready: Entry | None = None
        self.promoted = 0  # how many trials left this rung for the next one

    def __len__(self) -> int:
        return self._count

    # ---- changes -------------------------------------------------------------------------

    def record(self, loss: float, trial: int) -> Entry:
        entry = (loss, trial)
        count = self._count = self._count + 1
        heap = self._heap
        heappush(heap, entry)
        if count % self._eta == 0:
            # q grew by one: the best entry above the bar (larger than all below) joins below.
            above = self._above
            if above:
                near = self._near
                near.append(heappop(above))
                if len(near) > _NEAR_MAX:
                    self._cut()
            self._set_bar()
        elif heap[0] is entry:
            # A new best waiting entry; the bar has not moved.
            self.ready = entry if entry < self._bar else None
        return entry

    def promote(self) -> Entry:
        """Take :attr:`ready` out of the queue, count its promotion and return it."""
        entry = heappop(self._heap)
        if self._gone:
            self._drop_gone()
        self.promoted += 1
        self._take(entry)
        return entry

    def withdraw(self, entry: Entry) -> None:
        """Take a waiting entry out of the queue (its trial left); it keeps its place in the
        ranking. ``entry`` must be waiting: recorded here, neither promoted nor withdrawn."""
        heap = self._heap
        if heap[0] == entry:
            heappop(heap)
            self._drop_gone()
        else:
            self._gone.add(entry)  # dropped when it reaches the top
        self._take(entry)

    def _drop_gone(self) -> None:
        # Keeps the heap's top a waiting entry, so ``ready`` can be read off it.
        heap, gone = self._heap, self._gone
        while heap and heap[0] in gone:
            gone.discard(heappop(heap))

    def _take(self, entry: Entry) -> None:
        """``entry`` left the heap: place it below or above the bar, and move the bar."""
        near = self._near
        taken = self._taken
        self._taken = taken + 1
        if taken < self._count // self._eta:
            self._add_below(entry)  # fewer than q taken so far: all of them are below
        elif near and entry < near[-1]:
            # Below the bar: the bar comes down one place, the old bar goes above.
            self._add_below(entry)
            heappush(self._above, near.pop())
            if not near:
                self._refill()
        else:
            heappush(self._above, entry)
        self._set_bar()

    def _add_below(self, entry: Entry) -> None:
        near = self._near
        if near and entry < near[0]:
            self._pending.append(entry)
            return
        insort(near, entry)  # near is empty only when deep and pending are too
        if len(near) > _NEAR_MAX:
            self._cut()

    def _cut(self) -> None:
        # Keep near short: its smaller entries join pending (all below near's new first).
        near = self._near
        cut = len(near) - _NEAR
        self._pending.extend(near[:cut])
        del near[:cut]

    def _settle(self) -> None:
        # Sort the pending entries into deep: each entry is sorted in at most once, and only
        # when near must be refilled or the whole order is asked for.
        pending = self._pending
        if pending:
            self._deep.update(pending)
            pending.clear()

    def _refill(self) -> None:
        # Near ran empty: its next entries are the largest of deep and pending.
        self._settle()
        deep = self._deep
        for _ in range(min(len(deep), _NEAR)):
            self._near.append(deep.pop())
        self._near.reverse()

    def _set_bar(self) -> None:
        quota = self._count // self._eta
        near = self._near
        if quota == 0:
            bar = _BELOW_ALL
        elif self._taken < quota:
            bar = _ABOVE_ALL
        else:
            bar = near[-1]
        self._bar = bar
        heap = self._heap
        self.ready = heap[0] if heap and heap[0] < bar else None

    # ---- questions -----------------------------------------------------------------------

    def promotable(self) -> Entry | None:
        """The best waiting entry if it is in the top floor(n / eta), else None.

        Equivalent to ASHA's "best of top_k(rung, floor(n/eta)) not yet promoted": if the best
        waiting entry is outside the top floor(n / eta), every other waiting one is too.
        """
        return self.ready

    def waiting(self) -> list[Entry]:
        """The entries waiting for promotion, best first."""
        gone = self._gone
        return sorted(e for e in self._heap if e not in gone) if gone else sorted(self._heap)

    def results(self) -> list[Entry]:
        """Every recorded result, best first."""
        return self.dump()[0]

    def dump(self) -> tuple[list[Entry], list[Entry]]:
        """A snapshot's lists: every result and those waiting for promotion, best first."""
        self._settle()
        waiting = self.waiting()
        # Deep, near and above are one sorted run, the waiting entries another: the final
        # sort merges the two.
        out = list(self._deep)
        out += self._near
        out += sorted(self._above)
        out += waiting
        out.sort()
        return out, waiting

    def best(self, m: int) -> list[Entry]:
        """The ``m`` best recorded results, best first."""
        if m <= 0:
            return []
        self._settle()
        # The taken entries in order: deep's, near's (all above deep's), then above's.
        taken = chain(self._deep.islice(0, m), self._near, nsmallest(m, self._above))
        return list(islice(merge(islice(taken, m), self._waiting_best_first()), m))

    def _waiting_best_first(self) -> Iterator[Entry]:
        """Waiting entries, best first: a best-first walk of the heap's tree, which visits only
        the entries it yields (and withdrawn ones among them) and their children."""
        heap, gone = self._heap, self._gone
        size = len(heap)
        if not size:
            return
        frontier = [(heap[0], 0)]
        while frontier:
            entry, i = heappop(frontier)
            if entry not in gone:
                yield entry
            for child in (2 * i + 1, 2 * i + 2):
                if child < size:
                    heappush(frontier, (heap[child], child))

    # ---- snapshot --------------------------------------------------------------------------

    def load(self, results: list[Entry], waiting: list[Entry]) -> None:
        """Fill an empty board from a snapshot's lists, both best first: every result, and
        those waiting for promotion (the inverse of :meth:`dump`)."""
        waits = set(waiting)
        taken = [e for e in results if e not in waits]
        self._count = len(results)
        self._taken = len(taken)
        self._heap = list(waiting)  # a sorted list is a heap
        below = min(self._count // self._eta, len(taken))
        split = max(below - _NEAR, 0)
        self._deep.update(taken[:split])
        self._near = taken[split:below]
        self._above = taken[below:]  # sorted, so a heap
        self._set_bar()
