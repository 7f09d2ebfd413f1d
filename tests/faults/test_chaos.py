"""A bounded chaos run: 200 trials, a seeded schedule of machine kills (a node removed and a
fresh one added), one kill -9 of the head, and trials whose objective ends its worker on
every attempt (exit, SIGKILL, memory past its limit). Afterwards: no measurement lost, none
doubled, every value equal to the objective's, what was recorded is a ladder (every trial at
rung k+1 has a result at rung k), and every dying trial failed after exactly max_crashes + 1
crashes, each recorded once."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from objectives_dying import chaos_fate  # noqa: E402
from objectives_run import value_at  # noqa: E402
from runhelpers import _worker_path, spec_text  # noqa: E402

from rungway.scheduler.testing import kill_ray_node  # noqa: E402

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]
TRIALS = 200


def test_chaos_with_node_kills_and_a_head_kill(tmp_path: Path) -> None:
    import ray
    from ray.cluster_utils import Cluster

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    rng = np.random.default_rng(7)
    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 1, "include_dashboard": False})
    workers = [cluster.add_node(num_cpus=1), cluster.add_node(num_cpus=1)]
    cluster.wait_for_nodes()
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(RUN), env.get("PYTHONPATH", "")])
    env["RUNGWAY_TEST_SLEEP"] = "0.05"
    spec = tmp_path / "chaos.toml"
    text = spec_text("chaos", objective="objectives_dying:chaotic", trials=TRIALS, max_budget=9)
    spec.write_text(text.replace("[resources]\ncpus = 1", "[resources]\ncpus = 1\nmemory_mb = 300"))
    store = tmp_path / "store"
    command = [*RUNGWAY, "run", str(spec), "--store", str(store), "--address", cluster.address, "--json"]
    kills: list[float] = []
    head_killed = False
    started = time.monotonic()
    next_node_kill = started + float(rng.uniform(3.0, 6.0))
    # ray.cluster_utils adds nodes from the main thread only: one loop drives every fault.
    try:
        head = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
        while head.poll() is None:
            now = time.monotonic()
            assert now - started < 480, "the chaos run did not finish in time"
            if not head_killed and now - started > 12.0:
                head.send_signal(signal.SIGKILL)
                head.communicate(timeout=60)
                head_killed = True
                head = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
            if now >= next_node_kill and len(kills) < 4:
                kill_ray_node(cluster, workers.pop(0))  # the machine: daemons and workers
                kills.append(now)
                workers.append(cluster.add_node(num_cpus=1))
                next_node_kill = now + float(rng.uniform(3.0, 6.0))
            time.sleep(0.1)
        stdout, stderr = head.communicate(timeout=60)
        assert head.returncode == 0, stderr
        assert stdout.strip(), stderr
        assert json.loads(stdout)["finished"] is True
        assert head_killed, "the search finished before the head could be killed"
        assert len(kills) >= 2, "the schedule killed fewer than two machines"
    finally:
        cluster.shutdown()

    frame = pd.read_parquet(store / "searches" / "chaos" / "measurements")
    finals = frame[frame["final"]]
    table = pd.read_parquet(store / "searches" / "chaos" / "trials.parquet").set_index("trial")
    assert set(table.index) == set(range(TRIALS))
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    per_rung = finals.groupby("rung")["trial"].apply(set)
    for k in range(1, int(per_rung.index.max()) + 1):
        assert per_rung[k] <= per_rung[k - 1], f"a trial reached rung {k} without a result at rung {k - 1}"
    fates = table["space_x"].map(chaos_fate)
    dying, living = table[fates.notna()], table[fates.isna()]
    assert {"exit", "signal", "memory"} <= set(fates.dropna()), "the seed gave no trial of some fate"
    assert (living["status"].isin(["parked", "done"])).all()
    # max_crashes = 1: two attempts crash, then the trial fails; a loss on a killed machine in
    # between is not a crash and does not count.
    assert (dying["status"] == "failed").all() and (dying["failures"] == 2).all(), dying[["status", "failures"]]
    assert not set(finals["trial"]) & set(dying.index), "a dying trial has a result"
    failures = pd.concat([pd.read_parquet(p) for p in (store / "searches" / "chaos" / "failures").glob("*.parquet")])
    assert not failures.duplicated(["trial", "attempt"]).any(), "a failure was recorded twice"
    crashes = failures[failures["trial"].isin(dying.index)].groupby("trial").size()
    assert (crashes == 2).all() and set(crashes.index) == set(dying.index), crashes
    memory = failures[failures["trial"].isin(dying.index[fates[fates.notna()] == "memory"])]
    assert (memory["error_type"] == "MemoryError").all(), memory[["error_type", "message"]]
