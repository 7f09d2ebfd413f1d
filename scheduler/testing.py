"""In-memory stand-ins for tests and simulations: samplers with no randomness at all.

Shipped with the package so that users testing their own adapters or plans can drive the
core without Ray, a store or a seeded sampler.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from .core.samplers.base import Config, Sampler

__all__ = ["CountingSampler", "ListSampler"]


class CountingSampler(Sampler):
    """Proposes ``{"index": 0}``, ``{"index": 1}``, ... for ever (or up to ``limit``)."""

    kind = "counting"

    def __init__(self, limit: int | None = None) -> None:
        self.count = 0
        self.limit = limit
        self.observed: list[tuple[int, int, float]] = []

    def propose(self) -> Config | None:
        if self.limit is not None and self.count >= self.limit:
            return None
        self.count += 1
        return {"index": self.count - 1}

    def observe(self, trial: int, config: Mapping[str, Any], rung: int, loss: float) -> None:
        self.observed.append((trial, rung, loss))

    def state(self) -> dict[str, Any]:
        return {"count": self.count}

    def restore(self, state: Mapping[str, Any]) -> None:
        self.count = int(state["count"])


class ListSampler(Sampler):
    """Proposes the given configurations in order, then is exhausted."""

    kind = "list"

    def __init__(self, configs: Sequence[Mapping[str, Any]]) -> None:
        self.configs = [dict(c) for c in configs]
        self.position = 0

    def propose(self) -> Config | None:
        if self.position >= len(self.configs):
            return None
        self.position += 1
        return dict(self.configs[self.position - 1])

    def state(self) -> dict[str, Any]:
        return {"position": self.position}

    def restore(self, state: Mapping[str, Any]) -> None:
        self.position = int(state["position"])
