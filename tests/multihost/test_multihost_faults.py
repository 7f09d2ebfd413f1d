"""Hosts failing under a running search, on the three-host lab that deploy/ brings up: every
process of one host killed, and one host's link cut for a while and restored. The search
completes with nothing lost and nothing counted twice (values equal objectives_run.value_at)."""

from __future__ import annotations

import json
import time

import pytest
from objectives_run import value_at

pytestmark = [pytest.mark.ray, pytest.mark.slow]


def wait_until_running_on(lab, name: str, host: str, timeout: float = 120) -> None:
    """Until a measurement from ``host`` is in the store (a bounded wait, not a timing check)."""
    from rungway.scheduler.store import Store

    files = Store(str(lab.store)).search(name)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        frame = files.read_measurements()
        if not frame.empty and any(node.split("/")[0] == host for node in frame["node"]):
            return
        time.sleep(0.5)
    raise AssertionError(f"no segment of {name} ran on {host} within {timeout}s")


def check_search(lab, name: str, trials: int) -> None:
    from rungway.scheduler.store import Store

    files = Store(str(lab.store)).search(name)
    table = files.read_trials().set_index("trial")
    assert set(table.index) == set(range(trials))
    frame = files.read_measurements()
    finals = frame[frame["final"]]
    assert not finals.duplicated(["trial", "rung", "metric"]).any(), "a rung result was recorded twice"
    for row in finals.itertuples():
        assert row.value == pytest.approx(value_at(table.loc[row.trial, "space_x"], int(row.budget)), abs=1e-12)
    rungs = finals.groupby("trial")["rung"].apply(sorted)
    for tid, row in table.iterrows():
        assert rungs[tid] == list(range(int(row["rung"]) + 1)), f"trial {tid} is missing a rung result"


def test_killing_every_process_of_a_host_loses_nothing(lab_cluster) -> None:
    lab = lab_cluster
    spec = lab.write_spec("lab-kill", objective="objectives_run:sleepy", trials=24)
    search = lab.start_search(spec, "--json")
    try:
        wait_until_running_on(lab, "lab-kill", "h3")
        killed = lab.hosts.kill_host(3)
        assert killed, "host 3 had no processes to kill"
        stdout, stderr = search.communicate(timeout=600)
    finally:
        if search.poll() is None:
            search.kill()
    assert search.returncode == 0, stderr[-3000:]
    summary = json.loads(stdout)
    assert summary["finished"] is True
    check_search(lab, "lab-kill", 24)
    # Bring host 3 back the way an admin would, for the tests after this one.
    lab.deploy("join-ray-worker.sh", 3, "--background")
    lab.wait_for_node(lab.hosts.address(3), alive=True)


def test_cutting_a_hosts_link_for_a_while_loses_nothing(lab_cluster) -> None:
    lab = lab_cluster
    lab.wait_for_nodes(3)
    spec = lab.write_spec("lab-cut", objective="objectives_run:sleepy", trials=24)
    search = lab.start_search(spec, "--json")
    try:
        wait_until_running_on(lab, "lab-cut", "h2")
        lab.hosts.cut_link(2)
        time.sleep(20)  # long enough for the head to give up on host 2's segments
        lab.hosts.restore_link(2)
        stdout, stderr = search.communicate(timeout=600)
    finally:
        lab.hosts.restore_link(2)
        if search.poll() is None:
            search.kill()
    assert search.returncode == 0, stderr[-3000:]
    assert json.loads(stdout)["finished"] is True
    check_search(lab, "lab-cut", 24)
