"""Dispatch overhead: segments per second through rungway against raw Ray tasks.

Both sides run in the same Ray instance in the same run, each keeping every CPU slot busy by
submitting a new task as soon as one finishes ("submitted the same way"). rungway's segments
are the real thing: a core decision, a Ray task that runs the runner, a measurements part
file written to the store, and the result applied to the core. The objective does nothing
(or sleeps, for the busy-fraction figure).

    .venv/bin/python bench/dispatch.py [--segments 2000] [--sleep-ms 100] [--json out.json]
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
direction = "minimize"
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
    window = (per_segment["ended_at"].max() - per_segment["started_at"].min()).total_seconds()
    through_rungway.steady = busy / (slots * window)  # from the first segment's start to the last one's end
    return count / wall, busy / (slots * wall)


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
    through_rungway(50, "noop", root)  # warm-up: imports on the workers
    for _ in range(args.repeats):
        r = raw_ray(args.segments, args.cpus)
        o, _ = through_rungway(args.segments, "noop", root)
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
    }
    print(json.dumps(result, indent=2))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
