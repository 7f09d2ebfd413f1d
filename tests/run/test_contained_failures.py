"""Issue #10, "contain every failure": a worker that dies is the trial's crash unless its node
died; a trial lost too often fails; a search that can only fail stops and says so.

Outside source: what Ray 2.60 (the installed version) reports, read in
.venv/lib/python3.11/site-packages/ray (exceptions.py, _private/serialization.py) and seen on
this machine: a task whose worker process exits, is killed by a signal or raises SystemExit
fails with ``WorkerCrashedError`` (no exit code carried), KeyboardInterrupt with
``TaskCancelledError``, and a task on a node that dies fails with ``NodeDiedError`` at once,
while ``ray.nodes()`` marks the node dead only after its missed health checks (about 15 s).
The rest checks our own rules (docs/spec-files.md, ``[limits]``; docs/reliability.md).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import pytest
from runhelpers import spec_text

from rungway.scheduler.head.driver import SearchDriver
from rungway.scheduler.head.executor import Completion, InlineExecutor, RayExecutor, RayPool, classify_ray_error
from rungway.scheduler.spec import parse_spec
from rungway.workers.runner import SegmentOrder, describe_error

# ---- what Ray's exceptions are taken for ------------------------------------------------------


def test_dead_workers_dead_nodes_and_our_own_bugs_are_told_apart() -> None:
    import ray.exceptions as rx

    assert classify_ray_error(rx.WorkerCrashedError())[0] == "died"
    assert classify_ray_error(rx.TaskCancelledError())[0] == "died"
    kind, reason = classify_ray_error(rx.OutOfMemoryError("Task was killed due to the node running low on memory."))
    assert kind == "died" and "memory monitor" in reason and "running low on memory" in reason
    kind, reason = classify_ray_error(rx.NodeDiedError("Task failed because the node it was running on is dead"))
    assert kind == "lost" and reason.startswith("NodeDiedError: Task failed because the node")
    assert classify_ray_error(rx.LocalRayletDiedError())[0] == "lost"
    assert classify_ray_error(rx.OwnerDiedError("00ff", "owner", "call site"))[0] == "lost"
    assert classify_ray_error(RuntimeError("a bug in rungway's task"))[0] == "crashed"


def test_the_runner_says_what_the_exit_code_was() -> None:
    # Python's own rules (docs.python.org, "SystemExit"): code None is exit status 0, an
    # integer is the status, anything else is printed and the status is 1.
    assert describe_error(SystemExit(3)) == "SystemExit: the objective exited with exit code 3"
    assert describe_error(SystemExit()) == "SystemExit: the objective exited with exit code 0"
    assert describe_error(SystemExit("bye")) == "SystemExit: the objective exited with exit code 1: bye"
    assert describe_error(KeyboardInterrupt()) == "KeyboardInterrupt: the objective raised KeyboardInterrupt"
    assert describe_error(ValueError("x")) == "ValueError: x"


class _FakeRay:
    """Stands in for the ``ray`` module under a :class:`RayPool`: each ref fails with the
    exception given for it; ``ray.nodes()`` answers from ``alive``."""

    def __init__(self, errors: dict[str, BaseException], alive: dict[str, bool] | None) -> None:
        self.errors, self.alive = errors, alive
        self.node_calls = 0

    def wait(self, refs: list[str], num_returns: int = 1, timeout: float | None = None) -> tuple[list[str], list[str]]:
        return list(refs), []

    def get(self, ref: Any) -> Any:
        if isinstance(ref, list):
            raise self.errors[ref[0]]
        raise self.errors[ref]

    def nodes(self) -> list[dict[str, Any]]:
        self.node_calls += 1
        if self.alive is None:
            raise ConnectionError("the control store does not answer")
        return [{"NodeID": node, "Alive": up} for node, up in self.alive.items()]


def _poll(errors: dict[str, BaseException], nodes: dict[str, str], alive: dict[str, bool] | None,
          known_dead: set[str] = frozenset()) -> dict[int, Completion]:  # type: ignore[assignment]
    pool = RayPool(relay=object())
    fake = _FakeRay(errors, alive)
    pool._ray = fake
    pool._dead = set(known_dead)
    lane = pool.lane("s")
    for trial, ref in enumerate(errors):
        pool._refs[ref] = ("s", trial, 1)
        pool._by_key[("s", trial, 1)] = ref
        if ref in nodes:
            pool._nodes[("s", trial, 1)] = nodes[ref]
    assert pool.poll(0.0) == len(errors)
    assert fake.node_calls <= 1  # the control store is asked once per poll, not per segment
    return {c.trial: c for c in lane.inbox}


def test_a_dead_worker_on_a_live_node_is_a_crash_and_on_a_dead_node_a_loss() -> None:
    import ray.exceptions as rx

    done = _poll(
        {"on-live": rx.WorkerCrashedError(), "on-dead": rx.WorkerCrashedError(), "oom": rx.OutOfMemoryError("low"),
         "node-died": rx.NodeDiedError("gone")},
        nodes={"on-live": "n1", "on-dead": "n2", "oom": "n1", "node-died": "n1"},
        alive={"n1": True, "n2": False},
    )
    assert done[0].crashed and done[0].error_type == "WorkerCrashedError" and done[0].node == "n1"
    assert done[0].lost is None
    assert done[1].lost and "node n2 died" in done[1].lost and done[1].crashed is None
    assert done[2].crashed and done[2].error_type == "OutOfMemoryError"
    assert done[3].lost and done[3].lost.startswith("NodeDiedError")  # Ray's word: no need to ask


def test_a_dead_worker_whose_node_is_unknown_is_lost_only_if_a_node_died_since_the_last_look() -> None:
    import ray.exceptions as rx

    # n2 was already known dead: nothing new died, so the worker's death is the trial's.
    done = _poll({"r": rx.WorkerCrashedError()}, nodes={}, alive={"n1": True, "n2": False}, known_dead={"n2"})
    assert done[0].crashed and done[0].lost is None
    # n3 died since: the segment may have run there; the benefit of the doubt goes to the trial.
    done = _poll({"r": rx.WorkerCrashedError()}, nodes={}, alive={"n1": True, "n2": False, "n3": False},
                 known_dead={"n2"})
    assert done[0].lost and done[0].crashed is None


def test_a_dead_worker_is_lost_when_ray_cannot_say_whether_its_node_lives() -> None:
    import ray.exceptions as rx

    done = _poll({"r": rx.WorkerCrashedError(), "s": rx.WorkerCrashedError()}, nodes={"r": "n1"}, alive=None)
    assert done[0].lost and done[0].lost.startswith("Ray did not say whether node n1 lives")
    assert done[1].lost and done[1].crashed is None


def test_the_pool_learns_each_segments_node_from_its_heartbeats() -> None:
    class _Relay:
        class drain:  # noqa: N801 - stands in for an actor method
            @staticmethod
            def remote() -> str:
                return "drain-ref"

    pool = RayPool(relay=_Relay())
    beats = {"milestones": [], "beats": {("s", 0, 1): (2, "node-a"), ("s", 5, 1): (1, "node-b")}}
    pool._ray = type("R", (), {"wait": staticmethod(lambda refs, timeout=0: (refs, [])),
                                "get": staticmethod(lambda ref: beats)})()
    pool.lane("s")
    pool._refs["ref0"] = ("s", 0, 1)
    pool._by_key[("s", 0, 1)] = "ref0"
    pool.drain_link()  # asks for the first drain
    pool._drained_at = float("-inf")  # the next call may drain at once (its rate limit is not tested here)
    pool.drain_link()
    assert pool._nodes == {("s", 0, 1): "node-a"}  # trial 5 runs no segment of this pool: not kept


# ---- the head without Ray ---------------------------------------------------------------------


class _LosingExecutor(InlineExecutor):
    """Every segment's machine dies under it."""

    def submit(self, order: SegmentOrder, cpus: float, memory_mb: int) -> None:
        self.submitted.append(order)
        self._done.append(Completion(order.trial, order.attempt, lost="NodeDiedError: gone", node="n9"))


def test_a_trial_lost_more_than_max_losses_times_fails_with_one_record(tmp_path: Path) -> None:
    text = spec_text("losing", objective="objectives_run:plain", trials=2, extra="max_losses = 2")
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), _LosingExecutor())
    report = driver.run()
    assert report.failing == "every trial failed (2 of 2)" and not report.finished
    for trial in driver.core.trials():
        assert (trial.state, trial.losses, trial.crashes, trial.attempt) == ("failed", 3, 0, 3)
    assert driver.lost_segments == 6
    failures = driver.files.read_failures()
    assert sorted(zip(failures["trial"], failures["attempt"], strict=True)) == [(0, 3), (1, 3)]
    assert (failures["error_type"] == "Lost").all()
    assert failures["message"].str.startswith("lost 3 times; the last time: NodeDiedError: gone").all()
    assert report.first_failure is not None and "Lost: lost 3 times" in report.first_failure


def test_losses_the_head_causes_itself_are_not_counted(tmp_path: Path) -> None:
    text = spec_text("stopped", objective="objectives_run:plain", trials=3, extra="max_losses = 0")
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor())
    driver.begin()
    driver.step()  # segments submitted; their answers wait in the executor
    assert driver.running
    report = driver.end()  # the head stops: what runs is requeued, as after Ctrl-C
    assert report.failing is None
    assert all(t.losses == 0 and t.state == "queued" for t in driver.core.trials())
    again = SearchDriver(parse_spec(text), text, str(tmp_path), InlineExecutor())  # replays the journal
    assert all(t.losses == 0 for t in again.core.trials())
    assert again.run().finished


def test_consecutive_first_rung_failures_stop_the_search_and_a_fixed_objective_runs_on(tmp_path: Path,
                                                                                     monkeypatch) -> None:
    flag = tmp_path / "broken"
    flag.touch()
    monkeypatch.setenv("RUNGWAY_TEST_FLAG", str(flag))
    text = spec_text("streak", objective="objectives_dying:fails_while_flagged", trials=40,
                     extra="max_consecutive_failures = 3")
    driver = SearchDriver(parse_spec(text), text, str(tmp_path / "store"), InlineExecutor())
    report = driver.run()
    assert not report.finished
    assert report.failing == "3 trials in a row failed at their first rung (limits.max_consecutive_failures = 3)"
    assert report.first_failure is not None
    assert report.first_failure.endswith("RuntimeError: the flag is up")
    assert len(driver.core) < 40  # it stopped long before its trial limit
    # Fixed between runs: the next run journals ``resume`` and starts segments again...
    flag.unlink()
    again = SearchDriver(parse_spec(text), text, str(tmp_path / "store"), InlineExecutor())
    assert again.core.failing is not None  # restored as it stopped
    again.begin()
    again.step()
    assert again.running  # ...and this head vanishes with them running (its journal as it is;
    # it lets go of the search's lease, if it holds one, as its process ending would).
    if getattr(again, "lease", None) is not None:
        again.lease.release()
    # The next head replays the journal: its segments match the core's decisions only if
    # ``resume`` is replayed before them (a mismatch is a StorageError).
    third = SearchDriver(parse_spec(text), text, str(tmp_path / "store"), InlineExecutor())
    assert third.core.failing is None
    final = third.run()
    assert final.finished and final.failing is None
    assert len(third.core) == 40


# ---- the head on a real Ray --------------------------------------------------------------------

DYING = [
    ("objectives_dying:exits_three", "SystemExit", "SystemExit: the objective exited with exit code 3"),
    ("objectives_dying:exits_at_once", "WorkerCrashedError", "WorkerCrashedError: the worker process died"),
    ("objectives_dying:interrupts", "KeyboardInterrupt", "KeyboardInterrupt: the objective raised KeyboardInterrupt"),
    ("objectives_dying:kills_itself", "WorkerCrashedError", "WorkerCrashedError: the worker process died"),
]


@pytest.mark.ray
@pytest.mark.parametrize(("objective", "error_type", "message"), DYING, ids=[d[0].split(":")[1] for d in DYING])
def test_an_objective_that_ends_its_worker_fails_its_trial_and_the_search_ends(
        local_ray, tmp_path: Path, objective: str, error_type: str, message: str) -> None:
    """4 trials, max_crashes = 1 (runhelpers.spec_text): each trial is tried twice, both
    attempts crash, the trial fails, and with every trial failed the search ends failing."""
    name = objective.split(":")[1].replace("_", "-")
    text = spec_text(name, objective=objective, trials=4)
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), RayExecutor())
    give_up = time.monotonic() + 600  # a guard against the old behaviour (it never ended), not a timing check
    report = driver.run(lambda: time.monotonic() > give_up)
    assert not report.interrupted, "the search never ended"
    assert not report.finished and report.failing == "every trial failed (4 of 4)"
    assert driver.lost_segments == 0  # the node lived: nothing was taken for a lost machine
    for trial in driver.core.trials():
        assert (trial.state, trial.crashes, trial.losses) == ("failed", 2, 0)  # max_crashes + 1 attempts
    failures = driver.files.read_failures()
    keys = list(zip(failures["trial"], failures["attempt"], strict=True))
    assert sorted(keys) == [(t, a) for t in range(4) for a in (1, 2)]  # each failure recorded once
    assert (failures["error_type"] == error_type).all(), failures[["error_type", "message"]]
    assert failures["message"].str.startswith(message).all(), failures["message"].tolist()
    assert report.first_failure is not None and message in report.first_failure


@pytest.mark.ray
def test_a_segment_past_its_memory_limit_fails_its_trial_and_its_worker_lives_on(local_ray, tmp_path: Path) -> None:
    """resources.memory_mb = 300: each attempt of a trial that asks for 2 GB meets the limit
    (workers/ray_task.py), raises MemoryError, and the trial fails after max_crashes + 1."""
    text = spec_text("hog", objective="objectives_dying:hogs_memory", trials=2).replace(
        "[resources]\ncpus = 1", "[resources]\ncpus = 1\nmemory_mb = 300")
    assert "memory_mb = 300" in text
    driver = SearchDriver(parse_spec(text), text, str(tmp_path), RayExecutor())
    give_up = time.monotonic() + 600  # a guard, not a timing check
    report = driver.run(lambda: time.monotonic() > give_up)
    assert report.failing == "every trial failed (2 of 2)"
    assert [(t.state, t.crashes, t.losses) for t in driver.core.trials()] == [("failed", 2, 0)] * 2
    failures = driver.files.read_failures()
    assert len(failures) == 4 and (failures["error_type"] == "MemoryError").all(), failures
    assert failures["message"].str.endswith("the segment went past its memory limit (resources.memory_mb = 300)").all()
