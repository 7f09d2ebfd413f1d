"""Two teams on one real Ray cluster (two nodes) through the lab's head: borrowing, preemption at
checkpoints, resumption, and a ledger whose rows carry both figures: the CPU time the
segments used and their reservations, which agree with the measured segment times.

Team alpha (guarantee 1 CPU, no cap) borrows the whole 4-CPU cluster; team beta (guarantee
2) then submits. Beta must be handed its guarantee within one preemption deadline (plus one
scheduling round), alpha's preempted segments must save, yield and later resume from their
checkpoints, and at the end every trial has exactly one result per rung it reached.
"""

from __future__ import annotations

import sys
import threading
import time
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "run"))
from runhelpers import _worker_path, spec_text  # noqa: E402

from rungway.scheduler.service.auth import hash_token  # noqa: E402
from rungway.scheduler.service.config import parse_lab_config  # noqa: E402
from rungway.scheduler.service.ledger import Ledger  # noqa: E402
from rungway.scheduler.store import Store  # noqa: E402

pytestmark = pytest.mark.ray

DEADLINE = 4.0


def wait_for(condition, timeout: float, what: str) -> float:
    start = time.monotonic()
    while not condition():
        if time.monotonic() - start > timeout:
            raise AssertionError(f"timed out after {timeout:.0f}s waiting for {what}")
        time.sleep(0.02)
    return time.monotonic()


def test_a_team_below_its_guarantee_gets_it_back_by_preemption(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import ray

    from rungway.scheduler.head.executor import RayPool
    from rungway.scheduler.service.lab import LabHead

    _worker_path()
    monkeypatch.setenv("RUNGWAY_TEST_SLEEP", "0.5")
    from ray.cluster_utils import Cluster

    if ray.is_initialized():
        ray.shutdown()
    # A cluster of two 2-CPU nodes (ray.cluster_utils), the head's own and one more.
    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 2, "include_dashboard": False})
    cluster.add_node(num_cpus=2)
    ray.init(address=cluster.address, logging_level="ERROR")
    cluster.wait_for_nodes()
    config = parse_lab_config(f"""
[head]
store = "{tmp_path / 'store'}"
round_seconds = 0.02
preempt_deadline = {DEADLINE}

[[team]]
name = "alpha"
guarantee_cpus = 1
tokens = ["{hash_token('rgw_a', iterations=1000)}"]

[[team]]
name = "beta"
guarantee_cpus = 2
cap_cpus = 4
tokens = ["{hash_token('rgw_b', iterations=1000)}"]
""", str(tmp_path / "lab.toml"))
    head = LabHead(config, RayPool())
    try:
        head.start()
        head.submit("alpha", spec_text("alpha-wide", objective="objectives_run:yielding_slow", trials=16, min_budget=4, max_budget=36))
        wait_for(lambda: head.search("alpha-wide").running_segments == 4, 120, "alpha to borrow all 4 CPUs")
        submitted = time.monotonic()
        head.submit("beta", spec_text("beta-late", objective="objectives_run:yielding_slow", trials=6, min_budget=4, max_budget=36))
        got = wait_for(lambda: head.search("beta-late").running_segments >= 2, 60, "beta's guarantee")
        # Within one deadline, plus a round and the head's loop on 2 busy cores.
        assert got - submitted <= DEADLINE + 2.0, f"beta waited {got - submitted:.1f}s for its guarantee"
        stats = head.sharing.statistics()["teams"]
        assert stats["beta"]["running_cpus"] >= 2 and stats["alpha"]["running_cpus"] <= 2

        wait_for(lambda: all(head.search(n).state == "finished" for n in ("alpha-wide", "beta-late")), 300,
                 "both searches to finish")
    finally:
        head.stop()
        ray.shutdown()
        cluster.shutdown()

    ledger = Ledger(config.store_root).read()
    preempted = ledger[(ledger["search"] == "alpha-wide") & ledger["preempted"]]
    assert len(preempted) >= 1, "nothing of alpha's was preempted"
    # A preempted segment yields at its next checkpoint, is stopped at its deadline (lost,
    # requeued) or had finished its rung before it noticed.
    assert set(preempted["outcome"]) <= {"yielded", "lost", "result"}
    assert (preempted["outcome"] == "yielded").any(), "no preempted segment saved and yielded"

    for name in ("alpha-wide", "beta-late"):
        frame = Store(config.store_root).search(name).read_measurements()
        finals = frame[frame["final"] & (frame["metric"] == "loss")]
        assert not finals.duplicated(["trial", "rung"]).any(), f"{name}: a rung result was stored twice"
        trials = finals.groupby("trial")["rung"].max()
        if name == "alpha-wide":  # it borrowed all 4 CPUs: both nodes' slots
            assert finals["node"].str.rsplit("/", n=1).str[1].nunique() == 2, "alpha did not run on both nodes"
        assert len(trials) == (16 if name == "alpha-wide" else 6), f"{name}: a trial has no result"
        # The ledger's reservations cover the segment times the measurements record (a segment
        # holds its CPU until its last write, which comes after its rows' end time), and are
        # cpus x (ended - started) exactly.
        rows = ledger[(ledger["search"] == name) & (ledger["outcome"] == "result")]
        assert len(rows) == len(finals.drop_duplicates(["trial", "attempt"]))
        merged = rows.merge(finals.drop_duplicates(["trial", "attempt"]), on=["trial", "attempt"])
        measured = (merged["ended_at"] - merged["started_at"]).dt.total_seconds()
        assert (merged["reserved_cpu_seconds"] - merged["cpus"] * measured).min() > -0.01
        assert (merged["reserved_cpu_seconds"] - merged["cpus"] * (merged["ended"] - merged["started"])).abs().max() < 1e-6
        # CPU time, as the workers measured it: known for every segment that answered, and far
        # less than the reservation for an objective that mostly sleeps.
        mine = ledger[ledger["search"] == name]
        answered = mine[mine["outcome"].isin(["result", "yielded"])]
        assert answered["cpu_seconds"].notna().all() and (answered["cpu_seconds"] > 0).all()
        assert mine["cpu_seconds"].sum() < mine["reserved_cpu_seconds"].sum()

    # Resumed from checkpoints: after a yield, the trial's next attempt starts past the
    # budget its yielded attempt had saved, instead of from its rung's start.
    frame = Store(config.store_root).search("alpha-wide").read_measurements()
    resumed = 0
    for row in preempted[preempted["outcome"] == "yielded"].itertuples():
        mine = frame[frame["trial"] == row.trial]
        saved = mine[mine["attempt"] == row.attempt]["budget"].max()
        later = mine[mine["attempt"] > row.attempt]
        if len(later) and saved == saved:  # reported something before yielding
            assert later["budget"].min() == saved + 1, (row.trial, saved, sorted(later["budget"]))
            resumed += 1
    assert resumed >= 1
    assert threading.active_count() < 50
