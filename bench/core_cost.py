"""What one scheduling decision and one trial cost in the scheduling core.

Run from the repository root::

    .venv/bin/python bench/core_cost.py            # n = 1e3, 1e4, 1e5, 1e6 trials
    .venv/bin/python bench/core_cost.py --quick    # n = 1e3, 1e4 only
    .venv/bin/python bench/core_cost.py --json out.json
    .venv/bin/python bench/core_cost.py --profile 100000   # cProfile one run, top functions

For each n it builds an ASHA core (eta = 3, budgets 1 .. 81, ``max_trials = n``, random
sampler over a 3-parameter space, seeded numpy generator) and drives it until it drains with
a simulated pool of W = 64 segments in flight. The pool is a heap ordered by simulated finish
time (a segment takes ``(target - start) * speed[trial]`` time units, speeds drawn once from a
seeded generator), so results come back out of order, as they do on a cluster. A result is a
cheap deterministic function of the configuration and budget plus precomputed seeded noise.

Figures (see bench/README.md for what each means):

- *pairs/s*: ``ask()`` + the ``report()`` for what it handed out, per second of time spent
  inside the core (the driver's own work is not counted; ``ask()`` calls that return ``Idle``
  are counted in the time, not as pairs). *loop/s* is the same over the whole loop, driver
  included; *loop cpu/s* divides by the CPU time of this thread over the loop instead, which
  time spent waiting for the CPU while other processes run does not inflate.
- *last 10 %*: pairs/s over the last tenth of the pairs of the run, to show the rate does not
  fall as the boards fill up.
- *B/trial*: the core's state after the search drained (every trial kept, every rung board
  full), measured by walking its objects with ``sys.getsizeof`` (each object once), divided
  by n; once without the configurations (the dicts the sampler made, and what only they
  hold) and once with them. The sampler and the plan are left out: they do not grow with n.

Nothing here is asserted; the target (>= 100,000 pairs/s, flat in n; < 1 KB/trial besides the
configurations) is printed next to the figures.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import heapq
import io
import json
import math
import platform
import pstats
import sys
import time
import tracemalloc
import types
from datetime import datetime, timezone
from typing import Any

import numpy as np

from rungway.scheduler.core.events import Segment
from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.core.samplers import RandomSampler
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.core.space import SearchSpace

ETA, MIN_BUDGET, MAX_BUDGET, WORKERS = 3, 1, 81, 64
TARGET_RATE = 100_000  # pairs per second
TARGET_BYTES = 1024  # per trial, besides configurations
CHECKPOINTS = 1000  # readings of the clock totals per run (about)

SPACE = {
    "learning_rate": {"kind": "real", "lower": 1e-4, "upper": 1.0, "scale": "log"},
    "width": {"kind": "integer", "lower": 16, "upper": 1024, "scale": "log"},
    "optimizer": {"kind": "category", "options": ["sgd", "adam", "rmsprop"]},
}
_PENALTY = {"sgd": 0.3, "adam": 0.0, "rmsprop": 0.1}


def build(n: int, seed: int = 0) -> SearchCore:
    plan = SearchPlan(mode="asha", min_budget=MIN_BUDGET, max_budget=MAX_BUDGET, eta=ETA, max_trials=n)
    sampler = RandomSampler(SearchSpace.from_mapping(SPACE), np.random.default_rng(seed))
    return SearchCore(plan, sampler)


def drive(core: SearchCore, n: int, seed: int = 0, workers: int = WORKERS) -> dict[str, Any]:
    """Run ``core`` to the end; return counts and clock totals (nanoseconds)."""
    rng = np.random.default_rng(seed + 1)
    noise = rng.standard_normal(n).tolist()  # one draw per trial, shrinking with budget
    speed = (0.5 + rng.random(n)).tolist()
    ask, report = core.ask, core.report
    clock = time.perf_counter_ns
    log, sqrt = math.log10, math.sqrt
    heap: list[tuple[float, int, Segment]] = []
    now = 0.0
    seq = pairs = idle = 0
    core_ns = 0
    checkpoints = [(0, 0)]
    every = max(1, (3 * n // 2) // CHECKPOINTS)  # a run makes about 1.5 n pairs
    wall0, cpu0 = clock(), time.thread_time_ns()
    while True:
        while len(heap) < workers:
            t0 = clock()
            out = ask()
            core_ns += clock() - t0
            if type(out) is not Segment:
                idle += 1
                break
            heapq.heappush(heap, (now + (out.target_budget - out.start_budget) * speed[out.trial], seq, out))
            seq += 1
        if not heap:
            break
        now, _, seg = heapq.heappop(heap)
        cfg = seg.config
        b = seg.target_budget
        value = (
            (log(cfg["learning_rate"]) + 2.5) ** 2
            + (log(cfg["width"]) - 2.4) ** 2
            + _PENALTY[cfg["optimizer"]]
            + 1.0 / sqrt(b)
            + 0.2 * (1.0 - b / MAX_BUDGET) * noise[seg.trial]
        )
        t0 = clock()
        report(seg.trial, seg.attempt, seg.rung, value)
        core_ns += clock() - t0
        pairs += 1
        if pairs % every == 0:
            checkpoints.append((pairs, core_ns))
    wall_ns, cpu_ns = clock() - wall0, time.thread_time_ns() - cpu0
    checkpoints.append((pairs, core_ns))
    assert type(out).__name__ == "Drained", out
    assert len(core) == n, (len(core), n)
    # Rate over the last tenth of the pairs (from the first checkpoint at or past 90 %).
    p90, c90 = next((p, c) for p, c in checkpoints if p >= 0.9 * pairs)
    p10, c10 = next((p, c) for p, c in checkpoints if p >= 0.1 * pairs)
    return {
        "pairs": pairs,
        "idle_asks": idle,
        "core_s": core_ns / 1e9,
        "loop_s": wall_ns / 1e9,
        "loop_cpu_s": cpu_ns / 1e9,
        "pairs_per_s": pairs / (core_ns / 1e9),
        "loop_pairs_per_s": pairs / (wall_ns / 1e9),
        "loop_cpu_pairs_per_s": pairs / (cpu_ns / 1e9),
        "first10_pairs_per_s": p10 / (c10 / 1e9) if c10 else float("nan"),
        "last10_pairs_per_s": (pairs - p90) / ((core_ns - c90) / 1e9) if core_ns > c90 else float("nan"),
    }


_SKIP = (type, types.ModuleType, types.FunctionType, types.BuiltinFunctionType, types.MethodType)


def walk_size(roots: list[Any], seen: set[int]) -> int:
    """Bytes of every object reachable from ``roots`` not already in ``seen`` (which grows)."""
    total = 0
    stack = list(roots)
    getsizeof, referents = sys.getsizeof, gc.get_referents
    while stack:
        obj = stack.pop()
        key = id(obj)
        if key in seen:
            continue
        seen.add(key)
        if isinstance(obj, _SKIP):
            continue
        total += getsizeof(obj)
        stack.extend(referents(obj))
    return total


def state_size(core: SearchCore) -> dict[str, int]:
    """(bytes of the core's state without configs, bytes of the configs)."""
    # Leave out what does not grow with n: the plan, the sampler (and its space), the handlers.
    seen = {id(core.plan), id(core.sampler), id(core._handlers)}
    configs = walk_size([t.config for t in core._trials], seen)
    state = walk_size([core], seen)
    return {"state_bytes": state, "config_bytes": configs}


def measure(n: int, seed: int = 0, repeat: int = 1, collect: bool = True) -> dict[str, Any]:
    """Best figures of ``repeat`` runs with n trials (each a fresh core, the same seeds: the
    same decisions), the way ``timeit`` takes the best run, since other processes on the
    machine only ever slow a run down; the memory figures from the last run. ``collect=False`` switches the cyclic garbage
    collector off while the core is driven."""
    runs = []
    for _ in range(repeat):
        core = None
        gc.collect()
        core = build(n, seed)
        if not collect:
            gc.disable()
        try:
            runs.append(drive(core, n, seed))
        finally:
            gc.enable()
    row: dict[str, Any] = {"n": n, "repeat": repeat, "gc": collect}
    for key in runs[0]:
        values = [r[key] for r in runs]
        if key.endswith("per_s"):
            row[key] = max(values)
        elif key.endswith("_s"):
            row[key] = min(values)
        else:
            assert len(set(values)) == 1, (key, values)  # counts: the runs are the same search
            row[key] = values[0]
    sizes = state_size(core)
    row.update(sizes)
    row["bytes_per_trial"] = sizes["state_bytes"] / n
    row["bytes_per_trial_with_configs"] = (sizes["state_bytes"] + sizes["config_bytes"]) / n
    return row


def tracemalloc_check(n: int, seed: int = 0) -> dict[str, float]:
    """Cross-check of the walk: memory traced while building and driving a core, per trial.
    ``retained`` is what is still allocated once the core drained (the driver's arrays freed),
    ``peak`` the most at any time (driver included)."""
    gc.collect()
    tracemalloc.start()
    try:
        core = build(n, seed)
        base = tracemalloc.get_traced_memory()[0]
        drive(core, n, seed)
        gc.collect()
        retained, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return {"n": n, "retained_per_trial": (retained - base) / n, "peak_per_trial": (peak - base) / n}


def time_snapshot(n: int, seed: int = 0) -> dict[str, float]:
    """Seconds for snapshot(), json.dumps of it, json.loads and restore() of a drained core."""
    core = build(n, seed)
    drive(core, n, seed)
    gc.collect()
    t0 = time.perf_counter()
    snap = core.snapshot()
    t1 = time.perf_counter()
    text = json.dumps(snap)
    t2 = time.perf_counter()
    data = json.loads(text)
    t3 = time.perf_counter()
    sampler = RandomSampler(SearchSpace.from_mapping(SPACE), np.random.default_rng(seed))
    twin = SearchCore.restore(data, sampler)
    t4 = time.perf_counter()
    assert twin.snapshot() == data
    return {
        "n": n,
        "snapshot_s": t1 - t0,
        "dumps_s": t2 - t1,
        "loads_s": t3 - t2,
        "restore_s": t4 - t3,
        "json_bytes": len(text),
    }


def profile(n: int, top: int = 25) -> str:
    core = build(n)
    prof = cProfile.Profile()
    prof.enable()
    drive(core, n)
    prof.disable()
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("tottime").print_stats(top)
    return out.getvalue()


def environment() -> dict[str, Any]:
    import os

    return {
        "date": datetime.now(timezone.utc).strftime("%Y-%m-%d"),
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "machine": platform.machine(),
        "processor": platform.processor() or "unknown",
        "nproc": os.cpu_count(),
        "numpy": np.__version__,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="only n = 1e3 and 1e4")
    parser.add_argument("--json", metavar="OUT", help="also write the figures to OUT as JSON")
    parser.add_argument("--profile", metavar="N", type=int, help="cProfile one run of N trials and stop")
    parser.add_argument("--repeat", type=int, default=3, help="runs per n below 1e6, the best reported (default 3)")
    parser.add_argument("--no-gc", action="store_true", help="switch the cyclic garbage collector off while driving")
    args = parser.parse_args(argv)
    if args.profile:
        print(profile(args.profile))
        return 0
    sizes = [10**3, 10**4] if args.quick else [10**3, 10**4, 10**5, 10**6]
    env = environment()
    print(f"rungway core cost  python {env['python']}  nproc {env['nproc']}  {env['date']}")
    print(f"ASHA eta={ETA} budgets {MIN_BUDGET}..{MAX_BUDGET}, W={WORKERS} in flight, random sampler, 3 parameters, "
          f"gc {'off' if args.no_gc else 'on'}, best of {args.repeat} runs below n=1e6")
    print()
    head = f"{'n':>9} {'pairs':>9} {'pairs/s':>9} {'first10%':>9} {'last10%':>9} {'loop/s':>9} {'loop cpu/s':>10} {'B/trial':>8} {'+configs':>9}"
    print(head)
    print("-" * len(head))
    rows = []
    for n in sizes:
        row = measure(n, repeat=args.repeat if n < 10**6 else 1, collect=not args.no_gc)
        rows.append(row)
        print(
            f"{n:>9,} {row['pairs']:>9,} {row['pairs_per_s']:>9,.0f} {row['first10_pairs_per_s']:>9,.0f} "
            f"{row['last10_pairs_per_s']:>9,.0f} {row['loop_pairs_per_s']:>9,.0f} {row['loop_cpu_pairs_per_s']:>10,.0f} "
            f"{row['bytes_per_trial']:>8.0f} {row['bytes_per_trial_with_configs']:>9.0f}",
            flush=True,
        )
    print()
    slowest = min(r["last10_pairs_per_s"] for r in rows if r["last10_pairs_per_s"] == r["last10_pairs_per_s"])
    heaviest = max(r["bytes_per_trial"] for r in rows)
    print(f"target >= {TARGET_RATE:,} pairs/s: slowest last-10% rate {slowest:,.0f} -> "
          f"{'met' if slowest >= TARGET_RATE else 'MISSED'}")
    print(f"target < {TARGET_BYTES} B/trial besides configs: largest {heaviest:.0f} -> "
          f"{'met' if heaviest < TARGET_BYTES else 'MISSED'}")
    check = tracemalloc_check(10**4)
    print(f"tracemalloc cross-check at n=1e4: retained {check['retained_per_trial']:.0f} B/trial "
          f"(configs and sampler included), peak {check['peak_per_trial']:.0f} B/trial (driver included)")
    snap_n = 10**4 if args.quick else 10**5
    snap = time_snapshot(snap_n)
    print(f"snapshot at n={snap_n:,}: snapshot() {snap['snapshot_s']:.3f} s, json.dumps {snap['dumps_s']:.3f} s "
          f"({snap['json_bytes'] / 1e6:.1f} MB), json.loads {snap['loads_s']:.3f} s, restore() {snap['restore_s']:.3f} s")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump({"environment": env, "rows": rows, "tracemalloc": check, "snapshot": snap}, fh, indent=2)
            fh.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
