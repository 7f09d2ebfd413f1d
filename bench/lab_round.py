"""What one turn of the lab's head costs with many teams and searches (``service.lab.LabHead``).

Run from the repository root::

    .venv/bin/python bench/lab_round.py                 # 50 teams, 500 searches, 10,000 waiting
    .venv/bin/python bench/lab_round.py --quick         # 10 teams, 50 searches
    .venv/bin/python bench/lab_round.py --json out.json

``bench/sharing_round.py`` times the sharing rules alone. This one times the whole turn of the
head that a lab runs: the sharing round, plus stepping every search's driver (its grant, its
finished segments, health checks, journal writes), plus one CPU-ledger file per turn. The
cluster is a stand-in pool (no Ray): 2,048 CPUs; segments it starts run until the benchmark
ends a chosen fraction of them before each turn, so each turn has some tens of segments
ending (answered with results, journaled, stored) and as many granted. Every search is
asynchronous successive halving with thousands of trials still to admit, so the demand the
head counts is well over 10,000 segments (printed).

Figures: median and p99 of ``turn()`` (``time.perf_counter``) over ``--turns`` turns in the
steady state, the sharing round alone within those turns, and the first turn (every CPU
free, 500 drivers opened). Nothing is asserted; the target (a round
well under 10 ms) is printed beside them.
"""

from __future__ import annotations

import argparse
import json
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from rungway.scheduler.head.executor import Completion, InlineExecutor, InlinePool
from rungway.scheduler.service.auth import hash_token
from rungway.scheduler.service.config import parse_lab_config
from rungway.scheduler.service.lab import LabHead
from rungway.workers.runner import SegmentOrder, SegmentSummary

TARGET_MS = 10.0


class HeldLane(InlineExecutor):
    """An executor lane whose segments run until the benchmark ends them."""

    def __init__(self, pool: HeldPool) -> None:
        super().__init__(pool.cpus)
        self.pool = pool
        self.running: dict[tuple[int, int], SegmentOrder] = {}

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        self.running[(order.trial, order.attempt)] = order
        self.pool.live.append((self, (order.trial, order.attempt)))

    def finish(self, key: tuple[int, int]) -> None:
        order = self.running.pop(key, None)
        if order is None:
            return
        now = time.time()
        summary = SegmentSummary(order.trial, order.attempt, order.rung, "result", node="bench", started=now - 1.0,
                                 ended=now, value=random.random(), budget=order.target_budget)
        summary.final_rows = []
        self._done.append(Completion(order.trial, order.attempt, summary=summary))

    def cancel(self, trial: int, attempt: int) -> None:
        self.running.pop((trial, attempt), None)

    def in_flight(self) -> int:
        return len(self.running) + len(self._done)


class HeldPool(InlinePool):
    """The stand-in cluster: lanes whose segments run until ``end_some`` ends them."""

    def __init__(self, cpus: float, memory_mb: int) -> None:
        super().__init__(cpus, memory_mb)
        self.live: list[tuple[HeldLane, tuple[int, int]]] = []

    def lane(self, search: str) -> HeldLane:  # type: ignore[override]
        if search not in self.lanes:
            self.lanes[search] = HeldLane(self)
        return self.lanes[search]  # type: ignore[return-value]

    def end_some(self, fraction: float, rnd: random.Random) -> int:
        live = [(lane, key) for lane, key in self.live if key in lane.running]
        rnd.shuffle(live)
        cut = int(len(live) * fraction)
        for lane, key in live[:cut]:
            lane.finish(key)
        self.live = live[cut:]
        return cut


SPEC = """
name = "{name}"
objective = "bench_objectives:never_called"
metric = "loss"
better = "lower"
seed = {seed}
[ladder]
min = 1
max = 27
eta = 3
mode = "asha"
[limits]
trials = {trials}
[resources]
cpus = {cpus}
[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


def lab_config(root: Path, teams: int) -> Any:
    """20 of 50 teams with 8-CPU guarantees, a third with caps, weights 1 to 3."""
    lines = [f'[head]\nstore = "{root}"\nround_seconds = 0.001\n']
    for i in range(teams):
        guarantee = 8 if i < teams * 2 // 5 else 0
        cap = f"cap_cpus = {64 + 8 * (i % 4)}\n" if i % 3 == 0 else ""
        lines.append(f'[[team]]\nname = "team-{i:02d}"\nguarantee_cpus = {guarantee}\n{cap}weight = {1 + i % 3}\n'
                     f'tokens = ["{hash_token(f"rgw_bench{i}", iterations=1000)}"]\n')
    return parse_lab_config("\n".join(lines), str(root / "lab.toml"))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--teams", type=int, default=50)
    parser.add_argument("--searches-per-team", type=int, default=10)
    parser.add_argument("--turns", type=int, default=300)
    parser.add_argument("--end-fraction", type=float, default=0.02, help="running segments ended before each turn")
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--json")
    args = parser.parse_args(argv)
    if args.quick:
        args.teams, args.searches_per_team, args.turns = 10, 5, 100
    rnd = random.Random(20261202)
    with tempfile.TemporaryDirectory(prefix="rungway-lab-round-") as scratch:
        root = Path(scratch)
        config = lab_config(root, args.teams)
        pool = HeldPool(2048.0, 8 * 1024 * 1024)
        head = LabHead(config, pool)  # type: ignore[arg-type]
        setup = time.perf_counter()
        for i in range(args.teams):
            for j in range(args.searches_per_team):
                head.submit(f"team-{i:02d}", SPEC.format(name=f"s-{i:02d}-{j}", seed=i * 100 + j,
                                                         trials=10_000, cpus=rnd.choice([1, 2, 4])), priority=j % 3)
        setup = time.perf_counter() - setup
        head._configure(force=True)
        rounds: list[float] = []
        apply = head.sharing.apply

        def timed_apply(event: Any) -> Any:  # the sharing round alone, inside the turn
            if type(event).__name__ != "Tick":
                return apply(event)
            start = time.perf_counter()
            out = apply(event)
            rounds.append(time.perf_counter() - start)
            return out

        head.sharing.apply = timed_apply  # type: ignore[method-assign]
        first = time.perf_counter()
        head.turn()
        first = time.perf_counter() - first
        for _ in range(5):  # fill the cluster
            head.turn()
        times, ended = [], []
        for _ in range(args.turns):
            ended.append(pool.end_some(args.end_fraction, rnd))
            start = time.perf_counter()
            head.turn()
            times.append(time.perf_counter() - start)
        running = sum(len(lane.running) for lane in pool.lanes.values())
        waiting = sum(s.demand[0] for s in head._searches.values() if s.demand)
        head.stop()
    times.sort()
    result = {
        "teams": args.teams,
        "searches": args.teams * args.searches_per_team,
        "waiting_segments_counted": waiting,
        "running_segments": running,
        "segments_ended_per_turn": statistics.median(ended),
        "submit_seconds_all": setup,
        "first_turn_ms": first * 1e3,
        "turn_ms": {"median": statistics.median(times) * 1e3, "p99": times[int(len(times) * 0.99) - 1] * 1e3,
                    "min": times[0] * 1e3, "max": times[-1] * 1e3},
        "sharing_round_ms": {"median": statistics.median(rounds[6:]) * 1e3,
                             "p99": sorted(rounds[6:])[int(len(rounds[6:]) * 0.99) - 1] * 1e3},
        "target_ms": TARGET_MS,
    }
    text = json.dumps(result, indent=2)
    print(text)
    if args.json:
        Path(args.json).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
