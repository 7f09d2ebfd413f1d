"""Where segments run: the seam between the head's loop and Ray.

:class:`RayExecutor` submits each segment as a Ray task with the trial's resources and turns
whatever comes back into a :class:`Completion`: the worker's summary, a *loss* when Ray
reports that the machine or the object is gone, or a *crash* when the worker process died on
a machine that is still alive (an exit, a signal, an OOM kill: the trial's doing). Which of
the two a dead worker is depends on its node: the control store (``ray.nodes()``) is asked
whether the node the segment ran on is dead. That translation is done here and nowhere else. :class:`InlineExecutor` runs segments in the calling process for tests
and for a head without Ray.
"""

from __future__ import annotations

import logging
import socket
import time
import uuid
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

from rungway.workers.runner import SegmentOrder, SegmentSummary, run_segment

__all__ = ["Completion", "Executor", "InlineExecutor", "RayExecutor", "RayPool", "RayLane", "InlinePool", "classify_ray_error"]

log = logging.getLogger("rungway.head")


@dataclass(slots=True)
class Completion:
    """A segment is over: ``summary`` when the worker answered, else ``lost`` with a reason."""

    trial: int
    attempt: int
    summary: SegmentSummary | None = None
    lost: str | None = None
    crashed: str | None = None  # the worker process died (or our own task failed outside the runner)
    error_type: str | None = None  # for a crash: what Ray reported (WorkerCrashedError, ...)
    node: str = ""  # the node the segment ran on, when known


class Executor(Protocol):
    def capacity(self) -> float:
        """CPUs available to segments right now."""
        ...

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None: ...

    def wait(self, timeout: float) -> list[Completion]: ...

    def cancel(self, trial: int, attempt: int) -> None: ...

    def in_flight(self) -> int: ...

    def news(self) -> bool:
        """Whether finished segments or relay posts wait to be collected."""
        ...

    def drain_link(self) -> dict[str, Any]:
        """Rung results and heartbeats posted by running segments since the last call."""
        ...

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None: ...

    def ask_to_yield(self, trial: int, attempt: int) -> None: ...

    def dead_nodes(self) -> set[str]:
        """Ids of the nodes the cluster reports dead."""
        ...

    def node_sizes(self) -> list[tuple[float, int | None]]:
        """(CPUs, memory in MB or None if unknown) of each live node; empty when unknown."""
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

    def news(self) -> bool:
        return bool(self._done)

    def drain_link(self) -> dict[str, Any]:
        return {"milestones": [], "beats": {}}

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None:
        return None

    def ask_to_yield(self, trial: int, attempt: int) -> None:
        return None

    def dead_nodes(self) -> set[str]:
        return set()

    def node_sizes(self) -> list[tuple[float, int | None]]:
        return [(self._cpus, None)]

    def avoid(self, nodes: set[str]) -> None:
        return None

    def close(self) -> None:
        return None


class InlinePool:
    """A pool of :class:`InlineExecutor` lanes, one per search (a shared head without Ray)."""

    def __init__(self, cpus: float = 2.0, memory_mb: int = 16_384,
                 run: Callable[[SegmentOrder], SegmentSummary] | None = None) -> None:
        self.cpus = cpus
        self.memory = memory_mb
        self._run = run
        self.lanes: dict[str, InlineExecutor] = {}

    def lane(self, search: str) -> InlineExecutor:
        if search not in self.lanes:
            self.lanes[search] = InlineExecutor(self.cpus, self._run)
        return self.lanes[search]

    def forget(self, search: str) -> None:
        self.lanes.pop(search, None)

    def poll(self, timeout: float) -> int:
        return 0

    def drain_link(self) -> None:
        return None

    def capacity(self) -> float:
        return self.cpus

    def memory_mb(self) -> int:
        return self.memory

    def close(self) -> None:
        self.lanes.clear()


def classify_ray_error(exc: BaseException) -> tuple[str, str]:
    """("lost" | "died" | "crashed", reason) for an exception Ray raised when fetching a result.

    Lost: the machine (its raylet) died, or the object or its owner went away; not the trial's
    fault. Died: the worker process died while running the segment (an ``os._exit``, a signal,
    Ray's memory monitor or the kernel's OOM killer, a cancellation we did not ask for): the
    trial's crash if its node is alive, which the caller checks. Crashed: anything else (a bug
    in rungway's own task code).

    What Ray 2.60 says: ``WorkerCrashedError`` carries no exit code or signal (the raylet logs
    them, and its worker table cannot tell ``os._exit(1)`` from SIGKILL); ``OutOfMemoryError``
    carries the memory monitor's message; a node that dies mid-task gives ``NodeDiedError``
    at once, while ``ray.nodes()`` marks it dead only after its missed health checks.
    """
    import ray.exceptions as rx

    def kinds(*names: str) -> tuple[type[BaseException], ...]:
        return tuple(t for t in (getattr(rx, name, None) for name in names) if isinstance(t, type))

    name = type(exc).__name__
    first = str(exc).splitlines()[0] if str(exc) else ""
    if isinstance(exc, kinds("OutOfMemoryError")):
        return "died", f"OutOfMemoryError: the worker was killed by Ray's memory monitor: {exc}"
    if isinstance(exc, kinds("WorkerCrashedError")):
        return "died", ("WorkerCrashedError: the worker process died while running the segment "
                        "(os._exit, a signal such as SIGKILL or SIGSEGV, or the kernel's OOM killer; "
                        "Ray reports no exit code: see the raylet's message in the head's log)")
    if isinstance(exc, kinds("TaskCancelledError")):
        # The head cancels only segments it has given up on (their answers are dropped), so a
        # cancellation that arrives here was not ours: KeyboardInterrupt out of the worker, say.
        return "died", f"TaskCancelledError: the segment's task was cancelled: {first or 'no reason given'}"
    lost_types = kinds(
        "NodeDiedError", "LocalRayletDiedError", "ObjectLostError", "OwnerDiedError",
        "ObjectReconstructionFailedError", "RayActorError", "ActorDiedError", "RaySystemError",
    )
    if isinstance(exc, lost_types):
        return "lost", f"{name}: {first}"
    return "crashed", f"{name}: {exc}"


class RayPool:
    """The Ray side of a head: one relay actor and one wait over every search's tasks.

    Each search drives a :class:`RayLane` (an :class:`Executor`); the pool routes finished
    tasks and relay posts to the lane of the search they belong to. A head with one search
    uses :class:`RayExecutor`, a lane with a pool of its own.
    """

    def __init__(self, relay: Any | None = None, spread: bool = False) -> None:
        import ray

        from rungway.workers.ray_task import segment_task

        self._ray = ray
        self._task = segment_task
        # Tasks find the relay by name (an actor handle as a task argument costs each task a
        # round trip to the control store; a name is looked up once per worker process).
        self.relay_name = f"rungway-relay-{uuid.uuid4().hex[:12]}"
        self._relay = relay if relay is not None else self._start_relay()
        self._refs: dict[Any, tuple[str, int, int]] = {}
        self._by_key: dict[tuple[str, int, int], Any] = {}
        self._strategy = "SPREAD" if spread else "DEFAULT"
        self._capacity_checked = 0.0
        self._capacity = 0.0
        self._variants: dict[tuple[float, int], Any] = {}
        self._avoid_by_lane: dict[str, frozenset[str]] = {}
        self._avoid: frozenset[str] = frozenset()
        self._drain_ref: Any = None
        self._drained_at = 0.0
        self._dead: set[str] = set()
        self._raylets: dict[str, tuple[Any, Any]] = {}  # node id -> its raylet's (address, port)
        self._dead_checked = 0.0
        self._nodes: dict[tuple[str, int, int], str] = {}  # the node each running segment beat from
        self.lanes: dict[str, RayLane] = {}

    def _start_relay(self) -> Any:
        """The relay lives on the head's own node, which dies only with the head."""
        from ray.util.scheduling_strategies import NodeAffinitySchedulingStrategy

        from rungway.workers.link import Relay

        here = self._ray.get_runtime_context().get_node_id()
        return Relay.options(
            name=self.relay_name, scheduling_strategy=NodeAffinitySchedulingStrategy(here, soft=False)
        ).remote()

    def lane(self, search: str) -> RayLane:
        lane = self.lanes.get(search)
        if lane is None:
            lane = self.lanes[search] = RayLane(self, search)
        return lane

    def forget(self, search: str) -> None:
        """The search left the head: cancel what it still runs and drop its lane."""
        lane = self.lanes.pop(search, None)
        if lane is not None:
            lane.close()
        self._set_avoid(search, set())

    def capacity(self) -> float:
        now = time.monotonic()
        if now - self._capacity_checked > 2.0:
            self._capacity = float(self._ray.cluster_resources().get("CPU", 0.0))
            self._capacity_checked = now
        return self._capacity

    def memory_mb(self) -> int:
        return int(self._ray.cluster_resources().get("memory", 0.0) // (1024 * 1024))

    def submit(self, search: str, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
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
        ref = task.remote(order, self.relay_name, memory_mb)
        key = (search, order.trial, order.attempt)
        self._refs[ref] = key
        self._by_key[key] = ref

    def poll(self, timeout: float) -> int:
        """Wait up to ``timeout`` for any task; hand what finished to its lane. Returns how many."""
        if not self._refs:
            if timeout > 0:
                time.sleep(min(timeout, 0.05))
            return 0
        refs = list(self._refs)
        ready, _ = self._ray.wait(refs, num_returns=1, timeout=timeout)
        if not ready:
            return 0
        ready, _ = self._ray.wait(refs, num_returns=len(refs), timeout=0)
        try:  # one call for all of them; one by one only when some failed, to classify each
            summaries: list[Any] | None = self._ray.get(ready)
        except Exception:
            summaries = None
        dead: tuple[set[str], set[str]] | None = None  # the control store is asked at most once per poll
        asked = False
        for i, ref in enumerate(ready):
            search, trial, attempt = self._refs.pop(ref)
            self._by_key.pop((search, trial, attempt), None)
            node = self._nodes.pop((search, trial, attempt), "")
            try:
                done = Completion(trial, attempt, summary=summaries[i] if summaries is not None else self._ray.get(ref))
            except Exception as exc:  # translated right here, the one place that knows Ray
                kind, reason = classify_ray_error(exc)
                if kind == "died":
                    if not asked:
                        dead, asked = self._dead_now(), True
                    if self._node_is_dead(node, dead) or self._raylet_gone(node):
                        where = f"node {node[:12] or '(unknown)'}"
                        kind, reason = "lost", (f"{where} died: {reason}" if dead is not None else
                                                f"Ray did not say whether {where} lives: {reason}")
                if kind == "lost":
                    done = Completion(trial, attempt, lost=reason, node=node)
                else:
                    done = Completion(trial, attempt, crashed=reason, node=node,
                                      error_type=type(exc).__name__ if kind == "died" else None)
            lane = self.lanes.get(search)
            if lane is not None:
                lane.inbox.append(done)
        return len(ready)

    def cancel(self, search: str, trial: int, attempt: int) -> None:
        ref = self._by_key.get((search, trial, attempt))
        if ref is not None:
            self._ray.cancel(ref, force=True)

    def in_flight(self) -> int:
        return len(self._refs)

    def drain_link(self) -> None:
        """Never blocks: takes the relay's answer to the drain asked for last time, if it is
        in, routes it to the lanes, and asks for the next one (at most every few ms)."""
        now = time.monotonic()
        if now - self._drained_at < 0.005:
            return
        self._drained_at = now
        if self._drain_ref is not None:
            ready, _ = self._ray.wait([self._drain_ref], timeout=0)
            if not ready:
                return
            try:
                result = self._ray.get(self._drain_ref)
            except Exception as exc:  # the relay died with its node; start another
                log.warning("the head's relay actor failed (%s); starting a new one", type(exc).__name__)
                self.relay_name = f"rungway-relay-{uuid.uuid4().hex[:12]}"
                self._relay = self._start_relay()
                result = {"milestones": [], "beats": {}}
            for search, trial, attempt, rung, value in result["milestones"]:
                lane = self.lanes.get(search)
                if lane is not None:
                    lane.milestones.append((trial, attempt, rung, value))
            for (search, trial, attempt), post in result["beats"].items():
                if post[1] and (search, trial, attempt) in self._by_key:
                    self._nodes[(search, trial, attempt)] = post[1]
                lane = self.lanes.get(search)
                if lane is not None:
                    lane.beats[(trial, attempt)] = post
        self._drain_ref = self._relay.drain.remote()

    def decide(self, search: str, verdicts: list[tuple[int, int, int, bool]]) -> None:
        if verdicts:
            self._relay.decide.remote([(search, t, a, r, go) for t, a, r, go in verdicts])

    def ask_to_yield(self, search: str, trial: int, attempt: int) -> None:
        self._relay.ask_to_yield.remote(search, trial, attempt)

    def dead_nodes(self) -> set[str]:
        now = time.monotonic()
        if now - self._dead_checked >= 1.0:  # one control-store call serves every lane
            self._dead = {n["NodeID"] for n in self._ray.nodes() if not n.get("Alive", False)}
            self._dead_checked = now
        return self._dead

    def node_sizes(self) -> list[tuple[float, int | None]]:
        sizes = []
        for node in self._ray.nodes():
            if node.get("Alive", False):
                resources = node.get("Resources", {})
                memory = resources.get("memory")
                sizes.append((float(resources.get("CPU", 0.0)), None if memory is None else int(memory // 2**20)))
        return sizes

    def _dead_now(self) -> tuple[set[str], set[str]] | None:
        """(dead nodes as the control store says now, dead nodes as it said before), or None
        when it does not answer."""
        before = self._dead
        try:
            nodes = self._ray.nodes()
            self._dead = {n["NodeID"] for n in nodes if not n.get("Alive", False)}
            self._raylets = {n["NodeID"]: (n.get("NodeManagerAddress"), n.get("NodeManagerPort")) for n in nodes}
        except Exception as exc:  # the control store is down or unreachable
            log.warning("cannot ask Ray which nodes are alive (%s: %s)", type(exc).__name__, exc)
            return None
        self._dead_checked = time.monotonic()
        return self._dead, before

    def _raylet_gone(self, node: str) -> bool:
        """Whether the node's raylet refuses a connection: a machine that just died takes the
        control store seconds of missed health checks to mark dead, while its raylet's port
        closes at once, so a worker that died with its machine is not taken for a crash."""
        address, port = self._raylets.get(node, (None, None))
        if not node or not address or not port:
            return False
        try:
            with socket.create_connection((address, int(port)), timeout=1.0):
                return False
        except OSError:  # refused, or no answer within a second: the machine is gone
            return True

    @staticmethod
    def _node_is_dead(node: str, dead: tuple[set[str], set[str]] | None) -> bool:
        """Whether a dead worker's node is dead too. When in doubt the trial gets the benefit
        of it (a loss, which ``max_losses`` still bounds): the control store did not answer, or
        the node is unknown (the segment died before its first heartbeat reached the head) and
        some node died since the last look."""
        if dead is None:
            return True
        now, before = dead
        if node:
            return node in now
        return bool(now - before)

    def _set_avoid(self, search: str, nodes: set[str]) -> None:
        if nodes:
            self._avoid_by_lane[search] = frozenset(nodes)
        else:
            self._avoid_by_lane.pop(search, None)
        union = frozenset().union(*self._avoid_by_lane.values()) if self._avoid_by_lane else frozenset()
        if union != self._avoid:
            self._avoid = union
            self._variants.clear()

    def close(self) -> None:
        """Cancel every task and stop the relay (an actor is a process of its own)."""
        for ref in list(self._refs):
            self._ray.cancel(ref, force=True)
        self._refs.clear()
        self._by_key.clear()
        self._nodes.clear()
        try:
            self._ray.kill(self._relay)
        except Exception:  # already gone with its node, or Ray is shutting down
            pass


class RayLane:
    """One search's :class:`Executor` on a shared :class:`RayPool`. ``wait`` returns what the
    pool has routed here; it waits on the pool itself only when the pool is its own."""

    def __init__(self, pool: RayPool, search: str, owns_pool: bool = False) -> None:
        self.pool = pool
        self.search = search
        self.owns_pool = owns_pool
        self.inbox: deque[Completion] = deque()
        self.milestones: list[tuple[int, int, int, float]] = []
        self.beats: dict[tuple[int, int], tuple[Any, str]] = {}
        self._running: set[tuple[int, int]] = set()

    def capacity(self) -> float:
        return self.pool.capacity()

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        self.pool.submit(self.search, order, cpus, memory_mb)
        self._running.add((order.trial, order.attempt))

    def wait(self, timeout: float) -> list[Completion]:
        if self.owns_pool and not self.inbox:
            self.pool.poll(timeout)
        done = list(self.inbox)
        self.inbox.clear()
        for c in done:
            self._running.discard((c.trial, c.attempt))
        return done

    def cancel(self, trial: int, attempt: int) -> None:
        self.pool.cancel(self.search, trial, attempt)

    def in_flight(self) -> int:
        return len(self._running)

    def news(self) -> bool:
        """Finished segments or relay posts wait for this search."""
        return bool(self.inbox or self.milestones)

    def drain_link(self) -> dict[str, Any]:
        self.pool.drain_link()
        milestones, self.milestones = self.milestones, []
        beats, self.beats = self.beats, {}
        return {"milestones": milestones, "beats": beats}

    def decide(self, verdicts: list[tuple[int, int, int, bool]]) -> None:
        self.pool.decide(self.search, verdicts)

    def ask_to_yield(self, trial: int, attempt: int) -> None:
        self.pool.ask_to_yield(self.search, trial, attempt)

    def dead_nodes(self) -> set[str]:
        return self.pool.dead_nodes()

    def node_sizes(self) -> list[tuple[float, int | None]]:
        return self.pool.node_sizes()

    def avoid(self, nodes: set[str]) -> None:
        self.pool._set_avoid(self.search, nodes)

    def close(self) -> None:
        for trial, attempt in list(self._running):
            self.pool.cancel(self.search, trial, attempt)
        self._running.clear()
        if self.owns_pool:
            self.pool.close()


class RayExecutor(RayLane):
    """Segments as Ray tasks on the cluster ``ray.init`` connected to, for a head with one
    search: a lane with a pool of its own (it learns the search's name from its orders)."""

    def __init__(self, relay: Any | None = None, spread: bool = False) -> None:
        super().__init__(RayPool(relay, spread), "", owns_pool=True)

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        if not self.search:
            self.search = order.search
            self.pool.lanes[self.search] = self
        super().submit(order, cpus, memory_mb)
