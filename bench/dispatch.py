"""Dispatch overhead: segments per second through rungway against raw Ray tasks.

Both sides run in the same Ray instance in the same run, each keeping every CPU slot busy by
submitting a new task as soon as one finishes ("submitted the same way"). rungway's segments
are the real thing: a core decision, a Ray task that runs the runner, a measurements part
file written to the store, and the result applied to the core. The objective does nothing
(or sleeps, for the busy-fraction figure).

Throughput on a shared machine moves with the load, so the script also charges CPU time per
segment (Linux: /proc) to who spent it, for both sides of each repeat: the driver process (the
head, or the loop submitting raw tasks, with Ray's own threads in that process), the Ray worker
processes, the relay actor, and Ray's daemons (raylet, GCS, agents). A process started during
the run (the relay) is charged its start-up too.

    .venv/bin/python bench/dispatch.py [--segments 2000] [--sleep-segments 200] [--repeats 3] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
os.environ["PYTHONPATH"] = os.pathsep.join([str(HERE), os.environ.get("PYTHONPATH", "")])


_TICK = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100
ROLES = ("driver", "workers", "relay", "ray")
_RAY_SERVICES = ("ray::DashboardAgent", "ray::RuntimeEnvAgent")


def _role(pid: int, argv: list[str]) -> str:
    """Who a process is, from its command line (Ray workers retitle themselves ``ray::...``)."""
    if pid == os.getpid():
        return "driver"
    first = argv[0] if argv else ""
    if first.startswith("ray::Relay"):
        return "relay"
    if first.startswith("ray::") and not first.startswith(_RAY_SERVICES):
        return "workers"
    return "ray"  # raylet, GCS, their agents, the log monitor


def cpu_by_process() -> dict[int, tuple[str, float]]:
    """(role, CPU seconds so far: user + system) of this process and its descendants (the Ray
    instance it started); other people's processes on the machine are left out. Empty where
    /proc is missing."""
    if not os.path.isdir("/proc"):
        return {}
    procs: dict[int, tuple[int, float, list[str]]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as f:
                stat = f.read()
            with open(f"/proc/{entry}/cmdline", "rb") as f:
                argv = [a.decode(errors="replace") for a in f.read().split(b"\0") if a]
        except OSError:
            continue
        fields = stat[stat.rfind(")") + 2:].split()
        procs[int(entry)] = (int(fields[1]), (int(fields[11]) + int(fields[12])) / _TICK, argv)
    out = {}
    for pid, (_, seconds, argv) in procs.items():
        ancestor = pid
        while ancestor > 1 and ancestor != os.getpid() and ancestor in procs:
            ancestor = procs[ancestor][0]
        if ancestor == os.getpid():
            out[pid] = (_role(pid, argv), seconds)
    return out


def charged(run, count: int):  # type: ignore[no-untyped-def]
    """``run()``'s result and the CPU milliseconds per segment it cost each role. A process is
    charged to the role it has at the end (Ray may turn an idle worker into the relay); one
    that exited during the run is not counted."""
    before = cpu_by_process()
    result = run()
    after = cpu_by_process()
    if not after:
        return result, {}
    spent = dict.fromkeys(ROLES, 0.0)
    for pid, (role, seconds) in after.items():
        spent[role] += seconds - before.get(pid, (role, 0.0))[1]
    return result, {role: 1e3 * seconds / count for role, seconds in spent.items()}


def noop_task_factory():
    import ray

    @ray.remote(num_cpus=1, max_retries=0)
    def noop(order: dict) -> dict:
        return {"trial": order["trial"], "value": 0.0}

    return noop


def raw_ray(count: int, slots: int) -> float:
    import ray

    noop = noop_task_factory()
    ray.get([noop.remote({"trial": -1}) for _ in range(slots)])  # warm the workers
    start = time.perf_counter()
    in_flight = [noop.remote({"trial": i}) for i in range(slots)]
    submitted, done = slots, 0
    while done < count:
        ready, in_flight = ray.wait(in_flight, num_returns=1)
        ray.get(ready)
        done += len(ready)
        if submitted < count:
            in_flight.append(noop.remote({"trial": submitted}))
            submitted += 1
    return count / (time.perf_counter() - start)


SPEC = """
name = "{name}"
objective = "dispatch_objectives:{objective}"
metric = "loss"
better = "lower"
[ladder]
min = 1
max = 1
mode = "full-budget"
[limits]
trials = {trials}
[resources]
cpus = 1
[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


def through_rungway(count: int, objective: str, root: str) -> tuple[float, float]:
    from rungway.scheduler.head.driver import SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.spec import parse_spec

    name = f"{objective}-{time.monotonic_ns()}"
    text = SPEC.format(name=name, objective=objective, trials=count)
    driver = SearchDriver(parse_spec(text), text, root, RayExecutor(), persist_seconds=3600)
    start = time.perf_counter()
    report = driver.run()
    wall = time.perf_counter() - start
    assert report.finished and report.segments == count
    frame = driver.files.read_measurements()
    per_segment = frame.groupby(["trial", "attempt"]).first()
    busy = (per_segment["ended_at"] - per_segment["started_at"]).dt.total_seconds().sum()
    slots = driver.executor.capacity()
    driver.executor.close()  # and its relay actor, so the next repeat starts as this one did
    window = (per_segment["ended_at"].max() - per_segment["started_at"].min()).total_seconds()
    through_rungway.steady = busy / (slots * window)  # from the first segment's start to the last one's end
    return count / wall, busy / (slots * wall)


def _cpu_medians(runs: list[dict[str, float]]) -> dict[str, float]:
    if not runs or not runs[0]:
        return {}
    out = {role: statistics.median(run[role] for run in runs) for role in runs[0]}
    out["total"] = statistics.median(sum(run.values()) for run in runs)
    return out


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--segments", type=int, default=2000)
    parser.add_argument("--sleep-segments", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--cpus", type=int, default=os.cpu_count() or 2)
    parser.add_argument("--json")
    args = parser.parse_args()
    (HERE / "dispatch_objectives.py").exists() or sys.exit("bench/dispatch_objectives.py is missing")
    import ray

    ray.init(num_cpus=args.cpus, include_dashboard=False, logging_level="ERROR")
    root = tempfile.mkdtemp(prefix="rungway-bench-")
    raw, ours, ratios, busy, steady = [], [], [], [], []
    cpu: dict[str, list[dict[str, float]]] = {"raw": [], "rungway": []}
    through_rungway(50, "noop", root)  # warm-up: imports on the workers
    for _ in range(args.repeats):
        r, cpu_raw = charged(lambda: raw_ray(args.segments, args.cpus), args.segments)
        (o, _), cpu_ours = charged(lambda: through_rungway(args.segments, "noop", root), args.segments)
        cpu["raw"].append(cpu_raw)
        cpu["rungway"].append(cpu_ours)
        raw.append(r)
        ours.append(o)
        ratios.append(o / r)
        busy.append(through_rungway(args.sleep_segments, "sleep100", root)[1])
        steady.append(through_rungway.steady)
    ray.shutdown()
    result = {
        "cpus": args.cpus,
        "segments": args.segments,
        "raw_ray_tasks_per_s": {"median": statistics.median(raw), "min": min(raw), "max": max(raw)},
        "rungway_segments_per_s": {"median": statistics.median(ours), "min": min(ours), "max": max(ours)},
        "ratio": {"median": statistics.median(ratios), "min": min(ratios), "max": max(ratios)},
        "busy_fraction_100ms": {"median": statistics.median(busy), "min": min(busy), "max": max(busy)},
        "busy_fraction_100ms_steady": {"median": statistics.median(steady), "min": min(steady), "max": max(steady)},
        # CPU ms per no-op segment by role (median over repeats), and in all; {} without /proc
        "cpu_ms_per_segment": {side: _cpu_medians(runs) for side, runs in cpu.items()},
    }
    print(json.dumps(result, indent=2))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
