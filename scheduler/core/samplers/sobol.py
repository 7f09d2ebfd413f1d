"""Quasi-random search: a scrambled Sobol' sequence mapped onto the search space.

This module owns the ``"sobol"`` sampler, a thin wrapper around ``scipy.stats.qmc.Sobol``
with scrambling. It never touches global random state (the scrambling is seeded by an
integer) and never learns from results. Points fill the unit cube more evenly than
independent draws, so a short search covers the space better.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np
from scipy.stats import qmc

from ..errors import SpecError
from ..space import SearchSpace
from .base import Config, Sampler
from .random import check_kind

__all__ = ["SobolSampler"]

# scipy >= 1.15 seeds qmc engines with ``rng``; older releases only know ``seed``.
_SEED_KEYWORD = "rng" if "rng" in inspect.signature(qmc.Sobol.__init__).parameters else "seed"
_BLOCK = 256  # a power of two: the first draw of a fresh engine must be one to stay warning-free


class SobolSampler(Sampler):
    """Scrambled Sobol' points, one per proposal, in sequence order.

    The state is the seed and the number of points handed out; a restored sampler re-creates
    the engine and fast-forwards it. The engine yields ``2**30`` points; after that
    ``propose()`` returns ``None``.
    """

    kind: ClassVar[str] = "sobol"

    def __init__(self, space: SearchSpace, seed: int) -> None:
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise SpecError(f"must be a non-negative integer (got {seed!r})", field="sampler.seed")
        self.space = space
        self.seed = int(seed)
        self._d = len(space.dimensions)
        self._drawn = 0  # points handed out
        self._engine: qmc.Sobol | None = None
        self._rows: list[list[float]] = []
        self._pos = 0
        self._reset(0)

    def _reset(self, drawn: int) -> None:
        self._drawn = drawn
        self._rows, self._pos = [], 0
        if self._d == 0:
            self._engine = None
            return
        self._engine = qmc.Sobol(self._d, scramble=True, **{_SEED_KEYWORD: self.seed})
        if drawn > 0:
            self._engine.fast_forward(drawn)  # fast_forward(0) is not accepted by scipy

    def propose(self) -> Config | None:
        if self._engine is None:  # only constants: every point is the same configuration
            self._drawn += 1
            return self.space.from_unit([])
        if self._pos >= len(self._rows):
            left = self._engine.maxn - self._engine.num_generated
            if left <= 0:
                return None
            # A fresh engine gets a power-of-two block; later blocks may be any size.
            self._rows = self._engine.random(min(_BLOCK, left)).tolist()
            self._pos = 0
        row = self._rows[self._pos]
        self._pos += 1
        self._drawn += 1
        return self.space.from_unit(row)

    def state(self) -> dict[str, Any]:
        return {"kind": self.kind, "seed": self.seed, "drawn": self._drawn}

    def restore(self, state: Mapping[str, Any]) -> None:
        check_kind(state, self.kind)
        self.seed = int(state["seed"])
        self._reset(int(state["drawn"]))
