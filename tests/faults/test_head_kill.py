"""kill -9 of the head at seeded random moments, restarted on the same store each time: the
search finishes with every measurement once, every value equal to the objective's, and the
leaderboard the objective's values imply. The Ray cluster (ray.cluster_utils) outlives the
heads, as it does in a lab where the head service restarts."""

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

from objectives_run import value_at  # noqa: E402
from runhelpers import _worker_path, spec_text  # noqa: E402

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]


@pytest.fixture(scope="module")
def cluster():
    import ray
    from ray.cluster_utils import Cluster

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    c = Cluster(initialize_head=True, head_node_args={"num_cpus": 1, "include_dashboard": False})
    c.add_node(num_cpus=1)
    c.wait_for_nodes()
    yield c
    c.shutdown()


def head_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(RUN), env.get("PYTHONPATH", "")])
    env["RUNGWAY_TEST_SLEEP"] = "0.3"
    return env


def settled_results(store: Path, name: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    frame = pd.read_parquet(store / "searches" / name / "measurements")
    finals = frame[frame["final"]]
    trials = pd.read_parquet(store / "searches" / name / "trials.parquet").set_index("trial")
    return finals, trials


def test_head_killed_at_random_moments_resumes_with_nothing_lost_or_doubled(cluster, tmp_path: Path) -> None:
    rng = np.random.default_rng(20261201)  # the kill schedule is seeded
    spec = tmp_path / "kill.toml"
    trials = 60
    spec.write_text(spec_text("kill", objective="objectives_run:sleepy", trials=trials, max_budget=27))
    store = tmp_path / "store"
    command = [*RUNGWAY, "run", str(spec), "--store", str(store), "--address", cluster.address, "--json"]
    kills = 0
    for _ in range(4):
        head = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=head_env())
        time.sleep(float(rng.uniform(4.0, 9.0)))  # Ray client start-up is included
        if head.poll() is not None:
            break
        head.send_signal(signal.SIGKILL)
        head.communicate(timeout=60)
        kills += 1
    assert kills >= 2, "the search finished before the heads could be killed"
    final = subprocess.run(command, capture_output=True, text=True, timeout=600, env=head_env())
    assert final.returncode == 0, final.stderr
    summary = json.loads(final.stdout)
    assert summary["finished"] is True and summary["trials"] == trials

    finals, table = settled_results(store, "kill")
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    assert set(table.index) == set(range(trials))
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    # Every trial's recorded best is the objective's value at the budget it reached.
    for tid, row in table.iterrows():
        assert row["latest_value"] == pytest.approx(value_at(row["space_x"], int(row["budget_reached"])), abs=1e-12)
    # Every trial has a result at every rung up to the one it reached (none skipped or lost).
    rungs = finals.groupby("trial")["rung"].apply(sorted)
    for tid, row in table.iterrows():
        assert rungs[tid] == list(range(int(row["rung"]) + 1)), tid
    # The leaderboard the values imply: ranked by rung reached, then value.
    shown = subprocess.run([*RUNGWAY, "show", "kill", "--json", "--store", str(store), "--top", "5"],
                           capture_output=True, text=True, timeout=120, env=head_env())
    board = json.loads(shown.stdout)["leaderboard"]
    implied = table.assign(v=[value_at(x, int(b)) for x, b in zip(table["space_x"], table["budget_reached"], strict=True)])
    implied = implied.sort_values(["rung", "v"], ascending=[False, True], kind="stable")
    assert [row["trial"] for row in board] == list(implied.index[:5])
