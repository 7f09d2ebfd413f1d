"""No segment holds a Ray task in a blocking call to the head (issue #11).

A Ray task blocked in ``ray.get`` (or in ``ray.wait`` on its main thread) hands its CPU back to
Ray, which then starts a queued task, in a new worker process if none is idle: more segments
than CPUs run at once and the worker processes pile up. Here a local Ray with 2 CPUs runs
searches with at least four times as many segments submitted as CPUs, and the objective
(``objectives_run.counted``) counts, from inside, the segments running at the same time and
the processes that ran one. The limit on processes is measured, not assumed: plain Ray tasks
of the same shape, in the same Ray, give the baseline.
"""

from __future__ import annotations

import os
import shutil
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from runhelpers import _worker_path, spec_text

from rungway.scheduler.head.driver import SearchDriver
from rungway.scheduler.head.executor import RayExecutor
from rungway.scheduler.spec import parse_spec

pytestmark = pytest.mark.ray

CPUS = 2
PREFETCH = 3.0  # the driver keeps CPUS + PREFETCH * CPUS = 4 * CPUS segments submitted


@pytest.fixture(scope="module")
def counting_ray(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A local Ray with ``CPUS`` CPUs whose workers know the counting folder (they inherit the
    environment of ``ray.init``, so it is set before)."""
    import ray

    folder = tmp_path_factory.mktemp("count")
    saved = {k: os.environ.get(k) for k in ("RUNGWAY_TEST_COUNT", "RUNGWAY_TEST_MEET", "RUNGWAY_TEST_SLEEP")}
    os.environ.update(RUNGWAY_TEST_COUNT=str(folder), RUNGWAY_TEST_MEET=str(CPUS), RUNGWAY_TEST_SLEEP="0.02")
    _worker_path()
    if ray.is_initialized():
        ray.shutdown()
    ray.init(address="local", num_cpus=CPUS, include_dashboard=False, logging_level="ERROR")
    try:
        yield folder
    finally:
        ray.shutdown()
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


def _reset(folder: Path) -> None:
    for name in ("running", "pids"):
        shutil.rmtree(folder / name, ignore_errors=True)
        (folder / name).mkdir()
    for name in ("counts", "met"):
        (folder / name).unlink(missing_ok=True)


def _observed(folder: Path) -> tuple[int, set[str]]:
    """(most segments seen running at once, processes that ran a segment)."""
    counts = [int(line.split()[1]) for line in (folder / "counts").read_text().splitlines()]
    assert counts, "the objective never ran"
    assert not list((folder / "running").iterdir()), "a segment is still marked running"
    return max(counts), {p.name for p in (folder / "pids").iterdir()}


def _baseline_processes() -> int:
    """Worker processes plain Ray needs for as many queued 1-CPU tasks (the same shape as the
    segments: short, a sleep, never a call to anything) on this Ray."""
    import ray

    @ray.remote(num_cpus=1, max_retries=0)
    def step() -> int:
        time.sleep(0.02)
        return os.getpid()

    pids = set()
    for _ in range(4):
        pids |= set(ray.get([step.remote() for _ in range(4 * CPUS)]))
    return len(pids)


def _executor(relay: str) -> RayExecutor:
    """A head's executor whose relay answers at once ("prompt") or late ("busy", as a loaded
    head's does: the case where a blocked segment held its task the longest)."""
    if relay == "prompt":
        return RayExecutor()
    from objectives_run import BusyRelay

    name = f"rungway-relay-busy-{uuid.uuid4().hex[:12]}"
    executor = RayExecutor(relay=BusyRelay.options(name=name).remote())
    executor.pool.relay_name = name  # segments find the relay by name
    return executor


# A segment that never hears its verdict, or a search that never ends, fails the test instead of hanging it.
GUARDS = 'hang_timeout = 400\ndeadline = "15m"\n'


def _run(text: str, root: Path, relay: str) -> SearchDriver:
    driver = SearchDriver(parse_spec(text), text, str(root), _executor(relay), prefetch=PREFETCH)
    assert driver._slots() >= 4 * CPUS  # what "many more ready segments than CPUs" means here
    report = driver.run()
    assert report.finished
    return driver


@pytest.mark.parametrize("relay", ["prompt", "busy"])
def test_yield_checks_every_unit_never_run_more_segments_than_cpus(counting_ray: Path, tmp_path: Path, relay: str) -> None:
    baseline = _baseline_processes()
    _reset(counting_ray)
    driver = _run(spec_text("width", objective="objectives_run:counted", trials=24, min_budget=2, max_budget=18,
                            extra=GUARDS), tmp_path, relay)
    most, pids = _observed(counting_ray)
    assert most == CPUS, f"{most} segments ran at once on {CPUS} CPUs"
    assert len(pids) <= baseline, f"segments ran in {len(pids)} processes; plain Ray tasks needed {baseline}"
    states = {t.state for t in driver.core.trials()}
    assert states <= {"done", "culled", "parked"} and "done" in states, states
    frame = driver.files.read_measurements()
    assert (frame[frame["final"]]["rung"] > 0).any()  # promotions happened: segments resumed


@pytest.mark.parametrize("relay", ["prompt", "busy"])
def test_the_stopping_form_gets_its_verdicts_without_oversubscribing(counting_ray: Path, tmp_path: Path, relay: str) -> None:
    """``asha-stopping``: each rung result waits for the head's verdict inside the segment.
    The verdicts arrive (every trial ends done or culled, and each worker obeyed its own:
    a culled trial measured nothing past the rung it was culled at, a done one reached the
    top), and the waiting holds no CPU back from Ray."""
    baseline = _baseline_processes()
    _reset(counting_ray)
    driver = _run(spec_text("verdicts", objective="objectives_run:counted", mode="asha-stopping", trials=16,
                            min_budget=1, max_budget=9, extra=GUARDS), tmp_path, relay)
    most, pids = _observed(counting_ray)
    assert most == CPUS, f"{most} segments ran at once on {CPUS} CPUs"
    assert len(pids) <= baseline, f"segments ran in {len(pids)} processes; plain Ray tasks needed {baseline}"

    trials = driver.core.trials()
    assert len(trials) == 16
    states = [t.state for t in trials]
    # The stopping rule (docs/scheduling.md) lets the first result at each rung go on and
    # culls the worst of three: both outcomes occur among 16 trials on rungs 1, 3, 9.
    assert set(states) == {"done", "culled"}, states
    frame = driver.files.read_measurements()
    frame = frame[frame["metric"] == "loss"]
    rungs = (1, 3, 9)
    for t in trials:
        mine = frame[frame["trial"] == t.id]
        reached = mine["budget"].max()
        finals = mine[mine["final"]]
        assert not finals.duplicated(["rung"]).any(), (t, finals)
        if t.state == "done":
            assert reached == 9 and sorted(finals["rung"]) == [0, 1, 2], (t, sorted(mine["budget"]))
        else:  # culled at the last rung it has a result for, and stopped right there
            culled_at = int(finals["rung"].max())
            assert reached == rungs[culled_at], (t, culled_at, sorted(mine["budget"]))
