"""The Ray task every segment runs as. Ray's own retries are off: requeueing is the head's.

A trial that asks for memory (``resources.memory_mb``) gets it as a limit too, enforced by the
kernel for the segment's duration: the worker's private data may grow by at most that much
(``RLIMIT_DATA`` over its size when the segment starts, restored when it ends). An allocation
past it fails, so the objective ends with ``MemoryError``, a crash of that trial, instead of
the machine running out of memory for every trial on it. The worker process lives on.
"""

from __future__ import annotations

import contextlib
import functools
import resource
from collections.abc import Iterator
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


def data_mb() -> int:
    """This process's private data now (``VmData``), in MB."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmData:"):
                return int(line.split()[1]) // 1024
    return 0  # pragma: no cover (every Linux kernel has it)


@contextlib.contextmanager
def memory_limit(limit_mb: int) -> Iterator[None]:
    """At most ``limit_mb`` more private memory for this process while the block runs (0: none)."""
    if limit_mb <= 0:
        yield
        return
    soft, hard = resource.getrlimit(resource.RLIMIT_DATA)
    wanted = (data_mb() + limit_mb) * 2**20
    if hard != resource.RLIM_INFINITY:
        wanted = min(wanted, hard)
    resource.setrlimit(resource.RLIMIT_DATA, (wanted, hard))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_DATA, (soft, hard))


@ray.remote(max_retries=0, retry_exceptions=False)
def segment_task(order: SegmentOrder, relay_name: str | None = None, memory_mb: int = 0) -> SegmentSummary:
    node_id = ray.get_runtime_context().get_node_id()
    link = _link(relay_name, node_id, order.search)
    if link is not None:
        link.start(order.trial, order.attempt)
    try:
        with memory_limit(memory_mb):
            # This process was started by Ray for segments: its first one is charged its start-up.
            summary = run_segment(order, link, node=f"{node_name()}/{node_id[:8]}", charge_startup=True)
        if summary.error_type == "MemoryError" and memory_mb > 0:
            summary.reason = (f"{summary.reason}: the segment went past its memory limit "
                              f"(resources.memory_mb = {memory_mb})")
        return summary
    finally:
        if link is not None:
            link.stop()
