"""Recovery from a lost machine: time from a node's death to its segments being noticed,
requeued and running again, and the work redone (budget units run twice).

A 3-node ray.cluster_utils cluster; a resumable objective that sleeps per budget unit and
checkpoints every unit; one node is killed while it runs segments.

    .venv/bin/python bench/recovery.py [--repeats 3] [--unit-seconds 0.2]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests" / "run"))

SPEC = """
name = "recovery"
objective = "objectives_run:slow_resumable"
metric = "loss"
better = "lower"
[ladder]
min = 3
max = 27
mode = "asha"
[limits]
trials = 12
[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""


def one_run(unit_seconds: float) -> dict[str, float]:
    import ray
    from ray.cluster_utils import Cluster

    from rungway.scheduler.head.driver import HealthSettings, SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.spec import parse_spec
    from rungway.scheduler.testing import kill_ray_node

    os.environ["RUNGWAY_TEST_SLEEP"] = str(unit_seconds)
    os.environ["PYTHONPATH"] = os.pathsep.join([str(ROOT / "tests" / "run"), os.environ.get("PYTHONPATH", "")])
    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 1, "include_dashboard": False})
    doomed = cluster.add_node(num_cpus=2)
    cluster.add_node(num_cpus=1)
    ray.init(address=cluster.address, logging_level="ERROR")
    cluster.wait_for_nodes()
    marks: dict[str, float] = {}
    victims: dict[tuple[int, int], float] = {}

    class Timed(SearchDriver):
        def _apply_entry(self, entry):  # type: ignore[no-untyped-def]
            if entry["e"] == "lost" and "killed" in marks:
                victims.setdefault((entry["t"], entry["a"]), -1.0)
                marks.setdefault("noticed", time.monotonic())
            return super()._apply_entry(entry)

        def _submit(self, seg):  # type: ignore[no-untyped-def]
            super()._submit(seg)
            if "noticed" in marks and any(t == seg.trial for t, _ in victims):
                marks.setdefault("resubmitted", time.monotonic())

    try:
        root = tempfile.mkdtemp(prefix="rungway-recovery-")
        driver = Timed(parse_spec(SPEC), SPEC, root, RayExecutor(), health=HealthSettings(check_every=0.25))
        progress_at_kill: dict[int, float] = {}

        def kill() -> None:
            while True:
                there = [r for r in list(driver.running.values()) if r.node == doomed.node_id and r.progress > r.start_budget]
                if there:
                    for r in there:
                        progress_at_kill[r.trial] = r.progress
                    marks["killed"] = time.monotonic()
                    kill_ray_node(cluster, doomed)  # daemons and the workers running segments
                    return
                time.sleep(0.02)

        threading.Thread(target=kill, daemon=True).start()
        report = driver.run()
        assert report.finished
        # Progress reaches the head with a segment's heartbeat (about one a second), so units
        # shorter than that may end every segment before one is seen running there.
        assert "killed" in marks, "no segment was seen past its start on the doomed node: raise --unit-seconds"
        frame = driver.files.read_measurements()
        # Work redone: budget units a victim trial reported again in a later attempt, at or below
        # how far it had got when its node died (0 when it resumed from its newest checkpoint).
        redone = 0.0
        for (trial, attempt), _ in victims.items():
            again = frame[(frame["trial"] == trial) & (frame["attempt"] > attempt) & (frame["budget"] <= progress_at_kill.get(trial, 0))]
            redone += float(len(again.drop_duplicates(["budget"])))
        return {
            "notice_seconds": marks["noticed"] - marks["killed"],
            "requeue_to_resubmit_seconds": marks.get("resubmitted", marks["noticed"]) - marks["killed"],
            "segments_lost": float(len(victims)),
            "units_redone": redone,
        }
    finally:
        ray.shutdown()
        cluster.shutdown()


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--unit-seconds", type=float, default=0.2)
    args = parser.parse_args()
    runs = [one_run(args.unit_seconds) for _ in range(args.repeats)]
    out = {key: {"median": statistics.median(r[key] for r in runs), "min": min(r[key] for r in runs),
                 "max": max(r[key] for r in runs)} for key in runs[0]}
    print(json.dumps({"unit_seconds": args.unit_seconds, "runs": len(runs), **out}, indent=2))


if __name__ == "__main__":
    main()
