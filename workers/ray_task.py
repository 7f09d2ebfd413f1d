"""The Ray task every segment runs as. Ray's own retries are off: requeueing is the head's."""

from __future__ import annotations

import functools
from typing import Any

import ray

from .link import ActorLink
from .runner import SegmentOrder, SegmentSummary, node_name, run_segment

__all__ = ["segment_task"]


@functools.lru_cache(maxsize=16)
def _relay(name: str) -> Any:
    return ray.get_actor(name)


def _link(name: str | None, node_id: str, search: str) -> ActorLink | None:
    """The line to the head, or None if its relay cannot be found (the segment still runs;
    the head then learns of it only when it ends)."""
    if name is None:
        return None
    try:
        return ActorLink(_relay(name), node=node_id, search=search)
    except ValueError:
        return None


@ray.remote(max_retries=0, retry_exceptions=False)
def segment_task(order: SegmentOrder, relay_name: str | None = None) -> SegmentSummary:
    node_id = ray.get_runtime_context().get_node_id()
    link = _link(relay_name, node_id, order.search)
    if link is not None:
        link.start(order.trial, order.attempt)
    try:
        return run_segment(order, link, node=f"{node_name()}/{node_id[:8]}")
    finally:
        if link is not None:
            link.stop()
