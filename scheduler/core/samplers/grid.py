"""Grid search: every point of a finite grid over the search space, each once.

This module owns the ``"grid"`` sampler: which values each parameter takes on the grid, the
order the grid is walked in, and how conditional parameters expand. It never repeats a
configuration, never learns from results, and ends the search (``propose() -> None``) when
the grid is used up.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from ..errors import SpecError
from ..space import (
    CategoryParameter,
    ConstantParameter,
    IntegerParameter,
    RealParameter,
    SearchSpace,
    value_key,
)
from .base import Config, Sampler
from .random import check_kind

__all__ = ["GridSampler", "MAX_GRID_POINTS", "axis_values"]

MAX_GRID_POINTS = 1_000_000
"""A grid with more points than this is refused: it could never be searched exhaustively."""


def axis_values(param: Any, points_per_axis: int) -> list[Any]:
    """The values one parameter takes on the grid.

    Categories: every option. Constants: the value. Integers: every integer when there are at
    most ``points_per_axis`` of them, else ``points_per_axis`` evenly spaced ones (geometrically
    spaced for ``scale = "log"``) rounded to distinct integers, both ends included. Reals:
    ``points_per_axis`` evenly spaced values (geometrically for log), both ends included.
    """
    if isinstance(param, CategoryParameter):
        return list(param.options)
    if isinstance(param, ConstantParameter):
        return [param.value]
    lo, hi, log = param.lower, param.upper, param.scale == "log"
    if isinstance(param, IntegerParameter):
        if hi - lo + 1 <= points_per_axis:
            return list(range(lo, hi + 1))
        spaced = np.geomspace(lo, hi, points_per_axis) if log else np.linspace(lo, hi, points_per_axis)
        values = np.unique(np.clip(np.rint(spaced), lo, hi).astype(np.int64))
        return [int(v) for v in values]
    assert isinstance(param, RealParameter)
    spaced = np.geomspace(lo, hi, points_per_axis) if log else np.linspace(lo, hi, points_per_axis)
    values = [float(v) for v in spaced]
    values[0], values[-1] = float(lo), float(hi)  # exact ends despite rounding
    return values


class GridSampler(Sampler):
    """Walks a finite grid: the first parameter (in ``space.names`` order) varies slowest.

    A conditional parameter takes its grid values only in grid points where its condition
    holds and is absent elsewhere, so no configuration repeats. With ``shuffle=True`` the walk
    follows a random permutation drawn once from ``rng``.
    """

    kind: ClassVar[str] = "grid"

    def __init__(
        self,
        space: SearchSpace,
        rng: np.random.Generator | None = None,
        points_per_axis: int = 5,
        shuffle: bool = False,
    ) -> None:
        if isinstance(points_per_axis, bool) or not isinstance(points_per_axis, (int, np.integer)):
            raise SpecError(
                f"must be an integer >= 2 (got {points_per_axis!r})", field="sampler.points_per_axis"
            )
        if points_per_axis < 2:
            raise SpecError(
                f"must be >= 2 so that a real axis includes both ends (got {points_per_axis})",
                field="sampler.points_per_axis",
            )
        if not isinstance(shuffle, bool):
            raise SpecError(f"must be true or false (got {shuffle!r})", field="sampler.shuffle")
        if shuffle and not isinstance(rng, np.random.Generator):
            raise SpecError("needs a random generator to shuffle with", field="sampler.shuffle")
        self.space = space
        self.points_per_axis = int(points_per_axis)
        self.shuffle = shuffle
        self._names = space.names
        self._values = [axis_values(space.parameters[n], self.points_per_axis) for n in self._names]
        self._rows = self._build()
        self._next = 0
        self._seed: int | None = None
        self._order: np.ndarray | None = None
        if shuffle:
            assert rng is not None
            self._seed = int(rng.integers(0, 2**53))
            self._order = np.random.default_rng(self._seed).permutation(len(self._rows))

    def _build(self) -> np.ndarray:
        """Rows of value indices (-1 where a parameter is absent), one row per grid point."""
        position = {n: i for i, n in enumerate(self._names)}
        rows = np.zeros((1, 0), dtype=np.int32)
        for col, name in enumerate(self._names):
            param = self.space.parameters[name]
            active = np.ones(len(rows), dtype=bool)
            for parent, listed in (param.only_if or {}).items():
                keys = {value_key(v) for v in listed}
                pcol = position[parent]
                allowed = [i for i, v in enumerate(self._values[pcol]) if value_key(v) in keys]
                active &= np.isin(rows[:, pcol], np.asarray(allowed, dtype=np.int32))
            size = len(self._values[col])
            counts = np.where(active, size, 1)
            total = int(counts.sum())
            if total > MAX_GRID_POINTS:
                raise SpecError(
                    f"the grid would have more than {MAX_GRID_POINTS:,} points (reached {total:,} "
                    f'at parameter "{name}"); lower points_per_axis or use the random or sobol '
                    "sampler",
                    field="sampler.points_per_axis",
                )
            expanded = np.repeat(rows, counts, axis=0)
            # Active rows get 0..size-1 in turn, inactive rows get -1.
            starts = np.repeat(np.cumsum(counts) - counts, counts)
            offset = np.arange(total) - starts
            column = np.where(np.repeat(active, counts), offset, -1).astype(np.int32)
            rows = np.column_stack([expanded, column])
        return rows

    @property
    def size(self) -> int:
        """The number of grid points."""
        return len(self._rows)

    def _config(self, row: np.ndarray) -> Config:
        return {
            name: self._values[col][i]
            for col, (name, i) in enumerate(zip(self._names, row.tolist()))
            if i >= 0
        }

    def propose(self) -> Config | None:
        if self._next >= len(self._rows):
            return None
        k = self._next if self._order is None else int(self._order[self._next])
        self._next += 1
        return self._config(self._rows[k])

    def state(self) -> dict[str, Any]:
        return {"kind": self.kind, "next": self._next, "size": self.size, "seed": self._seed}

    def restore(self, state: Mapping[str, Any]) -> None:
        check_kind(state, self.kind)
        if state.get("size") != self.size:
            raise SpecError(
                f"was taken from a grid of {state.get('size')} points; this grid has {self.size}",
                field="sampler.state",
            )
        seed = state.get("seed")
        if (seed is None) != (self._order is None):
            raise SpecError("shuffle differs from the sampler the state came from", field="sampler.state")
        if seed is not None:
            self._seed = int(seed)
            self._order = np.random.default_rng(self._seed).permutation(len(self._rows))
        self._next = int(state["next"])
