"""Honest accounting and lean workers, on realistic work (issue #11): what rungway's searches
cost in worker processes and CPU beyond the objective, what they charge against
``limits.cpu_hours``, and how far past the limit they end, beside the same work as plain Ray
tasks, in one invocation on the embedded local Ray (2 CPUs).

Run from the repository root::

    .venv/bin/python bench/accounting.py                  # 150 CPU-seconds per search (about 8 minutes)
    .venv/bin/python bench/accounting.py --quick          # 40 CPU-seconds per search
    .venv/bin/python bench/accounting.py --cpu-seconds 300 --repeats 2 --json out.json

**Work.** The realistic task of ``bench/realistic_task.py``: a one-hidden-layer network on
shifted digits, trained 1 .. 27 epochs (a full training about 3 s on one core), its 4-parameter
space, random sampling, eta 3. Each objective is wrapped here (:func:`plain`,
:func:`resumable`) so that it measures itself: the CPU time of its own thread over the call
(``time.thread_time``; BLAS is single-threaded, so the training runs on that thread), the
part of it spent inside ``ctx.save`` and ``ctx.report`` (rungway's calls, timed through a
proxy of the context), its wall interval, and its process id, appended as one JSON line to a
file per process in a folder named by ``$RUNGWAY_BENCH_ACCOUNTING_DIR``.

**Runs**, each on a fresh Ray instance (``ray.init(address="local", num_cpus=2)``, so that
every worker process of a run was started for it and its whole life is the run's):

- rungway, for each of {plain form, resumable form} x {``asha``, ``hyperband``}:
  ``SearchDriver`` + ``RayExecutor`` with the head's default settings, ``limits.cpu_hours`` =
  the CPU budget (``--cpu-seconds``), no trial limit;
- *plain Ray*: the lab's hand-written baseline: random configurations from the same sampler
  (seeded alike) trained at the top budget by the plain form, one ``@ray.remote(num_cpus=1)``
  task each, 2 in flight, no new task once the finished tasks' objective CPU reaches the
  budget.

**Figures**, per run:

- *worker processes per CPU slot*: distinct process ids that ran the objective, over the 2
  slots (target: 1, as plain Ray);
- *objectives at once*: the most objective calls whose wall intervals overlapped, and the
  share of the time (first call's start to last call's end) with more calls running than CPUs;
- *extra worker CPU over objective CPU*: the CPU time (user + system, ``/proc/<pid>/stat``)
  of every Ray worker process of the run, the relay actor's apart, over its whole life up to
  the run's end, less the objectives' own CPU (measured inside them), over the objectives'
  CPU (target: under 3 %, as plain Ray). A background thread of this process reads ``/proc``
  every ``--sample-seconds`` (0.25) for the descendants of this process (the Ray instance it
  started), so a worker that exits is counted to its last reading. The extra is split into
  the start-up of the processes that ran objectives (the process's CPU when its first call
  began, ``time.process_time()``), worker processes that ran none, and the rest (between and
  around the calls: the runner, checkpoint loads, measurement writes, Ray's threads);
- *CPU charged over OS CPU*: rungway's charged CPU (``SearchDriver.cpu_seconds``, what
  ``limits.cpu_hours`` counts; the sum of the segments' charges a ``SegmentListener`` heard
  is kept beside it) over the worker processes' CPU above (target: within 5 %);
- *overshoot*: charged CPU at the end minus the limit, over the limit; the allowance is 2 %
  of the limit or the most expensive segment of that run, whichever is larger (issue #11).
  For plain Ray the objectives' CPU is put against the budget instead (its own rule above);
- for context: the head process's CPU (the driver loop and Ray's driver threads; this
  sampler's thread left out), the relay actor's, Ray's daemons', the search's own processes
  (workers, relay, head) over the objectives' CPU, wall time, and the load average before
  and after each run and the whole invocation.

Nothing is asserted. ``--smoke`` (the tests' size) runs 6 CPU-seconds per search.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
DIR_ENV = "RUNGWAY_BENCH_ACCOUNTING_DIR"
CPUS = 2
RUNS = (("asha", "plain"), ("asha", "resumable"), ("hyperband", "plain"), ("hyperband", "resumable"), ("baseline", "plain"))
TARGETS = {"workers_per_slot": 1.0, "extra_cpu": 0.03, "charged_over_os": 0.05, "overshoot": 0.02}


# ---- the objectives (imported on the workers: keep this module's top light) ----------------------


def _record(kind: str, wall0: float, cpu0: float, process0: float, calls: float, budget: Any) -> None:
    """One line per call: ``cpu`` its thread's CPU, ``calls_cpu`` the part in ctx.save and
    ctx.report, ``process_cpu_before`` the whole process's CPU when the call began (on a
    process's first call: its start-up)."""
    folder = os.environ.get(DIR_ENV)
    if not folder:
        return
    line = json.dumps({"pid": os.getpid(), "kind": kind, "start": wall0, "end": time.time(),
                       "cpu": time.thread_time() - cpu0, "calls_cpu": calls, "process_cpu_before": process0,
                       "budget": budget})
    with open(os.path.join(folder, f"{os.getpid()}.jsonl"), "a", encoding="utf-8") as f:
        f.write(line + "\n")


def plain(config: dict[str, Any], budget: int) -> dict[str, float]:
    """The realistic task's plain form, measuring itself."""
    wall0, cpu0, process0 = time.time(), time.thread_time(), time.process_time()
    try:
        import realistic_task

        return realistic_task.train(config, budget)
    finally:
        _record("plain", wall0, cpu0, process0, 0.0, budget)


class _TimedContext:
    """The context the objective sees, with the CPU time spent inside ``save`` and ``report``
    (rungway's calls) added up."""

    def __init__(self, ctx: Any) -> None:
        self._ctx = ctx
        self.calls_cpu = 0.0

    def __getattr__(self, name: str) -> Any:
        return getattr(self._ctx, name)

    def save(self, state: Any, budget: Any, /) -> None:
        c0 = time.thread_time()
        try:
            self._ctx.save(state, budget)
        finally:
            self.calls_cpu += time.thread_time() - c0

    def report(self, budget: Any, /, **metrics: float) -> None:
        c0 = time.thread_time()
        try:
            self._ctx.report(budget, **metrics)
        finally:
            self.calls_cpu += time.thread_time() - c0


def resumable(ctx: Any) -> dict[str, float] | None:
    """The realistic task's resumable form, measuring itself."""
    wall0, cpu0, process0 = time.time(), time.thread_time(), time.process_time()
    timed = _TimedContext(ctx)
    try:
        import realistic_task

        return realistic_task.train_resumable(timed)
    finally:
        _record("resumable", wall0, cpu0, process0, timed.calls_cpu, [ctx.start, ctx.budget])


# ---- what the OS says -------------------------------------------------------------------------------

def loadavg() -> list[float]:
    try:
        return [float(x) for x in Path("/proc/loadavg").read_text().split()[:3]]
    except OSError:
        return []


def _descendants() -> dict[int, tuple[str, float]]:
    """(role: "worker", "relay" or "ray"; CPU seconds so far) of every descendant of this
    process (``dispatch.cpu_by_process``, whose roles these are)."""
    from dispatch import cpu_by_process

    names = {"workers": "worker", "relay": "relay", "ray": "ray"}
    return {pid: (names[role], seconds) for pid, (role, seconds) in cpu_by_process().items() if role != "driver"}


class ProcWatcher:
    """Reads the CPU of this process's descendants every ``interval`` seconds in a thread and
    keeps each one's last reading (so a process that exits keeps what it had used)."""

    def __init__(self, interval: float) -> None:
        import threading

        self.interval = interval
        self.seen: dict[int, tuple[str, float]] = {}
        self.relay: set[int] = set()
        self.own_cpu = 0.0  # this thread's CPU, left out of the head's figure
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="accounting-proc-watcher", daemon=True)

    def sample(self) -> None:
        for pid, (role, seconds) in _descendants().items():
            if role == "relay":
                self.relay.add(pid)
            old = self.seen.get(pid)
            self.seen[pid] = (role, max(seconds, old[1] if old else 0.0))

    def _loop(self) -> None:
        c0 = time.thread_time()
        while not self._stop.wait(self.interval):
            self.sample()
        self.own_cpu = time.thread_time() - c0

    def start(self) -> None:
        self.sample()
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()
        self.sample()

    def cpu(self, role: str) -> float:
        return sum(s for pid, (r, s) in self.seen.items() if self.role(pid) == role)

    def role(self, pid: int) -> str:
        return "relay" if pid in self.relay else self.seen[pid][0]


# ---- one run ----------------------------------------------------------------------------------------


class Charges:
    """A ``SegmentListener``: every segment's charged CPU, start-up part and outcome."""

    def __init__(self) -> None:
        self.segments: list[dict[str, Any]] = []

    def started(self, *args: Any, **kwargs: Any) -> None:
        pass

    def ended(self, search: str, trial: int, attempt: int, rung: int, outcome: str, cpu_seconds: float,
              summary: Any = None, *args: Any, **kwargs: Any) -> None:
        self.segments.append({"trial": trial, "attempt": attempt, "rung": rung, "outcome": outcome,
                              "cpu": float(cpu_seconds),
                              "startup": float(getattr(summary, "startup_cpu_seconds", 0.0) or 0.0)})


def _calls(folder: str) -> list[dict[str, Any]]:
    out = []
    for path in Path(folder).glob("*.jsonl"):
        out += [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
    return sorted(out, key=lambda c: c["start"])


def _concurrency(calls: list[dict[str, Any]], cpus: int) -> tuple[int, float]:
    """The most calls running at once, and the share of [first start, last end] with more than ``cpus``."""
    if not calls:
        return 0, 0.0
    events = sorted([(c["start"], 1) for c in calls] + [(c["end"], -1) for c in calls], key=lambda e: (e[0], e[1]))
    running = peak = 0
    over, prev = 0.0, events[0][0]
    for t, d in events:
        if running > cpus:
            over += t - prev
        running += d
        peak = max(peak, running)
        prev = t
    span = events[-1][0] - events[0][0]
    return peak, over / span if span > 0 else 0.0


def _start_ray(folder: str) -> None:
    import ray

    os.environ[DIR_ENV] = folder  # before Ray starts: its workers inherit it
    paths = [str(HERE), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
    os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
    if ray.is_initialized():
        ray.shutdown()
    ray.init(address="local", num_cpus=CPUS, include_dashboard=False, logging_level="ERROR", log_to_driver=False)


def _baseline(limit_s: float, seed: int) -> dict[str, Any]:
    import numpy as np
    import ray

    import realistic_task
    from rungway.scheduler.spec import parse_spec

    @ray.remote(num_cpus=1, max_retries=0)
    def full_budget(config: dict[str, Any], budget: int) -> float:
        import accounting

        c0 = time.thread_time()
        accounting.plain(config, budget)
        return time.thread_time() - c0

    sampler = parse_spec(realistic_task.spec("asha", seed=seed)).make_sampler(np.random.default_rng(seed))
    pending: list[Any] = []
    spent, trials = 0.0, 0
    while True:
        while len(pending) < CPUS and spent < limit_s:
            pending.append(full_budget.remote(dict(sampler.propose()), realistic_task.MAX_EPOCHS))
            trials += 1
        if not pending:
            break
        ready, pending = ray.wait(pending, num_returns=1)
        spent += ray.get(ready[0])
    return {"trials": trials, "segments": trials}


def _rungway(mode: str, form: str, limit_s: float, seed: int, root: str, keep: list[Any]) -> dict[str, Any]:
    """One search to its end; its executor is left in ``keep`` (closing it ends the relay
    actor, after the last reading of /proc)."""
    import realistic_task
    from rungway.scheduler.head.driver import SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.spec import parse_spec

    name = f"acct-{mode}-{form}-{seed}-{time.monotonic_ns()}"
    text = realistic_task.spec(mode, name=name, seed=seed, cpu_hours=limit_s / 3600.0, objective=f"accounting:{form}")
    charges = Charges()
    executor = RayExecutor()
    keep.append(executor)
    driver = SearchDriver(parse_spec(text), text, root, executor, listener=charges)
    report = driver.run()
    stats = driver.statistics()
    return {"trials": len(driver.core), "segments": len(charges.segments), "finished": bool(report.finished),
            "ended_by": report.limit or stats.get("ended_by"), "charged_cpu_s": float(driver.cpu_seconds),
            "reserved_cpu_s": float(getattr(driver, "reserved_seconds", 0.0)),
            "listener_cpu_s": sum(s["cpu"] for s in charges.segments),
            "startup_cpu_s": sum(s["startup"] for s in charges.segments),
            "max_segment_cpu_s": max((s["cpu"] for s in charges.segments), default=0.0),
            "outcomes": {o: sum(1 for s in charges.segments if s["outcome"] == o)
                         for o in sorted({s["outcome"] for s in charges.segments})},
            "segments_yielded": sum(1 for s in charges.segments if s["outcome"] == "yielded"),
            "limits": stats.get("limits", {})}


def one_run(method: str, form: str, limit_s: float, seed: int, root: str, interval: float) -> dict[str, Any]:
    import tempfile

    import ray

    folder = tempfile.mkdtemp(prefix=f"acct-{method}-{form}-", dir=root)
    load_before = loadavg()
    _start_ray(folder)
    watcher = ProcWatcher(interval)
    watcher.start()
    head0 = time.process_time()
    t0 = time.perf_counter()
    executors: list[Any] = []
    try:
        out = _baseline(limit_s, seed) if method == "baseline" else _rungway(method, form, limit_s, seed, root, executors)
        wall = time.perf_counter() - t0
        watcher.stop()
        head_cpu = time.process_time() - head0 - watcher.own_cpu
    finally:
        for executor in executors:
            executor.close()
        ray.shutdown()
    calls = _calls(folder)
    pids = {c["pid"] for c in calls}
    objective = sum(c["cpu"] for c in calls)
    workers = watcher.cpu("worker")
    ran = sum(watcher.seen[p][1] for p in pids if p in watcher.seen)
    peak, over = _concurrency(calls, CPUS)
    worker_pids = [p for p in watcher.seen if watcher.role(p) == "worker"]
    per_pid = {p: sum(c["cpu"] for c in calls if c["pid"] == p) for p in pids}
    # the processes that ran objectives: their CPU before their first call (start-up), and the
    # worker processes that never ran one
    startup = sum(min(c["process_cpu_before"] for c in calls if c["pid"] == p) for p in pids)
    idle = sum(watcher.seen[p][1] for p in worker_pids if p not in pids)
    relay = watcher.cpu("relay")
    result = {
        "method": method, "form": form, "name": "plain Ray" if method == "baseline" else f"{method} / {form}",
        "limit_cpu_s": limit_s, "seed": seed, "wall_s": wall, "load_before": load_before, "load_after": loadavg(),
        **out,
        "objective_calls": len(calls), "objective_pids": len(pids), "workers_per_slot": len(pids) / CPUS,
        "worker_processes": len(worker_pids), "max_objectives_at_once": peak, "share_over_cpus": over,
        "objective_cpu_s": objective, "objective_calls_cpu_s": sum(c["calls_cpu"] for c in calls),
        "worker_os_cpu_s": workers, "objective_processes_os_cpu_s": ran,
        # every worker process: its CPU (OS), and its objectives' CPU (0: it never ran one)
        "worker_processes_detail": [{"os_cpu_s": watcher.seen[p][1], "objective_cpu_s": per_pid.get(p, 0.0),
                                     "calls": sum(1 for c in calls if c["pid"] == p)} for p in sorted(worker_pids)],
        "extra_cpu": (workers - objective) / objective if objective > 0 else None,
        # the extra, split: start-up of the processes that ran objectives, worker processes
        # that ran none, and the rest (between and around the objective calls)
        "extra_startup_cpu_s": startup, "extra_idle_workers_cpu_s": idle,
        "extra_rest_cpu_s": workers - objective - startup - idle,
        # everything the search's own processes used beyond the objective (workers, relay, head)
        "extra_cpu_all": (workers + relay + head_cpu - objective) / objective if objective > 0 else None,
        "relay_os_cpu_s": relay, "ray_os_cpu_s": watcher.cpu("ray"), "head_cpu_s": head_cpu,
        "sampler_cpu_s": watcher.own_cpu,
    }
    if method == "baseline":
        result.update({"charged_cpu_s": None, "charged_over_os": None, "charged_over_objective": None,
                       "overshoot": (objective - limit_s) / limit_s, "overshoot_basis": "objective CPU",
                       "allowance": None, "overshoot_met": None, "max_segment_cpu_s": max((c["cpu"] for c in calls), default=0.0)})
    else:
        charged = result["charged_cpu_s"]
        allowance = max(TARGETS["overshoot"] * limit_s, result["max_segment_cpu_s"])
        result.update({"charged_over_os": charged / workers if workers > 0 else None,
                       "charged_over_objective": charged / objective if objective > 0 else None,
                       "overshoot": (charged - limit_s) / limit_s, "overshoot_basis": "charged CPU",
                       "allowance": allowance / limit_s, "overshoot_met": charged - limit_s <= allowance})
    return result


def summarize(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """Per run name: each figure's median, min, max over repeats."""
    import statistics

    keys = ("workers_per_slot", "max_objectives_at_once", "share_over_cpus", "extra_cpu", "extra_cpu_all",
            "extra_startup_cpu_s", "extra_idle_workers_cpu_s", "extra_rest_cpu_s", "charged_over_os",
            "charged_over_objective", "overshoot", "allowance", "objective_cpu_s", "objective_calls_cpu_s",
            "worker_os_cpu_s", "charged_cpu_s", "startup_cpu_s", "relay_os_cpu_s", "ray_os_cpu_s", "head_cpu_s",
            "wall_s", "segments", "trials", "worker_processes", "max_segment_cpu_s")
    out: dict[str, Any] = {}
    for name in dict.fromkeys(r["name"] for r in runs):
        these = [r for r in runs if r["name"] == name]
        fig: dict[str, Any] = {"method": these[0]["method"], "form": these[0]["form"]}
        for k in keys:
            vals = [float(r[k]) for r in these if r.get(k) is not None]
            fig[k] = ({"median": statistics.median(vals), "min": min(vals), "max": max(vals), "n": len(vals)} if vals
                      else {"median": None, "min": None, "max": None, "n": 0})
        fig["overshoot_met"] = None if these[0]["method"] == "baseline" else all(r["overshoot_met"] for r in these)
        out[name] = fig
    return out


def main(argv: list[str] | None = None) -> int:
    import argparse
    import tempfile

    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="40 CPU-seconds per search")
    parser.add_argument("--smoke", action="store_true", help="6 CPU-seconds per search, for the tests: figures mean nothing")
    parser.add_argument("--cpu-seconds", type=float, help="limits.cpu_hours of every search, in CPU-seconds (default 150)")
    parser.add_argument("--repeats", type=int, default=1, help="runs of each kind, interleaved (default 1)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--sample-seconds", type=float, default=0.25, help="/proc read interval (default 0.25)")
    parser.add_argument("--no-calibration", action="store_true", help="skip timing one full training in this process")
    parser.add_argument("--json", metavar="OUT")
    args = parser.parse_args(argv)
    if not os.path.isdir("/proc/self/task"):
        parser.error("this benchmark reads /proc (Linux)")
    limit_s = args.cpu_seconds or (6.0 if args.smoke else 40.0 if args.quick else 150.0)
    sys.path.insert(0, str(HERE))
    import realistic_task

    load_start = loadavg()
    started = time.perf_counter()
    calibration = None
    if not args.no_calibration:
        realistic_task.train({}, 1)  # imports, data
        wall0, cpu0 = time.perf_counter(), time.thread_time()
        accuracy = realistic_task.train({}, realistic_task.MAX_EPOCHS)["accuracy"]
        calibration = {"config": realistic_task.DEFAULTS, "epochs": realistic_task.MAX_EPOCHS,
                       "wall_s": time.perf_counter() - wall0, "cpu_s": time.thread_time() - cpu0, "accuracy": accuracy}
        print(f"one full training at the task's defaults ({realistic_task.MAX_EPOCHS} epochs, this process, one core): "
              f"{calibration['wall_s']:.2f} s wall, {calibration['cpu_s']:.2f} s CPU", flush=True)
    root = tempfile.mkdtemp(prefix="rungway-accounting-")
    runs = []
    for r in range(args.repeats):
        for method, form in RUNS:
            run = one_run(method, form, limit_s, args.seed + r, root, args.sample_seconds)
            runs.append(run)
            charged = "-" if run["charged_cpu_s"] is None else f"{run['charged_cpu_s']:.1f}"
            print(f"{run['name']:<22} workers/slot {run['workers_per_slot']:.1f}  at once {run['max_objectives_at_once']}  "
                  f"objective {run['objective_cpu_s']:.1f} s  workers (OS) {run['worker_os_cpu_s']:.1f} s  "
                  f"extra {run['extra_cpu']:+.1%}  charged {charged} s  overshoot {run['overshoot']:+.1%}  "
                  f"segments {run['segments']}  wall {run['wall_s']:.0f} s  load {run['load_after']}", flush=True)
    result = {"cpus": CPUS, "limit_cpu_s": limit_s, "repeats": args.repeats, "quick": args.quick, "smoke": args.smoke,
              "sample_seconds": args.sample_seconds, "targets": TARGETS, "task": {
                  "module": "bench/realistic_task.py", "epochs": [realistic_task.MIN_EPOCHS, realistic_task.MAX_EPOCHS],
                  "train_size": int(len(realistic_task.data()["y_train"])), "calibration": calibration},
              "load_start": load_start, "load_end": loadavg(), "wall_s": time.perf_counter() - started,
              "runs": runs, "summary": summarize(runs)}
    import shutil

    shutil.rmtree(root, ignore_errors=True)  # the searches' stores and the objectives' records
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    else:
        print(json.dumps(result["summary"], indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
