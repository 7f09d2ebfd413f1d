"""Worker utilization under heavy-tailed segment durations: rungway ASHA against synchronous
successive halving and random search at full budget.

Run from the repository root::

    .venv/bin/python bench/utilization.py             # simulator (64 workers, 10 seeds) + real Ray (3 repeats)
    .venv/bin/python bench/utilization.py --quick     # 3 seeds, 2 real repeats, small real searches
    .venv/bin/python bench/utilization.py --json out.json
    .venv/bin/python bench/utilization.py --no-real   # the simulator only

**Simulator** (``scheduler.sim.simulate``, which drives the real scheduling core): W workers
(default 64), budgets 1 .. 81, eta = 3, each segment ``60 s x budget advanced x M`` with M
lognormal (sigma 1, mean 1) drawn per segment (``HeavyTailCost``). Two figures per mode:

- *busy, steady*: busy worker time / (workers x time) while the search still starts new
  trials. For the asynchronous modes (asha, hyperband, full-budget) a search with no trial
  limit is simulated for a horizon of 8 simulated hours. Synchronous successive halving has no
  steady state: it is one bracket of N = 81 x W trials (so that its top rung has one trial per
  worker, its most favourable size); brackets run back to back would repeat the same figure.
- *busy, whole run*: the same over a whole search including its drain: the asynchronous modes
  start trials for 8 simulated hours (``admit_until``), then finish what they started; the
  synchronous bracket is the one above. The drain is where stragglers leave workers idle.

**Real Ray** (a local instance with 2 CPUs): the same modes on budgets 1 .. 9 with an
objective that sleeps ``0.08 s x budget advanced x M``, M lognormal (sigma 1, mean 1, capped
at 10) drawn from a generator seeded by the configuration and the budgets (so every mode
sees the same durations for the same trial). It saves a checkpoint at every result, as a real
resumable objective does. The segments' start and end times come from the measurements table
(the worker's own clock around the segment: checkpoint load, objective, checkpoint save):

- *busy, steady*: busy time within [the first moment both CPUs ran a segment, the last new
  trial's start] over 2 x that window (for sync-halving: up to its last segment's end, the
  whole bracket being its steady state). The search's start-up (``run()`` to both CPUs busy:
  the head's relay actor starting, first imports on the workers) is reported apart
  (*startup_s*), as is the longest stretch in that window with a CPU idle;
- *busy, whole run*: from the first start to the last end.

A control, *ray-replay*: plain Ray tasks sleeping the durations ASHA's segments measured, 4
submitted at a time (rungway's 2 slots plus its prefetch), in the same Ray instance right
after the ASHA run: the busy fraction Ray itself allows for those durations on this machine.

Idle time in the steady window is the head's and Ray's: the time between one segment ending
and the next starting on that CPU. Target: ASHA > 95 % busy. Nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
TARGET = 0.95
SIM_MODES = ("asha", "hyperband", "sync-halving", "full-budget")
REAL_MODES = ("asha", "hyperband", "sync-halving", "full-budget")

# ---- helpers shared with quality.py and sim_accuracy.py ---------------------------------------


def spread(values: list[float]) -> dict[str, Any]:
    """Median, min, max and count of the finite values (None figures when there are none)."""
    clean = [float(v) for v in values if v is not None and math.isfinite(v)]
    if not clean:
        return {"median": None, "min": None, "max": None, "n": 0}
    return {"median": statistics.median(clean), "min": min(clean), "max": max(clean), "n": len(clean)}


def bench_path() -> None:
    """Ray workers import this folder's modules (the objectives below) by name."""
    paths = [str(HERE), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
    os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
    if str(HERE) not in sys.path:
        sys.path.insert(0, str(HERE))


def start_ray(cpus: int) -> None:
    """A fresh local Ray instance (never one another process left running)."""
    import ray

    bench_path()
    if ray.is_initialized():
        ray.shutdown()
    ray.init(address="local", num_cpus=cpus, include_dashboard=False, logging_level="ERROR",
             log_to_driver=False)


def run_search(text: str, root: str) -> dict[str, Any]:
    """Run one search to the end on the Ray instance this process is connected to.

    Returns the driver, its report, the measurements frame, ``t0`` (epoch seconds just before
    ``run()``) and the wall seconds of ``run()``.
    """
    from rungway.scheduler.head.driver import SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.spec import parse_spec

    executor = RayExecutor()
    driver = SearchDriver(parse_spec(text), text, root, executor)
    t0 = time.time()
    start = time.perf_counter()
    report = driver.run()
    wall = time.perf_counter() - start
    frame = driver.files.read_measurements()
    executor.close()  # one relay actor per search: let it go with the search
    return {"driver": driver, "report": report, "frame": frame, "t0": t0, "wall": wall}


def segment_table(frame: Any) -> list[dict[str, float]]:
    """One entry per completed segment (trial, attempt): trial, attempt, rung, budget, start
    and end (epoch seconds, the worker's clock), from the final rows of the measurements."""
    if frame.empty:
        return []
    rows = frame[frame["final"].astype(bool)].dropna(subset=["started_at", "ended_at"])
    seg = rows.groupby(["trial", "attempt"], sort=True).agg(
        rung=("rung", "max"), budget=("budget", "max"), started=("started_at", "min"), ended=("ended_at", "max"))
    out = []
    for (trial, attempt), row in seg.iterrows():
        out.append({"trial": int(trial), "attempt": int(attempt), "rung": int(row["rung"]), "budget": float(row["budget"]),
                    "start": row["started"].timestamp(), "end": row["ended"].timestamp()})
    return out


def busy_in(intervals: list[tuple[float, float]], a: float, b: float) -> float:
    """Seconds of the intervals inside [a, b] (summed: overlapping intervals run on different CPUs)."""
    return sum(max(0.0, min(e, b) - max(s, a)) for s, e in intervals)


# ---- the objective the real runs use -----------------------------------------------------------


def sleepy(ctx: Any) -> dict[str, float]:
    """Sleeps ``unit x (budget - start) x M``; M lognormal(sigma) with mean 1, capped at 10,
    drawn from a generator seeded by (x, start, budget). Reports a loss that falls with budget."""
    import numpy as np

    cfg = ctx.config
    x, unit, sigma = float(cfg["x"]), float(cfg["unit"]), float(cfg["sigma"])
    start, budget = int(ctx.start), int(ctx.budget)
    rng = np.random.default_rng([int(x * 2**32), start, budget])
    multiplier = min(float(rng.lognormal(-sigma * sigma / 2, sigma)), 10.0) if sigma > 0 else 1.0
    time.sleep(unit * (budget - start) * multiplier)
    loss = (x - 0.3) ** 2 + 0.5 / budget + 0.05 * float(rng.standard_normal())
    ctx.report(budget, loss=loss)
    ctx.save({"budget": budget}, budget)
    return {"loss": loss}


REAL_SPEC = """
name = "{name}"
objective = "utilization:sleepy"
metric = "loss"
better = "lower"
seed = {seed}
[ladder]
min = 1
max = 9
eta = 3
mode = "{mode}"
{ladder_extra}
[limits]
{limits}
[resources]
cpus = 1
[space.x]
kind = "real"
lower = 0.0
upper = 1.0
[space.unit]
kind = "constant"
value = {unit}
[space.sigma]
kind = "constant"
value = {sigma}
"""


def real_spec(mode: str, trials: int, seed: int, unit: float, sigma: float, name: str) -> str:
    if mode == "sync-halving":
        ladder_extra, limits = f"sync_trials = {trials}", ""
    else:
        ladder_extra, limits = "", f"trials = {trials}"
    return REAL_SPEC.format(name=name, seed=seed, mode=mode, ladder_extra=ladder_extra, limits=limits,
                            unit=unit, sigma=sigma)


def real_run(mode: str, trials: int, seed: int, root: str, unit: float, sigma: float) -> dict[str, Any]:
    name = f"util-{mode}-{seed}-{time.monotonic_ns()}"
    out = run_search(real_spec(mode, trials, seed, unit, sigma, name), root)
    assert out["report"].finished, out["report"]
    segs = segment_table(out["frame"])
    intervals = [(s["start"], s["end"]) for s in segs]
    first = min(s for s, _ in intervals)
    last = max(e for _, e in intervals)
    cpus = 2
    whole = busy_in(intervals, first, last) / (cpus * (last - first))
    full_at = first_full(intervals, cpus)
    window_end = last
    if mode == "sync-halving":
        steady = busy_in(intervals, full_at, last) / (cpus * (last - full_at))
    else:
        last_trial = max(s["trial"] for s in segs)
        admit_end = min(s["start"] for s in segs if s["trial"] == last_trial)
        window, window_end = admit_end - full_at, admit_end
        steady = busy_in(intervals, full_at, admit_end) / (cpus * window) if window > 0 else float("nan")
    durations = [e - s for s, e in intervals]
    return {"mode": mode, "trials": trials, "segments": len(segs), "busy_steady": steady, "busy_whole": whole,
            "wall_s": out["wall"], "segment_seconds_median": statistics.median(durations),
            "segment_seconds_max": max(durations), "busy_cpu_s": sum(durations),
            "head_cpu_s": out["driver"].cpu_seconds, "longest_idle_s": longest_idle(intervals, cpus, full_at, window_end),
            "startup_s": full_at - out["t0"],
            "durations": [e - s for s, e in sorted(intervals)]}


def first_full(intervals: list[tuple[float, float]], cpus: int) -> float:
    """The first moment ``cpus`` segments ran at once (the first start if that never happened)."""
    events = sorted([(s, 1) for s, _ in intervals] + [(e, -1) for _, e in intervals], key=lambda x: (x[0], -x[1]))
    running = 0
    for t, d in events:
        running += d
        if running >= cpus:
            return t
    return events[0][0]


def longest_idle(intervals: list[tuple[float, float]], cpus: int, a: float, b: float) -> float:
    """The longest stretch within [a, b] with fewer than ``cpus`` segments running."""
    events = sorted([(s, 1) for s, _ in intervals] + [(e, -1) for _, e in intervals] + [(b, 0)])
    running, prev, longest = 0, events[0][0], 0.0
    stretch_start = None
    for t, d in events:
        lo, hi = max(prev, a), min(t, b)
        if running < cpus and hi > lo:  # [prev, t) ran fewer segments than CPUs
            if stretch_start is None:
                stretch_start = lo
            longest = max(longest, hi - stretch_start)
        elif running >= cpus:
            stretch_start = None
        running += d
        prev = t
    return longest


def ray_replay(durations: list[float], in_flight: int, cpus: int = 2) -> float:
    """Control: plain Ray tasks sleeping the given durations, ``in_flight`` submitted at a
    time (as rungway's head keeps its slots plus a prefetch queue submitted); busy fraction
    from the first moment both CPUs were busy to the last task's start, each task's own clock."""
    import ray

    @ray.remote(num_cpus=1, max_retries=0)
    def nap(seconds: float) -> tuple[float, float]:
        t0 = time.time()
        time.sleep(seconds)
        return t0, time.time()

    ray.get([nap.remote(0.0) for _ in range(cpus)])
    pending = [nap.remote(d) for d in durations[:in_flight]]
    nxt, intervals = in_flight, []
    while pending:
        ready, pending = ray.wait(pending, num_returns=1)
        intervals.append(ray.get(ready[0]))
        if nxt < len(durations):
            pending.append(nap.remote(durations[nxt]))
            nxt += 1
    first, last = first_full(intervals, cpus), max(s for s, _ in intervals)
    return busy_in(intervals, first, last) / (cpus * (last - first))


# ---- the simulator ----------------------------------------------------------------------------------


def sim_mode(mode: str, workers: int, seed: int, horizon: float) -> dict[str, float]:
    from rungway.scheduler.core.plan import SearchPlan
    from rungway.scheduler.sim import HeavyTailCost, simulate
    from rungway.scheduler.testing import CountingSampler

    cost = HeavyTailCost(60.0, sigma=1.0)
    if mode == "sync-halving":
        plan = SearchPlan(mode=mode, min_budget=1, max_budget=81, eta=3, sync_trials=81 * workers)
        r = simulate(plan, CountingSampler(), workers, cost, seed=seed)
        return {"busy_steady": r.utilization, "busy_whole": r.utilization, "wall_hours": r.wall_seconds / 3600,
                "trials": r.trials, "segments": r.segments}
    plan = SearchPlan(mode=mode, min_budget=1, max_budget=81, eta=3, max_trials=10**9)
    steady = simulate(plan, CountingSampler(), workers, cost, seed=seed, until=horizon)
    whole = simulate(plan, CountingSampler(), workers, cost, seed=seed, admit_until=horizon)
    return {"busy_steady": steady.utilization, "busy_whole": whole.utilization, "wall_hours": whole.wall_seconds / 3600,
            "trials": whole.trials, "segments": whole.segments}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="3 seeds, 2 real repeats, small real searches")
    parser.add_argument("--json", metavar="OUT")
    parser.add_argument("--workers", type=int, default=64, help="simulated workers (default 64)")
    parser.add_argument("--seeds", type=int, help="simulated seeds (default 10; 3 with --quick)")
    parser.add_argument("--real-repeats", type=int, help="real runs per mode (default 3; 2 with --quick)")
    parser.add_argument("--no-real", action="store_true", help="skip the real-Ray runs")
    parser.add_argument("--unit-seconds", type=float, help="real objective: mean seconds per budget unit (default 0.08)")
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for the tests: figures mean nothing")
    args = parser.parse_args(argv)
    if args.smoke:
        args.quick = True
        args.workers = min(args.workers, 8)
    seeds = args.seeds or (1 if args.smoke else 3 if args.quick else 10)
    repeats = args.real_repeats or (1 if args.smoke else 2 if args.quick else 3)
    args.unit_seconds = args.unit_seconds or (0.01 if args.smoke else 0.08)
    horizon = 8 * 3600.0
    result: dict[str, Any] = {"target": TARGET, "quick": args.quick, "smoke": args.smoke}

    sim: dict[str, Any] = {}
    print(f"simulator: {args.workers} workers, budgets 1..81 eta 3, 60 s/unit x lognormal(sigma 1), {seeds} seeds")
    for mode in SIM_MODES:
        runs = [sim_mode(mode, args.workers, seed, horizon) for seed in range(seeds)]
        sim[mode] = {key: spread([r[key] for r in runs]) for key in runs[0]}
        print(f"  {mode:<13} busy steady {sim[mode]['busy_steady']['median']:.3f}  whole run "
              f"{sim[mode]['busy_whole']['median']:.3f}  [{sim[mode]['busy_whole']['min']:.3f}-"
              f"{sim[mode]['busy_whole']['max']:.3f}]  wall {sim[mode]['wall_hours']['median']:.1f} h", flush=True)
    result["sim"] = {"workers": args.workers, "seeds": seeds, "horizon_hours": horizon / 3600,
                     "cost": "60 s per budget unit x lognormal multiplier (sigma 1, mean 1)",
                     "sync_trials": 81 * args.workers, "modes": sim}

    if not args.no_real:
        import ray

        trials = {"asha": 150, "hyperband": 100, "sync-halving": 81, "full-budget": 16}
        if args.quick:
            trials = {"asha": 60, "hyperband": 40, "sync-halving": 27, "full-budget": 8}
        if args.smoke:
            trials = {"asha": 9, "hyperband": 9, "sync-halving": 9, "full-budget": 3}
        start_ray(2)
        root = tempfile.mkdtemp(prefix="rungway-util-")
        real: dict[str, Any] = {}
        try:
            run_search(real_spec("asha", 4, 99, args.unit_seconds, 1.0, f"warm-{time.monotonic_ns()}"), root)  # warm-up
            runs: dict[str, list[dict[str, Any]]] = {m: [] for m in REAL_MODES}
            replay: list[float] = []
            for r in range(repeats):  # modes interleaved per repeat: same load for each
                for mode in REAL_MODES:
                    runs[mode].append(real_run(mode, trials[mode], 10 + r, root, args.unit_seconds, 1.0))
                    if mode == "asha":  # the same durations as plain Ray tasks, right after
                        replay.append(ray_replay(runs[mode][-1]["durations"], in_flight=4))
            for mode in REAL_MODES:
                rs = runs[mode]
                real[mode] = {"trials": trials[mode], **{k: spread([x[k] for x in rs]) for k in
                              ("busy_steady", "busy_whole", "wall_s", "segments", "segment_seconds_median",
                               "segment_seconds_max", "busy_cpu_s", "head_cpu_s", "longest_idle_s", "startup_s")}}
                print(f"real 2 CPUs {mode:<13} busy steady {real[mode]['busy_steady']['median']:.3f} "
                      f"[{real[mode]['busy_steady']['min']:.3f}-{real[mode]['busy_steady']['max']:.3f}]  whole "
                      f"{real[mode]['busy_whole']['median']:.3f}  wall {real[mode]['wall_s']['median']:.1f} s  "
                      f"longest idle {real[mode]['longest_idle_s']['median']:.2f} s", flush=True)
            real["ray-replay"] = {"busy_whole": spread(replay), "busy_steady": spread(replay)}
            print(f"real 2 CPUs plain Ray tasks replaying ASHA's durations: busy {spread(replay)['median']:.3f}")
        finally:
            ray.shutdown()
        result["real"] = {"cpus": 2, "repeats": repeats, "unit_seconds": args.unit_seconds, "sigma": 1.0,
                          "budgets": "1..9 eta 3", "modes": real}

    asha_sim = sim["asha"]["busy_steady"]["median"]
    result["met_sim"] = bool(asha_sim > TARGET)
    if "real" in result:
        result["met_real"] = bool(result["real"]["modes"]["asha"]["busy_steady"]["median"] > TARGET)
    print(json.dumps({k: result[k] for k in result if k.startswith("met")}))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
