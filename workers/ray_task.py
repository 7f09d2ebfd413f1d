"""The Ray task every segment runs as. Ray's own retries are off: requeueing is the head's."""

from __future__ import annotations

from typing import Any

import ray

from .link import ActorLink
from .runner import SegmentOrder, SegmentSummary, node_name, run_segment

__all__ = ["segment_task"]


@ray.remote(max_retries=0, retry_exceptions=False)
def segment_task(order: SegmentOrder, relay: Any = None) -> SegmentSummary:
    return run_segment(order, ActorLink(relay) if relay is not None else None, node=ray_node_name())


def ray_node_name() -> str:
    """Host name plus the start of Ray's node id: several Ray nodes can share one host."""
    return f"{node_name()}/{ray.get_runtime_context().get_node_id()[:8]}"
