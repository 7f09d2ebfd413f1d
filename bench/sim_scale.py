"""How fast the cluster simulator runs, and how ASHA's throughput grows with workers in it.

Run from the repository root::

    .venv/bin/python bench/sim_scale.py             # 1e6 trials on 10,000 workers + the table
    .venv/bin/python bench/sim_scale.py --quick     # 1e5 trials on 1,000 workers + the table
    .venv/bin/python bench/sim_scale.py --json out.json

Part 1 simulates one ASHA search (eta = 3, budgets 1 .. 81, ``max_trials = N``, a counting
sampler, lognormal heavy-tailed costs of 60 s per budget unit with sigma 0.5) on W workers until
it drains, and prints the real time it took, the events and segments per real second, and
what the simulated search did.

Part 2 runs ASHA (no trial limit in sight: ``max_trials = 10**9``) for a fixed simulated
horizon on 1, 10, 100, 1,000 and 10,000 workers and prints its throughput per simulated hour:
segments, rung-0 results and budget units, each also per worker. Li et al. (MLSys 2020, "A
System for Massively Parallel Hyperparameter Tuning") report that ASHA's throughput grows
linearly with the number of workers (recalled from memory: the qualitative result, not a figure
to compare numbers with). The horizon is max(40, 20000 / W) mean segment lengths: every W runs
at least 40 segments per worker, and small clusters run enough segments for the mix of rungs
(which sets the mean segment length under a per-unit cost) to settle. Under a per-unit cost,
budget units per hour are what busy workers turn out whatever the mix.

Nothing is asserted: this is a benchmark, not a test.
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import time

from rungway.scheduler.core.plan import SearchPlan
from rungway.scheduler.sim import FixedCost, HeavyTailCost, simulate
from rungway.scheduler.testing import CountingSampler

SECONDS_PER_UNIT = 60.0


def scale_run(trials: int, workers: int) -> dict:
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=81, eta=3, max_trials=trials)
    t0 = time.perf_counter()
    r = simulate(plan, CountingSampler(), workers, HeavyTailCost(SECONDS_PER_UNIT, sigma=0.5), seed=1)
    took = time.perf_counter() - t0
    return {
        "trials": trials, "workers": workers, "real_seconds": took, "events": r.events,
        "segments": r.segments, "decisions": r.decisions, "events_per_s": r.events / took,
        "segments_per_s": r.segments / took, "simulated_hours": r.wall_seconds / 3600,
        "utilization": r.utilization, "trials_per_rung": list(r.trials_per_rung[0]), "drained": r.drained,
    }


def throughput_table(worker_counts: list[int]) -> list[dict]:
    rows = []
    plan = SearchPlan(mode="asha", min_budget=1, max_budget=81, eta=3, max_trials=10**9)
    for label, cost, mean_segment in (
        ("fixed 60 s", FixedCost(60.0), 60.0),
        # ASHA's segments average about 2.5 budget units (3.67 units in 1.49 segments per trial)
        ("heavy-tail 60 s/unit", HeavyTailCost(SECONDS_PER_UNIT, sigma=1.0), 2.5 * SECONDS_PER_UNIT),
    ):
        for w in worker_counts:
            horizon = max(40, 20000 / w) * mean_segment
            t0 = time.perf_counter()
            r = simulate(plan, CountingSampler(), w, cost, seed=2, until=horizon)
            rows.append({
                "cost": label, "workers": w, "simulated_hours": horizon / 3600, "segments": r.segments,
                "segments_per_hour": r.segments_per_hour, "per_worker": r.segments_per_hour / w,
                "rung0_per_hour": r.rung0_results_per_hour, "rung0_per_worker": r.rung0_results_per_hour / w,
                "budget_per_hour": r.budget_per_hour, "budget_per_worker": r.budget_per_hour / w,
                "utilization": r.utilization, "real_seconds": time.perf_counter() - t0,
            })
    return rows


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--json")
    args = parser.parse_args()
    trials, workers = (100_000, 1_000) if args.quick else (1_000_000, 10_000)
    print(f"python {platform.python_version()} on {platform.machine()} ({platform.processor() or 'cpu'})")
    big = scale_run(trials, workers)
    print(f"\n1. ASHA, {big['trials']:,} trials on {big['workers']:,} workers, heavy-tailed costs: "
          f"{big['real_seconds']:.1f} s real time")
    print(f"   {big['events']:,} events, {big['segments']:,} segments, {big['decisions']:,} asks; "
          f"{big['events_per_s']:,.0f} events/s, {big['segments_per_s']:,.0f} segments/s")
    print(f"   simulated {big['simulated_hours']:.1f} h, utilization {big['utilization']:.3f}, "
          f"results per rung {big['trials_per_rung']}, drained {big['drained']}")
    rows = throughput_table([1, 10, 100, 1000, 10000])
    print("\n2. ASHA throughput vs workers (per simulated hour; 'per w' = per worker)")
    print(f"   {'cost':<22}{'workers':>8}{'segments/h':>12}{'per w':>8}{'rung0/h':>10}{'per w':>8}"
          f"{'units/h':>11}{'per w':>8}{'util':>7}{'real s':>8}")
    for row in rows:
        print(f"   {row['cost']:<22}{row['workers']:>8,}{row['segments_per_hour']:>12,.0f}{row['per_worker']:>8.2f}"
              f"{row['rung0_per_hour']:>10,.0f}{row['rung0_per_worker']:>8.2f}{row['budget_per_hour']:>11,.0f}"
              f"{row['budget_per_worker']:>8.2f}{row['utilization']:>7.3f}{row['real_seconds']:>8.1f}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"scale": big, "throughput": rows}, fh, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
