"""Time to replay the head's journal: a search's events written by the real journal, then a
head started on that store (restoring nothing but the journal) and timed until it is ready.

    .venv/bin/python bench/journal_replay.py [--events 100000]
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from rungway.scheduler.core.events import Segment
from rungway.scheduler.core.search import SearchCore
from rungway.scheduler.head.driver import SearchDriver
from rungway.scheduler.head.executor import InlineExecutor
from rungway.scheduler.head.journal import Journal
from rungway.scheduler.spec import parse_spec

SPEC = """
name = "replay"
objective = "rungway.workers.demo:train_boosting"
metric = "loss"
better = "lower"
[ladder]
min = 1
max = 81
[limits]
trials = 1000000
[space.x]
kind = "real"
lower = 0.0
upper = 1.0
[space.y]
kind = "real"
lower = 0.0
upper = 1.0
"""


def write_journal(root: Path, events: int) -> int:
    spec = parse_spec(SPEC)
    core = SearchCore(spec.plan(), spec.make_sampler(np.random.default_rng(spec.seed)))
    files_dir = root / "searches" / "replay"
    (files_dir).mkdir(parents=True)
    (files_dir / "spec.toml").write_text(SPEC)
    journal = Journal(files_dir / "journal", fsync=False)
    values = np.random.default_rng(1).random(events)
    batch, written, running = [], 0, []
    while written < events:
        while len(running) < 64:
            seg = core.ask()
            assert isinstance(seg, Segment)
            running.append(seg)
            batch.append({"e": "seg", "t": seg.trial, "a": seg.attempt, "r": seg.rung})
            written += 1
        seg = running.pop(0)
        core.report(seg.trial, seg.attempt, seg.rung, float(values[written % events]))
        batch.append({"e": "rep", "t": seg.trial, "a": seg.attempt, "r": seg.rung, "v": float(values[written % events]), "cpu": 1.0})
        written += 1
        if len(batch) >= 1000:
            journal.append(batch)
            batch = []
    journal.append(batch)
    journal.close()
    return written


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--events", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    times = []
    for _ in range(args.repeats):
        root = Path(tempfile.mkdtemp(prefix="rungway-replay-"))
        written = write_journal(root, args.events)
        start = time.perf_counter()
        driver = SearchDriver(parse_spec(SPEC), SPEC, str(root), InlineExecutor())
        times.append(time.perf_counter() - start)
        assert driver.replayed == written, (driver.replayed, written)
    print(json.dumps({"events": args.events, "replay_seconds": {"median": statistics.median(times), "min": min(times), "max": max(times)},
                      "events_per_second": args.events / statistics.median(times)}, indent=2))


if __name__ == "__main__":
    main()
