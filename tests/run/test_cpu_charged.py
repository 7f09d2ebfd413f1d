"""What a segment is charged is the CPU time its objective used: its threads and the child
processes it waited for, not the worker's own threads (workers/cpu.py).

The reference is what the operating system says the objective used, read by the objective
itself (``objectives_run.burns_cpu``): ``time.thread_time`` in each of its two threads and
``resource.getrusage(RUSAGE_CHILDREN)`` around the child process it runs. CPU time, unlike
wall time, does not grow when the machine is loaded, so the bounds hold on a busy machine;
they are generous anyway: the runner's own work in a segment (loading the objective, writing
the measurements: tens of milliseconds) is charged on top of the reference, a worker
process's start-up on top of its first segment, and a child's CPU is read in clock ticks
(10 ms).
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from objectives_run import BURN_CHILD, BURN_MAIN, BURN_THREAD
from runhelpers import spec_text

from rungway.workers.cpu import CpuMeter, ProcessCpu
from rungway.workers.runner import SegmentOrder

BURNED = BURN_MAIN + BURN_THREAD + BURN_CHILD
RUNNER = 0.5  # the runner's own CPU in a segment of a warm worker, at most (generous)


def _burn(seconds: float) -> None:
    began = time.thread_time()
    while time.thread_time() - began < seconds:
        pass


def test_the_meter_counts_the_objectives_threads_and_children_and_not_the_workers_own() -> None:
    stop = threading.Event()

    def workers_own() -> None:  # started before any segment: the worker's (Ray's, say)
        while not stop.is_set():
            _burn(0.005)

    own = threading.Thread(target=workers_own, daemon=True)
    own.start()
    try:
        process = ProcessCpu()
        CpuMeter(process=process).seconds()  # the first segment sees the threads there are
        meter = CpuMeter(process=process)
        spent: dict[str, float] = {}

        def objectives() -> None:
            _burn(0.3)
            spent["thread"] = time.thread_time()

        mine = threading.Thread(target=objectives)
        mine.start()
        subprocess.run([sys.executable, "-c", "import time\nb = time.process_time()\n"
                        "while time.process_time() - b < 0.4: pass\n"], check=True)
        _burn(0.2)
        mine.join()
        charged = meter.seconds()
        # 0.3 + 0.4 (and the child interpreter's start) + 0.2; the worker's own thread burnt
        # about as much again meanwhile, none of it charged.
        assert 0.9 - 0.05 <= charged <= 0.9 + 0.5, charged
        # A child still running when the segment ends is counted up to then.
        meter = CpuMeter(process=process)
        child = subprocess.Popen([sys.executable, "-c", "import time\nb = time.process_time()\n"
                                  "while time.process_time() - b < 0.3: pass\ntime.sleep(60)\n"])
        try:
            deadline = time.monotonic() + 60
            while meter.seconds() < 0.3 and time.monotonic() < deadline:
                time.sleep(0.05)
            assert 0.3 <= meter.seconds() <= 0.3 + 0.5
        finally:
            child.kill()
            child.wait()
    finally:
        stop.set()
        own.join()


def test_a_workers_first_segment_is_charged_its_start_up() -> None:
    process = ProcessCpu()
    first = CpuMeter(startup=True, process=process)
    assert first.startup_seconds == pytest.approx(time.process_time(), abs=0.05)  # this process's CPU so far
    assert first.seconds() >= first.startup_seconds
    assert CpuMeter(startup=True, process=process).startup_seconds == 0.0  # once per process


def _order(root: Path, trial: int) -> SegmentOrder:
    return SegmentOrder(store_root=str(root), search="burn", objective="objectives_run:burns_cpu", metric="loss",
                        trial=trial, attempt=0, rung=0, start_budget=0, target_budget=1, milestones=(1,),
                        config={"x": 0.4})


@pytest.mark.ray
def test_a_ray_segment_is_charged_the_cpu_its_threads_and_child_used(local_ray, tmp_path: Path) -> None:
    import ray

    from rungway.workers.ray_task import segment_task

    seen: set[float] = set()
    warm = 0
    for trial in range(5):  # one after the other: Ray runs most of them in a worker it has already started
        summary = ray.get(segment_task.remote(_order(tmp_path, trial)))
        assert summary.outcome == "result", summary
        reference = summary.metrics["reference_cpu"]
        assert reference >= BURNED - 0.05 and summary.metrics["child_cpu"] >= BURN_CHILD
        charged = summary.cpu_seconds - summary.startup_cpu_seconds
        # Everything the OS says the objective used is charged (the thread's and the child's too)...
        assert charged >= reference - 0.05, (charged, reference)
        pid = summary.metrics["pid"]
        if pid in seen:  # ...and in a worker that ran a segment before, little more than that
            warm += 1
            assert summary.startup_cpu_seconds == 0.0
            assert charged <= reference + RUNNER, (charged, reference)
        else:  # a worker's first segment: its start-up too, and the first import of the store's code
            seen.add(pid)
            assert summary.startup_cpu_seconds > 0
            assert charged <= reference + 10 * RUNNER, (charged, reference)
    assert warm >= 1


@pytest.mark.ray
def test_the_head_charges_what_the_workers_measured(local_ray, tmp_path: Path) -> None:
    from rungway.scheduler.head.driver import SearchDriver
    from rungway.scheduler.head.executor import RayExecutor
    from rungway.scheduler.spec import parse_spec

    text = spec_text("burn-search", objective="objectives_run:burns_cpu", mode="full-budget", trials=4,
                     min_budget=1, max_budget=1)
    executor = RayExecutor()
    try:
        driver = SearchDriver(parse_spec(text), text, str(tmp_path), executor)
        report = driver.run()
    finally:
        executor.close()
    assert report.finished and report.segments == 4
    frame = driver.files.read_measurements()
    reference = frame[frame["final"] & (frame["metric"] == "reference_cpu")]["value"].sum()
    workers = frame[frame["final"] & (frame["metric"] == "pid")]["value"].nunique()
    assert driver.cpu_seconds >= reference - 4 * 0.05
    assert driver.cpu_seconds <= reference + 4 * RUNNER + workers * 10 * RUNNER
    # The reservation (CPUs x wall time) is kept beside it.
    assert 0 < driver.reserved_seconds
    assert report.statistics["reserved_cpu_seconds"] == driver.reserved_seconds
    assert os.path.isdir(tmp_path / "searches" / "burn-search")
