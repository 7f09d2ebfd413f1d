"""What one round of the sharing rules costs (``rungway.scheduler.core.sharing``).

Run from the repository root::

    .venv/bin/python bench/sharing_round.py              # 1,000 steady rounds and the other cases
    .venv/bin/python bench/sharing_round.py --rounds 200
    .venv/bin/python bench/sharing_round.py --json out.json

The cluster: 50 teams (20 with guarantees, 15 with caps, weights 1 to 3, 10 with CPU-hour
allowances that do not run out here), 10 searches each (500 in all, priorities 0 to 2),
segments of 1, 2 or 4 CPUs and 1 to 8 GB, on 2,048 CPUs and 8 TB. Every search has 20
segments waiting, 10,000 in all, before every round. Figures, timing ``plan_round`` alone
(``time.perf_counter_ns``; the driver's own work is not counted; the garbage collector is
off during the timed call, as ``timeit`` does, unless ``--with-gc``):

- *steady*: the cluster is full; before each round about 2 % of the running segments end
  (chosen by a seeded generator) and the waiting counts are topped up again, so each round
  grants some tens of segments. Median and p99 over ``--rounds`` rounds.
- *cold*: the first round on an empty cluster: 10,000 waiting, every CPU free, about a
  thousand segments granted in one round. Median and p99 over 20 fresh states.
- *preempting*: a team with a 256-CPU guarantee that was idle asks for it while the
  cluster is full of borrowed segments: the round that picks the victims. Median and p99
  over 20 fresh states.
- *event*: one ``Demand``, ``Started`` or ``Ended`` applied, mean over the steady run.

Nothing is asserted; the target (a round well under 10 ms) is printed next to the figures.
"""

from __future__ import annotations

import argparse
import gc
import json
import platform
import random
import statistics
import sys
import time
from typing import Any

from rungway.scheduler.core.sharing import (
    Demand,
    Ended,
    SharingState,
    Started,
    TeamQuota,
    TeamsConfigured,
    Tick,
)

TEAMS, SEARCHES_PER_TEAM, WAITING_PER_SEARCH = 50, 10, 20
CPUS, MEMORY_MB = 2048, 8 * 1024 * 1024
SHAPES = [(1, 1024), (2, 4096), (4, 8192), (1, 2048), (2, 2048)]
TARGET_MS = 10.0


def build(seed: int) -> tuple[SharingState, dict[tuple[str, str], tuple[int, int, int]]]:
    rnd = random.Random(seed)
    quotas = []
    for i in range(TEAMS):
        guarantee = 16 if i < 20 else 0
        cap = None if i % 10 < 7 else guarantee + rnd.choice([32, 64, 128])
        allowance = 1e6 if i % 5 == 0 else None
        quotas.append(TeamQuota(f"team{i:02d}", guarantee_cpus=guarantee, cap_cpus=cap, weight=rnd.choice([1, 2, 3]),
                                allowance_cpu_hours=allowance, used_cpu_hours=0))
    state = SharingState()
    state.apply(TeamsConfigured(CPUS, MEMORY_MB, tuple(quotas), preempt_deadline=60))
    shapes = {}
    for q in quotas:
        for j in range(SEARCHES_PER_TEAM):
            cpus, mem = rnd.choice(SHAPES)
            shapes[(q.name, f"search{j}")] = (cpus, mem, j % 3)
            state.apply(Demand(q.name, f"search{j}", WAITING_PER_SEARCH, cpus, mem, priority=j % 3))
    return state, shapes


KEEP_GC = False  # --with-gc: leave the garbage collector on while timing


def timed_round(state: SharingState, now: float):
    """One round, timed. Like ``timeit``, the garbage collector is off for the timed call
    (unless --with-gc): a collection pause belongs to the whole process's heap, not to the
    round that happened to trigger it."""
    if not KEEP_GC:
        gc.disable()
    try:
        t0 = time.perf_counter_ns()
        decision = state.apply(Tick(now))
        return decision, (time.perf_counter_ns() - t0) / 1e6
    finally:
        gc.enable()


def start_all(state: SharingState, decision, shapes, running: dict, now: float, counter: list[int]) -> int:
    started = 0
    for g in decision.grants:
        cpus, mem, _p = shapes[(g.team, g.search)]
        for _ in range(g.count):
            counter[0] += 1
            sid = counter[0]
            state.apply(Started(sid, g.team, g.search, cpus, mem, now))
            running[sid] = (g.team, g.search)
            started += 1
    return started


def top_up(state: SharingState, shapes, keys) -> None:
    for team, search in keys:
        cpus, mem, prio = shapes[(team, search)]
        state.apply(Demand(team, search, WAITING_PER_SEARCH, cpus, mem, priority=prio))


def pct(values: list[float], p: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(p / 100 * (len(ordered) - 1))))]


def steady(rounds: int, seed: int) -> dict[str, Any]:
    rnd = random.Random(seed)
    state, shapes = build(seed)
    running: dict[int, tuple[str, str]] = {}
    counter = [0]
    decision, _ms = timed_round(state, 0.0)
    start_all(state, decision, shapes, running, 0.0, counter)
    top_up(state, shapes, list(shapes))
    times, grants, events, event_ns = [], [], 0, 0
    for r in range(1, rounds + 1):
        now = float(r * 10)
        t0 = time.perf_counter_ns()
        ending = rnd.sample(sorted(running), max(1, len(running) // 50))
        touched = set()
        for sid in ending:
            touched.add(running.pop(sid))
            state.apply(Ended(sid, at=now))
        top_up(state, shapes, sorted(touched))
        event_ns += time.perf_counter_ns() - t0
        events += len(ending) + len(touched)
        decision, ms = timed_round(state, now)
        times.append(ms)
        t0 = time.perf_counter_ns()
        n = start_all(state, decision, shapes, running, now, counter)
        grants.append(n)
        granted = {(g.team, g.search) for g in decision.grants}
        top_up(state, shapes, sorted(granted))
        event_ns += time.perf_counter_ns() - t0
        events += n + len(granted)
    stats = state.statistics()
    return {
        "rounds": rounds,
        "median_ms": statistics.median(times),
        "p99_ms": pct(times, 99),
        "max_ms": max(times),
        "grants_per_round": statistics.mean(grants),
        "running_segments": len(running),
        "waiting_segments": sum(t["waiting_segments"] for t in stats["teams"].values()),
        "event_us": event_ns / events / 1e3,
    }


def cold(states: int, seed: int) -> dict[str, Any]:
    times, grants = [], []
    for k in range(states):
        state, _shapes = build(seed + k)
        decision, ms = timed_round(state, 0.0)
        times.append(ms)
        grants.append(sum(g.count for g in decision.grants))
    return {"states": states, "median_ms": statistics.median(times), "p99_ms": pct(times, 99),
            "grants_per_round": statistics.mean(grants)}


def preempting(states: int, seed: int) -> dict[str, Any]:
    times, victims = [], []
    for k in range(states):
        rnd = random.Random(seed + k)
        quotas = [TeamQuota("idle", guarantee_cpus=256)] + [
            TeamQuota(f"team{i:02d}", guarantee_cpus=16 if i < 20 else 0, weight=rnd.choice([1, 2, 3]))
            for i in range(TEAMS - 1)
        ]
        state = SharingState()
        state.apply(TeamsConfigured(CPUS, MEMORY_MB, tuple(quotas), preempt_deadline=60))
        shapes = {}
        for q in quotas[1:]:
            for j in range(SEARCHES_PER_TEAM):
                cpus, mem = rnd.choice(SHAPES)
                shapes[(q.name, f"search{j}")] = (cpus, mem, j % 3)
                state.apply(Demand(q.name, f"search{j}", WAITING_PER_SEARCH, cpus, mem, priority=j % 3))
        decision = state.apply(Tick(0.0))
        start_all(state, decision, shapes, {}, 0.0, [0])
        top_up(state, shapes, list(shapes))
        state.apply(Demand("idle", "urgent", 256, 1, 1024))
        decision, ms = timed_round(state, 10.0)
        times.append(ms)
        victims.append(len(decision.preemptions))
    return {"states": states, "median_ms": statistics.median(times), "p99_ms": pct(times, 99),
            "preemptions_per_round": statistics.mean(victims)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rounds", type=int, default=1000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json", help="also write the figures to this file")
    parser.add_argument("--with-gc", action="store_true", help="keep the garbage collector on while timing")
    args = parser.parse_args(argv)
    global KEEP_GC
    KEEP_GC = args.with_gc
    out = {
        "python": sys.version.split()[0],
        "machine": platform.processor() or platform.machine(),
        "gc_during_timing": args.with_gc,
        "teams": TEAMS,
        "searches": TEAMS * SEARCHES_PER_TEAM,
        "waiting": TEAMS * SEARCHES_PER_TEAM * WAITING_PER_SEARCH,
        "steady": steady(args.rounds, args.seed),
        "cold": cold(20, args.seed),
        "preempting": preempting(20, args.seed),
    }
    s, c, p = out["steady"], out["cold"], out["preempting"]
    print(f"sharing round: {out['teams']} teams, {out['searches']} searches, {out['waiting']} waiting segments; "
          f"Python {out['python']}; GC {'on' if args.with_gc else 'off'} while timing; "
          f"target: well under {TARGET_MS:g} ms")
    print(f"  steady     median {s['median_ms']:.3f} ms  p99 {s['p99_ms']:.3f} ms  max {s['max_ms']:.3f} ms  "
          f"({s['rounds']} rounds, {s['grants_per_round']:.0f} grants/round, {s['running_segments']} running)")
    print(f"  cold       median {c['median_ms']:.3f} ms  p99 {c['p99_ms']:.3f} ms  "
          f"({c['grants_per_round']:.0f} segments granted in the round)")
    print(f"  preempting median {p['median_ms']:.3f} ms  p99 {p['p99_ms']:.3f} ms  "
          f"({p['preemptions_per_round']:.0f} preemptions in the round)")
    print(f"  events     {s['event_us']:.2f} us each (Demand, Started, Ended; mean over the steady run)")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(out, fh, indent=2)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
