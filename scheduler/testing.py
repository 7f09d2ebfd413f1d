"""Stand-ins for tests and simulations: samplers with no randomness at all, and a way to
make a ``ray.cluster_utils`` node die as a machine does.

Shipped with the package so that users testing their own adapters or plans can drive the
core without Ray, a store or a seeded sampler.
"""

from __future__ import annotations

import os
import signal
from collections.abc import Mapping, Sequence
from typing import Any

from .core.samplers.base import Config, Sampler

__all__ = ["CountingSampler", "ListSampler", "kill_ray_node"]


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


def _descendants(pids: set[int]) -> set[int]:
    """Every process below ``pids`` (read from /proc)."""
    parent: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as stat:
                    parent[int(entry)] = int(stat.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
    found, frontier = set(), set(pids)
    while frontier:
        frontier = {pid for pid, ppid in parent.items() if ppid in frontier} - found
        found |= frontier
    return found


def kill_ray_node(cluster: Any, node: Any) -> None:
    """A machine dying: its Ray processes *and* the worker processes running segments go at
    once. (Removing a ray.cluster_utils node kills only its daemons; a worker in the middle of
    a task may live on long enough to finish it and answer, as no dead machine can.)"""
    daemons = {process.pid for _kind, process in node.live_processes()}
    for pid in _descendants(daemons) | daemons:
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    cluster.remove_node(node, allow_graceful=False)
