"""Losing a machine mid-search (ray.cluster_utils): its segments are requeued from their
checkpoints on the other nodes, every trial finishes, every result equals the deterministic
objective's value (objectives_run.value_at) and none is recorded twice."""

from __future__ import annotations

import sys
import threading
import time
from pathlib import Path

import pandas as pd
import pytest

RUN = Path(__file__).resolve().parents[1] / "run"
sys.path.insert(0, str(RUN))

from objectives_run import value_at  # noqa: E402
from runhelpers import _worker_path, spec_text  # noqa: E402

from rungway.scheduler.head.driver import HealthSettings, SearchDriver  # noqa: E402
from rungway.scheduler.head.executor import RayExecutor  # noqa: E402
from rungway.scheduler.spec import parse_spec  # noqa: E402
from rungway.scheduler.testing import kill_ray_node  # noqa: E402

pytestmark = [pytest.mark.ray, pytest.mark.slow]


def _age(path: Path) -> float:
    try:
        return time.time() - path.stat().st_mtime
    except FileNotFoundError:  # the segment just ended
        return float("inf")


def check_exact(driver: SearchDriver, trials: int) -> pd.DataFrame:
    frame = driver.files.read_measurements()
    finals = frame[frame["final"]]
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    table = driver.files.read_trials().set_index("trial")
    assert len(table) == trials
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    return finals


def test_removing_a_node_while_segments_run_on_it_loses_nothing(tmp_path: Path, monkeypatch) -> None:
    import ray
    from ray.cluster_utils import Cluster

    _worker_path()
    # Long enough that the node is never idle, and that a segment running on it when it is
    # removed cannot finish before its worker process goes down with the node.
    monkeypatch.setenv("RUNGWAY_TEST_SLEEP", "0.8")
    marks = tmp_path / "running"  # a file per segment running now, named after its node
    marks.mkdir()
    monkeypatch.setenv("RUNGWAY_TEST_MARKS", str(marks))  # before the nodes start: workers inherit it
    if ray.is_initialized():
        ray.shutdown()
    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 1, "include_dashboard": False})
    doomed = cluster.add_node(num_cpus=2)
    cluster.add_node(num_cpus=1)
    try:
        ray.init(address=cluster.address, logging_level="ERROR")
        cluster.wait_for_nodes()
        text = spec_text("node-loss", objective="objectives_run:sleepy_marked", trials=24)
        driver = SearchDriver(parse_spec(text), text, str(tmp_path), RayExecutor(),
                              health=HealthSettings(check_every=0.5, beat_timeout=6.0))
        doomed_id = doomed.node_id
        removed = threading.Event()
        lost_before = []

        def remove_when_busy() -> None:
            # Kill the 2-CPU node once the search is well under way and a segment is running
            # on it right now (its objective's mark file says so).
            deadline = time.monotonic() + 240  # bounded; a loaded machine is slow to start Ray workers
            while time.monotonic() < deadline:
                # A mark under 0.4 s old: that segment has at least 0.4 s of its 0.8 s to go.
                fresh = [p for p in marks.iterdir() if p.name.startswith(doomed_id) and _age(p) < 0.4]
                if driver.segments >= 6 and fresh:
                    lost_before.append(len(driver.running))
                    kill_ray_node(cluster, doomed)
                    removed.set()
                    return
                time.sleep(0.01)

        killer = threading.Thread(target=remove_when_busy, daemon=True)
        killer.start()
        report = driver.run()
        killer.join(timeout=5)
        assert removed.is_set(), "the node never had a segment running on it"
        assert report.finished
        finals = check_exact(driver, 24)
        assert driver.lost_segments >= 1  # the dead node's segments were requeued and ran again
        assert len({n.split("/")[1] for n in finals["node"]}) >= 2
        assert all(t.state in ("parked", "done") for t in driver.core.trials())
    finally:
        ray.shutdown()
        cluster.shutdown()
