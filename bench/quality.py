"""Search quality per CPU-second on real work: rungway's ASHA, Hyperband and synchronous
successive halving against the random search at full budget a lab would write by hand with
plain Ray tasks, all on the same 2 CPUs, with the same space, seeds and CPU budget.

Run from the repository root::

    .venv/bin/python bench/quality.py                 # 5 seeds, 30 CPU-seconds per search
    .venv/bin/python bench/quality.py --quick         # 2 seeds, 10 CPU-seconds per search
    .venv/bin/python bench/quality.py --json out.json --figures bench/figures

Objectives (``rungway.workers.demo``, scikit-learn's bundled data sets, one thread each):

- *digits-mlp*: ``train_mlp`` (resumable form), the one-hidden-layer network on the 8x8
  digits, budget 1 .. 27 epochs, the demo spec's space (hidden units, step size, L2 penalty,
  batch size). Target: ``reference_accuracy()``, scikit-learn's default ``MLPClassifier``.
- *cancer-boosting*: ``train_boosting`` (plain form: every rung trains again from scratch),
  histogram gradient boosting on breast cancer, budget 10 .. 270 iterations, the boosting
  spec's space. Target: ``reference_boosting_accuracy()``.

Methods, per objective and seed (each a fresh search; their order rotates with the seed):

- *asha*, *hyperband*: rungway (``SearchDriver`` + ``RayExecutor``, the default head
  settings), eta = 3, ``limits.cpu_hours`` = the budget, no trial limit.
- *sync-halving*: rungway, one synchronous bracket of ``sync_trials`` = N, N sized so that the
  bracket's estimated cost (calibrated below) fits the budget, and the same ``cpu_hours``.
- *baseline*: plain ``ray.remote`` tasks, each training one configuration from scratch to the
  top budget (the resumable MLP through a throwaway ``Context``, no checkpoints), 2 in flight,
  no new task once the finished tasks' CPU-seconds reach the budget. Its configurations come
  from the same sampler, seeded alike, so it trains the very configurations rungway's trials
  0, 1, 2, ... start with.

CPU-seconds are the workers' own: for rungway each segment's start to end in the
measurements table (checkpoint load and saves included), for the baseline each task's clock
around its training. ``cpu_at(t)`` sums the parts of all segments before t; a result's point
on the curve is ``(cpu_at(its end), best result so far)``, every rung's result counting (a
model trained 9 epochs is a model). Figures over the seeds (median, min, max):

- best validation accuracy at equal CPU-seconds: at the smallest total CPU any method of that
  seed used (so no method is judged past its end), and each method's final best;
- CPU-seconds and wall seconds to reach the target (``n/N`` says in how many seeds it did);
- ASHA's wall time to the target over the wall time of one training of ASHA's eventual best
  configuration at the top budget (timed in this process, median of 3).

The plot (``--figures``) draws, per objective, the median over seeds of best-so-far against
CPU-seconds per method. Nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from utilization import busy_in, run_search, spread, start_ray  # noqa: E402

METHODS = ("asha", "hyperband", "sync-halving", "baseline")
SEGMENT_OVERHEAD = 0.03  # s per rungway segment assumed when sizing the synchronous bracket

SPEC = """
name = "{name}"
objective = "{objective}"
metric = "accuracy"
better = "higher"
seed = {seed}
[ladder]
unit = "{unit}"
min = {low}
max = {high}
eta = 3
mode = "{mode}"
{ladder_extra}
[sampler]
kind = "random"
[limits]
cpu_hours = {cpu_hours}
[resources]
cpus = 1
{space}
"""


def objectives() -> dict[str, dict[str, Any]]:
    from rungway.workers import demo

    return {
        "digits-mlp": {"objective": "rungway.workers.demo:train_mlp", "unit": "epochs", "low": 1, "high": 27,
                       "resumable": True, "space": demo.DEMO_SPEC[demo.DEMO_SPEC.index("[space."):],
                       "reference": demo.reference_accuracy},
        "cancer-boosting": {"objective": "rungway.workers.demo:train_boosting", "unit": "iterations", "low": 10,
                            "high": 270, "resumable": False,
                            "space": demo.BOOSTING_SPEC[demo.BOOSTING_SPEC.index("[space."):],
                            "reference": demo.reference_boosting_accuracy},
    }


def spec_text(obj: dict[str, Any], mode: str, seed: int, budget_s: float, name: str, sync_trials: int = 0) -> str:
    extra = f"sync_trials = {sync_trials}" if mode == "sync-halving" else ""
    return SPEC.format(name=name, objective=obj["objective"], seed=seed, unit=obj["unit"], low=obj["low"],
                       high=obj["high"], mode=mode, ladder_extra=extra, cpu_hours=repr(budget_s / 3600.0),
                       space=obj["space"])


# ---- training one configuration from scratch (the baseline's work, and the timings) -------------


def train_once(objective: str, config: dict[str, Any], budget: int) -> dict[str, float]:
    """Train ``config`` from scratch to ``budget``; a resumable objective runs with a throwaway
    Context (nothing saved, nothing reported anywhere)."""
    from rungway.workers.context import Context
    from rungway.workers.objective import load_objective

    obj = load_objective(objective)
    if obj.form == "plain":
        return dict(obj.fn(dict(config), budget))
    ctx = Context(config=config, budget=budget, start=0, state=None, trial=0, attempt=1, rung=0, milestones=(),
                  save=lambda state, b: None, report=lambda b, metrics, at: True, yield_flag=lambda: False)
    return dict(obj.fn(ctx))


def timed(objective: str, config: dict[str, Any], budget: int, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        train_once(objective, config, budget)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def calibrate(obj: dict[str, Any], spec: Any) -> dict[str, float]:
    """Seconds for a few sampled configurations at the lowest and the top budget (in this
    process, after a warm-up), to size the synchronous bracket."""
    import numpy as np

    sampler = spec.make_sampler(np.random.default_rng(12345))
    configs = [sampler.propose() for _ in range(3)]
    train_once(obj["objective"], configs[0], obj["low"])  # imports, data loading
    top = statistics.median(timed(obj["objective"], c, obj["high"], 1) for c in configs)
    low = statistics.median(timed(obj["objective"], c, obj["low"], 1) for c in configs)
    per_unit = max(1e-6, (top - low) / (obj["high"] - obj["low"]))
    return {"top_s": top, "low_s": low, "per_unit_s": per_unit, "fixed_s": max(0.0, low - per_unit * obj["low"])}


def sync_trials_for(obj: dict[str, Any], cal: dict[str, float], budget_s: float) -> tuple[int, float]:
    """The largest bracket (trials at rung 0) whose estimated cost fits ``budget_s``."""
    budgets, b = [], obj["low"]
    while b <= obj["high"]:
        budgets.append(b)
        b *= 3

    def cost(n: int) -> float:
        total, prev = 0.0, 0
        for k, b in enumerate(budgets):
            count = n // 3**k
            advance = (b - prev) if obj["resumable"] else b
            total += count * (cal["fixed_s"] + cal["per_unit_s"] * advance + SEGMENT_OVERHEAD)
            prev = b
        return total

    n = 3 ** (len(budgets) - 1)
    while cost(n + 1) <= budget_s:
        n += 1
    return n, cost(n)


# ---- the runs ---------------------------------------------------------------------------------------


def curve(events: list[tuple[float, float]], intervals: list[tuple[float, float]], t0: float) -> list[list[float]]:
    """Best so far: [cpu_at(t), wall t - t0, best] at every result (t, value), in time order."""
    out, best = [], -math.inf
    for t, value in sorted(events):
        if value == value:
            best = max(best, value)
        if best > -math.inf:
            out.append([busy_in(intervals, t0 - 1e6, t), t - t0, best])
    return out


def rungway_run(obj: dict[str, Any], mode: str, seed: int, budget_s: float, root: str, sync_trials: int) -> dict[str, Any]:
    name = f"q-{mode}-{seed}-{time.monotonic_ns()}"
    out = run_search(spec_text(obj, mode, seed, budget_s, name, sync_trials), root)
    frame = out["frame"]
    finals = frame[frame["final"].astype(bool) & (frame["metric"] == "accuracy")]
    events = [(row.ended_at.timestamp(), float(row.value)) for row in finals.itertuples()]
    seg = finals.groupby(["trial", "attempt"]).agg(s=("started_at", "min"), e=("ended_at", "max"))
    intervals = [(r.s.timestamp(), r.e.timestamp()) for r in seg.itertuples()]
    driver = out["driver"]
    best_config = None
    if not finals.empty:  # the configuration of the best result (the curve's last point)
        best_config = driver.core.trial(int(finals.loc[finals["value"].idxmax(), "trial"])).config
    return {"curve": curve(events, intervals, out["t0"]), "cpu_used_s": sum(e - s for s, e in intervals),
            "head_cpu_s": driver.cpu_seconds, "wall_s": out["wall"], "trials": len(driver.core),
            "segments": len(intervals), "best_config": best_config}


def baseline_run(obj: dict[str, Any], spec: Any, budget_s: float, slots: int = 2) -> dict[str, Any]:
    import numpy as np
    import ray

    @ray.remote(num_cpus=1, max_retries=0)
    def full_budget(objective: str, config: dict[str, Any], budget: int) -> dict[str, Any]:
        import time as clock

        from rungway.workers import demo  # noqa: F401  (imported before the clock starts)

        started = clock.time()
        scores = train_once(objective, config, budget)
        return {"started": started, "ended": clock.time(), "value": scores["accuracy"]}

    sampler = spec.make_sampler(np.random.default_rng(spec.seed))
    t0 = time.time()
    start = time.perf_counter()
    pending: list[Any] = []
    spent, results = 0.0, []
    while True:
        while len(pending) < slots and spent < budget_s:
            pending.append(full_budget.remote(obj["objective"], sampler.propose(), obj["high"]))
        if not pending:
            break
        ready, pending = ray.wait(pending, num_returns=1)
        r = ray.get(ready[0])
        spent += r["ended"] - r["started"]
        results.append(r)
    wall = time.perf_counter() - start
    intervals = [(r["started"], r["ended"]) for r in results]
    return {"curve": curve([(r["ended"], r["value"]) for r in results], intervals, t0), "cpu_used_s": spent,
            "head_cpu_s": spent, "wall_s": wall, "trials": len(results), "segments": len(results), "best_config": None}


def best_at(points: list[list[float]], cpu: float) -> float | None:
    """Best so far once ``cpu`` CPU-seconds were spent (None before the first result)."""
    best = None
    for x, _, y in points:
        if x <= cpu + 1e-9:
            best = y
        else:
            break
    return best


def first_reach(points: list[list[float]], target: float) -> tuple[float, float] | None:
    for x, t, y in points:
        if y >= target - 1e-12:
            return x, t
    return None


def median_curve(curves: list[list[list[float]]], upto: float, steps: int = 120) -> list[tuple[float, float]]:
    out = []
    for i in range(1, steps + 1):
        x = upto * i / steps
        values = [best_at(c, x) for c in curves]
        if all(v is not None for v in values):
            out.append((x, statistics.median(values)))
    return out


def _fmt(value: float | None) -> str:
    """A score for the progress line; None when a method had no result in the budget."""
    return "none" if value is None else f"{value:.4f}"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="2 seeds, 10 CPU-seconds per search")
    parser.add_argument("--seeds", type=int, help="seeds per objective (default 5; 2 with --quick)")
    parser.add_argument("--budget", type=float, help="CPU-seconds per search (default 30; 10 with --quick)")
    parser.add_argument("--objectives", default="digits-mlp,cancer-boosting", help="comma-separated")
    parser.add_argument("--json", metavar="OUT")
    parser.add_argument("--figures", metavar="DIR", help="write one SVG per objective here")
    parser.add_argument("--smoke", action="store_true",
                        help="tiny sizes, for the tests (1 seed, 1 CPU-second, boosting only): figures mean nothing")
    args = parser.parse_args(argv)
    if args.smoke:
        args.quick = True
        args.seeds = args.seeds or 1
        args.budget = args.budget or 1.0
        if args.objectives == parser.get_default("objectives"):
            args.objectives = "cancer-boosting"
    seeds = list(range(args.seeds or (2 if args.quick else 5)))
    budget_s = args.budget or (10.0 if args.quick else 30.0)
    from rungway.scheduler.spec import parse_spec

    import ray

    table = objectives()
    chosen = [name.strip() for name in args.objectives.split(",") if name.strip()]
    result: dict[str, Any] = {"budget_cpu_s": budget_s, "seeds": len(seeds), "cpus": 2, "quick": args.quick,
                              "objectives": {}}
    start_ray(2)
    root = tempfile.mkdtemp(prefix="rungway-quality-")
    try:
        for oname in chosen:
            obj = table[oname]
            reference = float(obj["reference"]())
            probe = parse_spec(spec_text(obj, "asha", 0, budget_s, "probe"))
            cal = calibrate(obj, probe)
            n_sync, n_cost = sync_trials_for(obj, cal, budget_s)
            print(f"{oname}: target {reference:.4f}; calibration {cal['top_s']:.3f} s per top-budget training; "
                  f"sync_trials {n_sync} (estimated {n_cost:.1f} CPU-s)", flush=True)
            warm = spec_text(obj, "asha", 999, 1.0, f"warm-{oname}-{time.monotonic_ns()}")
            run_search(warm, root)  # workers import the objective and load the data once
            runs: dict[str, list[dict[str, Any]]] = {m: [] for m in METHODS}
            for seed in seeds:
                order = METHODS[seed % len(METHODS):] + METHODS[:seed % len(METHODS)]
                for method in order:
                    if method == "baseline":
                        spec = parse_spec(spec_text(obj, "full-budget", seed, budget_s, "baseline"))
                        run = baseline_run(obj, spec, budget_s)
                    else:
                        run = rungway_run(obj, method, seed, budget_s, root, n_sync)
                    run["seed"] = seed
                    runs[method].append(run)
                    print(f"  seed {seed} {method:<13} best {run['curve'][-1][2] if run['curve'] else float('nan'):.4f} "
                          f"cpu {run['cpu_used_s']:.1f} s (head counted {run['head_cpu_s']:.1f}) wall {run['wall_s']:.1f} s "
                          f"trials {run['trials']}", flush=True)
            equal = [min(runs[m][i]["cpu_used_s"] for m in METHODS) for i in range(len(seeds))]
            finals = [r["curve"][-1][2] for r in runs["baseline"] if r["curve"]]
            targets = {"sklearn-default": reference}
            if finals:
                targets["baseline-final"] = statistics.median(finals)
            methods: dict[str, Any] = {}
            for m in METHODS:
                rs = runs[m]
                methods[m] = {
                    "best_at_equal_cpu": spread([best_at(r["curve"], equal[i]) for i, r in enumerate(rs)]),
                    "best_final": spread([r["curve"][-1][2] if r["curve"] else None for r in rs]),
                    "cpu_used_s": spread([r["cpu_used_s"] for r in rs]),
                    "head_counted_cpu_s": spread([r["head_cpu_s"] for r in rs]),
                    "wall_s": spread([r["wall_s"] for r in rs]),
                    "trials": spread([r["trials"] for r in rs]),
                    "segments": spread([r["segments"] for r in rs]),
                    "to_target": {},
                }
                for tname, tvalue in targets.items():
                    reach = [first_reach(r["curve"], tvalue) for r in rs]
                    methods[m]["to_target"][tname] = {
                        "cpu_s": spread([x[0] if x else None for x in reach]),
                        "wall_s": spread([x[1] if x else None for x in reach]),
                        "reached": f"{sum(1 for x in reach if x)}/{len(rs)}",
                    }
            # ASHA: wall time to the target against one training of its eventual best at the top budget
            fulls = [timed(obj["objective"], r["best_config"], obj["high"], 3) if r["best_config"] else None
                     for r in runs["asha"]]
            versus: dict[str, Any] = {"best_config_full_budget_s": spread(fulls)}
            for tname, tvalue in targets.items():
                pairs = [(first_reach(r["curve"], tvalue), full) for r, full in zip(runs["asha"], fulls, strict=True)]
                versus[tname] = {"wall_to_target_s": spread([x[1] if x else None for x, _ in pairs]),
                                 "ratio": spread([x[1] / full if x and full else None for x, full in pairs])}
            entry: dict[str, Any] = {
                "target": reference, "target_name": "scikit-learn defaults on the same split", "targets": targets,
                "calibration": cal, "sync_trials": n_sync, "sync_estimated_cpu_s": n_cost,
                "equal_cpu_s": spread(equal), "methods": methods,
                "asha_vs_one_training": versus,
                "curves": {m: [r["curve"] for r in runs[m]] for m in METHODS},
            }
            if args.figures:
                from svg import line_plot

                series = {m: median_curve(entry["curves"][m], min(r["cpu_used_s"] for r in runs[m])) for m in METHODS}
                path = Path(args.figures) / f"quality-{oname}.svg"
                line_plot(series, path, step=True, hline=(reference, "sklearn default"),
                          title=f"{oname}: best validation accuracy so far (median of {len(seeds)} seeds)",
                          xlabel="CPU-seconds spent (2 workers)", ylabel="validation accuracy")
                entry["svg"] = str(path)
            result["objectives"][oname] = entry
            for m in METHODS:
                f = methods[m]
                reach = "  ".join(f"cpu->{k} {v['cpu_s']['median'] if v['cpu_s']['median'] is None else round(v['cpu_s']['median'], 2)}"
                                  f" ({v['reached']})" for k, v in f["to_target"].items())
                print(f"  {m:<13} best@equal {_fmt(f['best_at_equal_cpu']['median'])}  final {_fmt(f['best_final']['median'])}  "
                      f"{reach}", flush=True)
    finally:
        ray.shutdown()
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
