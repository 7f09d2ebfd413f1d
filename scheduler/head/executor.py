"""Where segments run: the seam between the head's loop and Ray.

:class:`RayExecutor` submits each segment as a Ray task with the trial's resources and turns
whatever comes back into a :class:`Completion`: the worker's summary, or a *loss* when Ray
reports that the machine, the worker process or the object is gone. That translation is done
here and nowhere else. :class:`InlineExecutor` runs segments in the calling process for tests
and for a head without Ray.
"""

from __future__ import annotations

import logging
import time
import uuid
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

from rungway.workers.runner import SegmentOrder, SegmentSummary, run_segment

__all__ = ["Completion", "Executor", "InlineExecutor", "RayExecutor", "classify_ray_error"]

log = logging.getLogger("rungway.head")


@dataclass(slots=True)
class Completion:
    """A segment is over: ``summary`` when the worker answered, else ``lost`` with a reason."""

    trial: int
    attempt: int
    summary: SegmentSummary | None = None
    lost: str | None = None
    crashed: str | None = None  # our own task failed outside the runner (a rungway bug)


class Executor(Protocol):
    def capacity(self) -> float:
        """CPUs available to segments right now."""
        ...

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None: ...

    def wait(self, timeout: float) -> list[Completion]: ...

    def cancel(self, trial: int, attempt: int) -> None: ...

    def in_flight(self) -> int: ...

    def drain_link(self) -> dict[str, Any]:
        """Rung results and heartbeats posted by running segments since the last call."""
        ...

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None: ...

    def ask_to_yield(self, trial: int, attempt: int) -> None: ...

    def dead_nodes(self) -> set[str]:
        """Ids of the nodes the cluster reports dead."""
        ...

    def avoid(self, nodes: set[str]) -> None:
        """Schedule no new segment on these nodes (they keep failing)."""
        ...

    def close(self) -> None: ...


class InlineExecutor:
    """Runs each segment to completion inside ``submit`` (no Ray; for tests and tools)."""

    def __init__(self, cpus: float = 1.0, run: Callable[[SegmentOrder], SegmentSummary] | None = None) -> None:
        self._cpus = cpus
        self._done: deque[Completion] = deque()
        self._run = run or (lambda order: run_segment(order, None))
        self.submitted: list[SegmentOrder] = []

    def capacity(self) -> float:
        return self._cpus

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        self.submitted.append(order)
        self._done.append(Completion(order.trial, order.attempt, summary=self._run(order)))

    def wait(self, timeout: float) -> list[Completion]:
        done = list(self._done)
        self._done.clear()
        return done

    def cancel(self, trial: int, attempt: int) -> None:
        return None

    def in_flight(self) -> int:
        return len(self._done)

    def drain_link(self) -> dict[str, Any]:
        return {"milestones": [], "beats": {}}

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None:
        return None

    def ask_to_yield(self, trial: int, attempt: int) -> None:
        return None

    def dead_nodes(self) -> set[str]:
        return set()

    def avoid(self, nodes: set[str]) -> None:
        return None

    def close(self) -> None:
        return None


def classify_ray_error(exc: BaseException) -> tuple[str, str]:
    """("lost" | "crashed", reason) for an exception Ray raised when fetching a result.

    Lost: the machine, the worker process, the object or its owner went away, or the task
    was cancelled by us; none of it is the trial's fault. Crashed: anything else (a bug in
    rungway's own task code, or the worker killed for exceeding its memory).
    """
    import ray.exceptions as rx

    lost_types: tuple[type[BaseException], ...] = tuple(
        t
        for t in (
            getattr(rx, "NodeDiedError", None),
            getattr(rx, "WorkerCrashedError", None),
            getattr(rx, "LocalRayletDiedError", None),
            getattr(rx, "ObjectLostError", None),
            getattr(rx, "OwnerDiedError", None),
            getattr(rx, "ObjectReconstructionFailedError", None),
            getattr(rx, "RayActorError", None),
            getattr(rx, "ActorDiedError", None),
            getattr(rx, "TaskCancelledError", None),
            getattr(rx, "RaySystemError", None),
        )
        if isinstance(t, type)
    )
    if isinstance(exc, getattr(rx, "OutOfMemoryError", ())):
        return "crashed", f"worker killed for memory: {exc}"
    if isinstance(exc, lost_types):
        return "lost", f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"
    return "crashed", f"{type(exc).__name__}: {exc}"


class RayExecutor:
    """Segments as Ray tasks on the cluster ``ray.init`` connected to."""

    def __init__(self, relay: Any | None = None, spread: bool = False) -> None:
        import ray

        from rungway.workers.ray_task import segment_task

        self._ray = ray
        self._task = segment_task
        # Tasks find the relay by name (an actor handle as a task argument costs each task a
        # round trip to the control store; a name is looked up once per worker process).
        self._relay_name = f"rungway-relay-{uuid.uuid4().hex[:12]}"
        self._relay = relay if relay is not None else self._start_relay()
        self._refs: dict[Any, tuple[int, int]] = {}
        self._by_trial: dict[tuple[int, int], Any] = {}
        self._strategy = "SPREAD" if spread else "DEFAULT"
        self._capacity_checked = 0.0
        self._capacity = 0.0
        self._variants: dict[tuple[float, int], Any] = {}
        self._avoid: frozenset[str] = frozenset()
        self._drain_ref: Any = None

    def _start_relay(self) -> Any:
        """The relay lives on the head's own node, which dies only with the head."""
        from ray.util.scheduling_strategies import NodeAffinitySchedulingStrategy

        from rungway.workers.link import Relay

        here = self._ray.get_runtime_context().get_node_id()
        return Relay.options(
            name=self._relay_name, scheduling_strategy=NodeAffinitySchedulingStrategy(here, soft=False)
        ).remote()

    def capacity(self) -> float:
        now = time.monotonic()
        if now - self._capacity_checked > 2.0:
            self._capacity = float(self._ray.cluster_resources().get("CPU", 0.0))
            self._capacity_checked = now
        return self._capacity

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        task = self._variants.get((cpus, memory_mb))
        if task is None:  # .options() is not free: one variant per resource shape and node set
            options: dict[str, Any] = {"num_cpus": cpus, "scheduling_strategy": self._strategy}
            if self._avoid:
                from ray.util.scheduling_strategies import NodeLabelSchedulingStrategy, NotIn

                options["scheduling_strategy"] = NodeLabelSchedulingStrategy(
                    hard={"ray.io/node_id": NotIn(*sorted(self._avoid))}
                )
            if memory_mb:
                options["memory"] = int(memory_mb) * 1024 * 1024
            task = self._variants[(cpus, memory_mb)] = self._task.options(**options)
        ref = task.remote(order, self._relay_name)
        self._refs[ref] = (order.trial, order.attempt)
        self._by_trial[(order.trial, order.attempt)] = ref

    def wait(self, timeout: float) -> list[Completion]:
        if not self._refs:
            time.sleep(min(timeout, 0.05))
            return []
        refs = list(self._refs)
        ready, _ = self._ray.wait(refs, num_returns=1, timeout=timeout)
        if not ready:
            return []
        ready, _ = self._ray.wait(refs, num_returns=len(refs), timeout=0)
        out = []
        for ref in ready:
            trial, attempt = self._refs.pop(ref)
            self._by_trial.pop((trial, attempt), None)
            try:
                summary = self._ray.get(ref)
            except Exception as exc:  # translated right here, the one place that knows Ray
                kind, reason = classify_ray_error(exc)
                if kind == "lost":
                    out.append(Completion(trial, attempt, lost=reason))
                else:
                    out.append(Completion(trial, attempt, crashed=reason))
                continue
            out.append(Completion(trial, attempt, summary=summary))
        return out

    def cancel(self, trial: int, attempt: int) -> None:
        ref = self._by_trial.get((trial, attempt))
        if ref is not None:
            self._ray.cancel(ref, force=True)

    def in_flight(self) -> int:
        return len(self._refs)

    def drain_link(self) -> dict[str, Any]:
        """Never blocks: takes the answer of the drain asked for last time, if it is in, and
        asks for the next one (the relay's start-up or a busy relay costs the loop nothing)."""
        empty: dict[str, Any] = {"milestones": [], "beats": {}}
        if self._drain_ref is not None:
            ready, _ = self._ray.wait([self._drain_ref], timeout=0)
            if not ready:
                return empty
            try:
                result = self._ray.get(self._drain_ref)
            except Exception as exc:  # the relay died with its node; start another
                log.warning("the head's relay actor failed (%s); starting a new one", type(exc).__name__)
                self._relay_name = f"rungway-relay-{uuid.uuid4().hex[:12]}"
                self._relay = self._start_relay()
                result = empty
            self._drain_ref = self._relay.drain.remote()
            return result
        self._drain_ref = self._relay.drain.remote()
        return empty

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None:
        if verdicts:
            self._relay.decide.remote(verdicts)

    def ask_to_yield(self, trial: int, attempt: int) -> None:
        self._relay.ask_to_yield.remote(trial, attempt)

    def dead_nodes(self) -> set[str]:
        return {n["NodeID"] for n in self._ray.nodes() if not n.get("Alive", False)}

    def avoid(self, nodes: set[str]) -> None:
        if frozenset(nodes) != self._avoid:
            self._avoid = frozenset(nodes)
            self._variants.clear()

    def close(self) -> None:
        for ref in list(self._refs):
            self._ray.cancel(ref, force=True)
        self._refs.clear()
        self._by_trial.clear()
