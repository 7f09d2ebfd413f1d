"""Regularized evolution: mutate the winner of a small tournament; the oldest member dies.

This module owns the ``"evolution"`` sampler, after Real, Aggarwal, Huang and Le,
"Regularized Evolution for Image Classifier Architecture Search", AAAI 2019. It learns only
from results at one rung (losses at one rung are comparable across trials), never decides
budgets or promotions, and draws all its randomness from the generator it was given.

The algorithm:

* Until ``population`` results have been observed at ``rung``, proposals are independent
  uniform draws from the space.
* Afterwards, ``sample_size`` distinct members are picked uniformly at random from the
  population; the one with the lowest loss (the earliest picked on a tie) is the parent, and
  the proposal is a mutation of it.
* Each observed result at ``rung`` joins the population (a FIFO); once it holds more than
  ``population`` members the *oldest* leaves -- not the worst. That ageing is what makes the
  evolution "regularized".

A mutation changes one parameter, chosen uniformly among the active parameters that can take
another value (constants and one-option categories cannot):

* category: another option, uniformly;
* real: its unit coordinate plus Gaussian noise with standard deviation ``0.2``, clipped to
  the unit interval, mapped back on the parameter's scale;
* integer: the same perturbation of the centre of its cell; if that lands on the same
  integer it moves one step in the direction of the noise (the other way at a bound).

After a mutation, conditional parameters are brought in line: ones that became active are
drawn uniformly, ones that became inactive are dropped.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from ..errors import SpecError
from ..space import (
    CategoryParameter,
    ConstantParameter,
    IntegerParameter,
    SearchSpace,
    value_key,
)
from .base import Config, Sampler
from .random import check_kind, encode_rng_state, set_rng_state

__all__ = ["EvolutionSampler", "MUTATION_SD"]

MUTATION_SD = 0.2
"""Standard deviation of the Gaussian step, in unit-cube coordinates, for numeric mutations."""


def _plain(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


def _int_option(value: Any, field: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise SpecError(f"must be an integer (got {value!r})", field=field)
    if value < minimum:
        raise SpecError(f"must be >= {minimum} (got {value})", field=field)
    return int(value)


class EvolutionSampler(Sampler):
    """Regularized (ageing) evolution over the search space; see the module docstring."""

    kind: ClassVar[str] = "evolution"

    def __init__(
        self,
        space: SearchSpace,
        rng: np.random.Generator,
        population: int = 20,
        sample_size: int = 5,
        rung: int = 0,
    ) -> None:
        if not isinstance(rng, np.random.Generator):
            raise TypeError("rng must be a numpy.random.Generator")
        self.population = _int_option(population, "sampler.population", 2)
        self.sample_size = _int_option(sample_size, "sampler.sample_size", 1)
        if self.sample_size > self.population:
            raise SpecError(
                f"must be <= population ({self.population}) (got {self.sample_size})",
                field="sampler.sample_size",
            )
        self.rung = _int_option(rung, "sampler.rung", 0)
        self.space = space
        self._rng = rng
        # Members: (trial, config, loss), oldest first.
        self._members: deque[tuple[int, Config, float]] = deque(maxlen=self.population)
        self._observed = 0
        self._mutable = {
            name
            for name, p in space.parameters.items()
            if not isinstance(p, ConstantParameter)
            and not (isinstance(p, CategoryParameter) and len(p.options) < 2)
        }

    # -- the population ------------------------------------------------------------------------

    @property
    def members(self) -> list[tuple[int, Config, float]]:
        """The population, oldest first, as (trial, config, loss)."""
        return [(t, dict(c), loss) for t, c, loss in self._members]

    def observe(self, trial: int, config: Mapping[str, Any], rung: int, loss: float) -> None:
        if rung != self.rung:
            return
        loss = float(loss)
        if math.isnan(loss):
            loss = math.inf
        self._members.append((int(trial), {k: _plain(v) for k, v in config.items()}, loss))
        self._observed += 1

    # -- proposals -----------------------------------------------------------------------------

    def propose(self) -> Config:
        if len(self._members) < self.population:
            return self.space.sample(self._rng)
        picked = self._rng.choice(len(self._members), size=self.sample_size, replace=False)
        best = min(picked.tolist(), key=lambda i: self._members[i][2])  # first on ties
        return self.mutate(self._members[best][1])

    def mutate(self, parent: Mapping[str, Any]) -> Config:
        """A child of ``parent`` with one parameter changed (see the module docstring)."""
        space, rng = self.space, self._rng
        child = space.complete(parent, rng)
        candidates = [n for n in space.names if n in child and n in self._mutable]
        if not candidates:
            return child
        name = candidates[int(rng.integers(len(candidates)))]
        param = space.parameters[name]
        if isinstance(param, CategoryParameter):
            current = [value_key(o) for o in param.options].index(value_key(child[name]))
            j = int(rng.integers(len(param.options) - 1))
            child[name] = param.options[j + 1 if j >= current else j]
        else:
            step = float(rng.normal(0.0, MUTATION_SD))
            u = min(max(space.unit_of(name, child[name]) + step, 0.0), 1.0)
            value = space.value_at(name, u)
            if isinstance(param, IntegerParameter) and value == child[name]:
                direction = 1 if step >= 0 else -1
                value = child[name] + direction
                if not param.lower <= value <= param.upper:
                    value = child[name] - direction
            child[name] = value
        return space.complete(child, rng)

    # -- state ---------------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "rng": encode_rng_state(self._rng.bit_generator.state),
            "observed": self._observed,
            # Losses: null stands for +infinity (JSON has no infinity).
            "members": [
                [t, dict(c), loss if math.isfinite(loss) else None] for t, c, loss in self._members
            ],
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        check_kind(state, self.kind)
        set_rng_state(self._rng, state["rng"], "sampler.state.rng")
        self._observed = int(state["observed"])
        self._members.clear()
        for t, c, loss in state["members"]:
            self._members.append((int(t), dict(c), math.inf if loss is None else float(loss)))
