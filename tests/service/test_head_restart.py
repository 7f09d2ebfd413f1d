"""kill -9 of the lab's head service (``rungway head``) while two teams' searches run; the
restarted head finishes both with every rung result stored once, keeps their owners,
priorities and order, and keeps what each team has used. The Ray cluster
(ray.cluster_utils) outlives the head, as it does in a lab."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))
from runhelpers import _worker_path, spec_text  # noqa: E402

from rungway.scheduler.service.auth import hash_token  # noqa: E402
from rungway.scheduler.service.client import LabClient, LabClientError  # noqa: E402

pytestmark = [pytest.mark.ray, pytest.mark.slow]

RUNGWAY = [sys.executable, "-m", "rungway.scheduler.cli.main"]
TOKENS = {"alpha": "rgw_alpha-restart-test-token-0123456789abcdef", "beta": "rgw_beta-restart-test-token-0123456789abcdefg"}


@pytest.fixture(scope="module")
def cluster():
    import ray
    from ray.cluster_utils import Cluster

    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    c = Cluster(initialize_head=True, head_node_args={"num_cpus": 2, "include_dashboard": False})
    c.add_node(num_cpus=1)
    c.wait_for_nodes()
    yield c
    c.shutdown()


def start_head(config: Path, log: Path) -> tuple[subprocess.Popen, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(RUN), env.get("PYTHONPATH", "")])
    env["RUNGWAY_TEST_SLEEP"] = "0.25"
    out = log.open("a")
    proc = subprocess.Popen([*RUNGWAY, "head", "--config", str(config)], stdout=subprocess.PIPE, stderr=out,
                            env=env, text=True)
    assert proc.stdout is not None
    line = proc.stdout.readline()  # the line saying where it listens
    found = re.search(r"listening on (http://\S+)", line)
    assert found, f"the head did not start: {line!r}; see {log}"
    return proc, found.group(1)


def wait_for(condition, timeout: float, what: str) -> None:
    start = time.monotonic()
    while True:
        try:
            if condition():
                return
        except (LabClientError, OSError):
            pass
        if time.monotonic() - start > timeout:
            raise AssertionError(f"timed out after {timeout:.0f}s waiting for {what}")
        time.sleep(0.2)


def test_killed_head_service_restarts_and_finishes_both_teams_searches(cluster, tmp_path: Path) -> None:
    config = tmp_path / "lab.toml"
    config.write_text(f"""
[head]
port = 0
store = "store"
ray_address = "{cluster.address}"
preempt_deadline = 3
round_seconds = 0.02

[[team]]
name = "alpha"
guarantee_cpus = 1
tokens = ["{hash_token(TOKENS['alpha'], iterations=1000)}"]

[[team]]
name = "beta"
guarantee_cpus = 1
tokens = ["{hash_token(TOKENS['beta'], iterations=1000)}"]
""")
    log = tmp_path / "head.log"
    proc, url = start_head(config, log)
    try:
        alpha, beta = LabClient(url, TOKENS["alpha"]), LabClient(url, TOKENS["beta"])
        alpha.submit(spec_text("alpha-run", objective="objectives_run:slow_resumable", trials=12, max_budget=9))
        beta.submit(spec_text("beta-run", objective="objectives_run:slow_resumable", trials=9, max_budget=9), priority=5)
        wait_for(lambda: alpha.search("alpha-run")["segments"] >= 4 and beta.search("beta-run")["segments"] >= 2,
                 180, "both searches to be under way")
        used_before = {t["team"]: t["used_cpu_hours"] for t in LabClient(url, TOKENS["alpha"]).usage("all")["teams"]}
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()

    proc, url = start_head(config, log)
    try:
        alpha, beta = LabClient(url, TOKENS["alpha"]), LabClient(url, TOKENS["beta"])
        shown = beta.search("beta-run")
        assert shown["team"] == "beta" and shown["priority"] == 5
        assert [s["name"] for s in alpha.searches()] == ["alpha-run"]  # a team still sees only its own
        wait_for(lambda: alpha.search("alpha-run")["state"] == "finished" and beta.search("beta-run")["state"] == "finished",
                 300, "both searches to finish after the restart")
        used_after = alpha.usage("all")["teams"][0]["used_cpu_hours"]
        assert used_after >= used_before["alpha"] > 0  # usage survived the kill
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0
    finally:
        if proc.poll() is None:
            proc.kill()

    store = tmp_path / "store"
    for name, trials in (("alpha-run", 12), ("beta-run", 9)):
        frame = pd.read_parquet(store / "searches" / name / "measurements")
        finals = frame[frame["final"] & (frame["metric"] == "loss")]
        assert not finals.duplicated(["trial", "rung"]).any(), f"{name}: a rung result stored twice"
        assert finals["trial"].nunique() == trials, f"{name}: a trial lost its results"
        table = pd.read_parquet(store / "searches" / name / "trials.parquet")
        assert set(table["status"]) <= {"done", "parked"}, f"{name}: {sorted(set(table['status']))}"  # parked: never promoted
