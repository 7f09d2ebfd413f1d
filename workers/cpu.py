"""How much CPU one segment used: its objective's threads and child processes, not Ray's.

Theory of operation (Linux, where ``/proc`` is read). A segment's CPU time is

    Δ this process (every thread, including threads that ended during the segment)
  - Δ the worker's own threads (Ray's and rungway's), those alive at both ends
  + Δ children that ended and were waited for (``RUSAGE_CHILDREN``)
  + Δ the objective's child processes still alive (their own CPU, and that of the children
    they waited for), with their live descendants

over the segment, from :meth:`CpuMeter.__init__` (the runner's first line) to
:meth:`CpuMeter.seconds` (after its last write to the store), so loading and saving
checkpoints and writing measurements are in it. The first segment a worker process runs with
``startup=True`` is also charged what the process used before it: its start-up (the
interpreter, Ray, rungway's imports) and whatever Ray's threads did while it waited.

Whose thread is whose. The process keeps one :class:`ProcessCpu` that sorts every thread
(``/proc/self/task``) by when it was first seen: a thread first seen when a segment *begins*
was started between segments, by Ray or rungway (the beat thread of ``workers/link.py``
registers itself too, :func:`own_thread`): the worker's own. A thread first seen when a
segment *ends* was started during a segment: the objective's (a BLAS pool, a data loader),
charged in every later segment it is busy in. The segment's own thread (Ray runs tasks on the
process's main thread) is always the objective's. Child processes are sorted the same way:
those first seen when a segment ends are the objective's, with their whole subtree; those
that appeared between segments (an embedded Ray's daemons, in a head that runs segments
in-process) are not charged. Per-thread CPU comes from ``/proc/self/task/<tid>/schedstat``
(nanoseconds), or ``stat`` (clock ticks) without it; processes from ``/proc/<pid>/stat``
(clock ticks, 10 ms).

What is not counted, or counted against the wrong segment:

- a thread Ray starts while a segment runs counts as the objective's (Ray's threads use
  about 0.1% of a CPU);
- CPU a worker's own thread used in the segment before it ended, if it ended during it,
  counts as the objective's;
- a thread or child process the objective leaves running after its segment is charged to
  the later segments of that worker process while it is busy, whichever search they belong
  to;
- a process that outlives its parent (a double-forked daemon) is no longer a descendant and
  is not counted from then on, nor is anything a child process did but did not wait for;
- the worker's main thread outside the runner (receiving the task, sending its answer back:
  milliseconds) is not charged, except as start-up on a process's first segment.

Other systems (no ``/proc``): this process's CPU (``time.process_time``, Ray's threads
included) plus ``RUSAGE_CHILDREN``; live children are not seen.
"""

from __future__ import annotations

import os
import threading
import time
from dataclasses import dataclass

__all__ = ["CpuMeter", "ProcessCpu", "own_thread", "process_cpu"]

try:
    import resource as _resource
except ImportError:  # not a POSIX system
    _resource = None  # type: ignore[assignment]

_PROC = os.path.isdir("/proc/self/task")
_TICKS = float(os.sysconf("SC_CLK_TCK")) if hasattr(os, "sysconf") else 100.0


def _read(path: str) -> str | None:
    try:
        with open(path) as f:
            return f.read()
    except OSError:  # the thread or process ended meanwhile
        return None


def _stat_fields(text: str) -> list[str]:
    """The fields of a ``stat`` file after the command name (which may hold spaces)."""
    return text.rsplit(")", 1)[1].split()


def _thread_cpu(tid: int) -> float | None:
    """Seconds of CPU one thread of this process has used (None: it has ended)."""
    text = _read(f"/proc/self/task/{tid}/schedstat")
    if text:
        try:
            return int(text.split()[0]) / 1e9
        except (ValueError, IndexError):
            pass
    text = _read(f"/proc/self/task/{tid}/stat")
    if text is None:
        return None
    fields = _stat_fields(text)
    return (int(fields[11]) + int(fields[12])) / _TICKS


def _threads() -> set[int]:
    try:
        return {int(name) for name in os.listdir("/proc/self/task")}
    except OSError:
        return set()


def _children_of(pid: int) -> set[int]:
    """Live children of process ``pid``, from ``/proc/<pid>/task/*/children`` (or, on a
    kernel without those files, from every process's parent id)."""
    found: set[int] = set()
    try:
        tasks = os.listdir(f"/proc/{pid}/task")
    except OSError:
        return found
    for tid in tasks:
        text = _read(f"/proc/{pid}/task/{tid}/children")
        if text is None:
            return _children_by_scan(pid)
        found.update(int(c) for c in text.split())
    return found


def _children_by_scan(pid: int) -> set[int]:
    found = set()
    for name in os.listdir("/proc"):
        if name.isdigit():
            text = _read(f"/proc/{name}/stat")
            if text is not None and _stat_fields(text)[1] == str(pid):
                found.add(int(name))
    return found


def _subtree_cpu(pid: int) -> float:
    """CPU of process ``pid`` (all its threads, and the children it waited for) and of its
    live descendants, in seconds."""
    total, frontier, seen = 0.0, [pid], set()
    while frontier:
        p = frontier.pop()
        if p in seen:
            continue
        seen.add(p)
        text = _read(f"/proc/{p}/stat")
        if text is None:
            continue
        fields = _stat_fields(text)
        total += sum(int(fields[i]) for i in (11, 12, 13, 14)) / _TICKS
        frontier.extend(_children_of(p))
    return total


def _children_rusage() -> float:
    if _resource is None:
        return 0.0
    usage = _resource.getrusage(_resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


@dataclass(frozen=True, slots=True)
class _Reading:
    tree: float  # this process + waited-for children + the objective's live children, seconds
    own: dict[int, float]  # the worker's own threads: CPU seconds each


class ProcessCpu:
    """What one process knows about its threads and children (one per process: :func:`process_cpu`)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.known_threads: set[int] = set()
        self.objective_threads: set[int] = set()
        self.own_threads: set[int] = set()  # registered by rungway's own threads
        self.known_children: set[int] = set()
        self.objective_children: set[int] = set()
        self.startup_charged = False

    def register_own(self, tid: int) -> None:
        with self._lock:
            self.own_threads.add(tid)
            self.known_threads.add(tid)
            self.objective_threads.discard(tid)

    def begin(self, startup: bool) -> tuple[_Reading, float]:
        """The reading at a segment's start, and the start-up CPU to charge to it."""
        with self._lock:
            charge = 0.0
            if startup and not self.startup_charged:
                charge = time.process_time()  # every thread's CPU since the process started
            if startup:
                self.startup_charged = True
            if not _PROC:
                return _Reading(time.process_time() + _children_rusage(), {}), charge
            threads = _threads()
            self.known_threads |= threads  # new here: started between segments, the worker's own
            children = _children_of(os.getpid())
            self.known_children |= children
            me = threading.get_native_id()
            own = {tid: cpu for tid in self.known_threads - self.objective_threads - {me}
                   if tid in threads and (cpu := _thread_cpu(tid)) is not None}
            return _Reading(self._tree(children & self.objective_children), own), charge

    def end(self, start: _Reading) -> float:
        """CPU seconds from ``start`` to now (never negative)."""
        with self._lock:
            if not _PROC:
                return max(0.0, time.process_time() + _children_rusage() - start.tree)
            threads = _threads()
            new = threads - self.known_threads - self.own_threads
            self.objective_threads |= new  # started during the segment: the objective's
            self.known_threads |= new
            children = _children_of(os.getpid())
            self.objective_children |= children - self.known_children
            self.known_children |= children
            own = 0.0
            for tid, before in start.own.items():
                after = _thread_cpu(tid)
                if after is not None:
                    own += max(0.0, after - before)
            used = self._tree(children & self.objective_children) - start.tree - own
            return max(0.0, used)

    @staticmethod
    def _tree(children: set[int]) -> float:
        return time.process_time() + _children_rusage() + sum(_subtree_cpu(c) for c in children)


_PROCESS = ProcessCpu()


def process_cpu() -> ProcessCpu:
    """This process's :class:`ProcessCpu`."""
    return _PROCESS


def own_thread() -> None:
    """Call from a thread of rungway's own (not the objective's): its CPU is never charged."""
    _PROCESS.register_own(threading.get_native_id())


class CpuMeter:
    """One segment's CPU time, from its creation to each call of :meth:`seconds`.

    ``startup=True`` (a Ray worker's segments): the first meter of the process also charges
    what the process used before it (:attr:`startup_seconds`)."""

    def __init__(self, startup: bool = False, process: ProcessCpu | None = None) -> None:
        self._process = process or _PROCESS
        self._start, self.startup_seconds = self._process.begin(startup)

    def seconds(self) -> float:
        return self.startup_seconds + self._process.end(self._start)
