"""Samplers: where the configurations of new trials come from.

This package owns the built-in samplers (``"random"``, ``"grid"``, ``"sobol"``,
``"evolution"``) and :func:`make_sampler`, which builds one from the ``[sampler]`` section of a
spec file. It never decides budgets or promotions and never touches global random state: every
sampler draws from the generator (or the seed taken from it) that it is built with.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import SpecError
from ..space import SearchSpace
from .base import Config, Sampler
from .evolution import EvolutionSampler
from .grid import GridSampler
from .random import RandomSampler
from .sobol import SobolSampler

__all__ = [
    "SAMPLERS",
    "Config",
    "EvolutionSampler",
    "GridSampler",
    "RandomSampler",
    "Sampler",
    "SobolSampler",
    "make_sampler",
]

SAMPLERS: dict[str, type[Sampler]] = {
    cls.kind: cls for cls in (RandomSampler, GridSampler, SobolSampler, EvolutionSampler)
}
"""Sampler kind (the ``sampler.kind`` of a spec file) -> class."""

_OPTIONS: dict[str, tuple[str, ...]] = {
    "random": (),
    "grid": ("points_per_axis", "shuffle"),
    "sobol": (),
    "evolution": ("population", "sample_size", "rung"),
}
"""The options each kind accepts from a spec file, besides ``kind``."""


def make_sampler(
    kind: str, space: SearchSpace, rng: np.random.Generator, options: Mapping[str, Any]
) -> Sampler:
    """Build the sampler ``kind`` over ``space``, drawing from ``rng``.

    ``options`` are the remaining fields of the ``[sampler]`` table (a ``kind`` key in it is
    ignored). The Sobol sampler takes its integer seed from ``rng``. An unknown kind raises
    ``SpecError`` at ``sampler.kind``; an unknown or invalid option at ``sampler.<option>``.
    """
    if kind not in SAMPLERS:
        valid = ", ".join(f'"{k}"' for k in SAMPLERS)
        raise SpecError(f"must be one of {valid} (got {kind!r})", field="sampler.kind")
    if not isinstance(options, Mapping):
        raise SpecError(f"must be a table of options (got {options!r})", field="sampler")
    allowed = _OPTIONS[kind]
    opts = {k: v for k, v in options.items() if k != "kind"}
    for key in opts:
        if key not in allowed:
            what = f"accepts: {', '.join(allowed)}" if allowed else "takes no options"
            raise SpecError(
                f'unknown option for kind = "{kind}"; this sampler {what}', field=f"sampler.{key}"
            )
    if kind == "random":
        return RandomSampler(space, rng)
    if kind == "grid":
        return GridSampler(space, rng, **opts)
    if kind == "sobol":
        return SobolSampler(space, int(rng.integers(0, 2**53)))
    return EvolutionSampler(space, rng, **opts)
