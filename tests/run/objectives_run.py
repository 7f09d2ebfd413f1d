"""Deterministic objectives for the execution tests (imported by Ray workers by path)."""

from __future__ import annotations

import math
import os
import time


def chain(x: float, budget: int) -> float:
    """A value that depends on every unit of budget in order (like training steps do)."""
    state = x
    for step in range(budget):
        state = math.sin(state * 1.7 + step) + 0.01 * step
    return state


def value_at(x: float, budget: int) -> float:
    """What the objective reports at ``budget``: closer to (x - 0.3)^2 as budget grows."""
    return (x - 0.3) ** 2 + chain(x, budget) / (budget + 1)


def resumable(ctx):
    """Resumable: keeps the chain's state in its checkpoint; steps one budget unit at a time."""
    x = ctx.config["x"]
    state = ctx.state if ctx.state is not None else {"value": x, "step": 0}
    assert state["step"] == ctx.start, (state, ctx.start)
    for step in range(ctx.start, ctx.budget):
        state = {"value": math.sin(state["value"] * 1.7 + step) + 0.01 * step, "step": step + 1}
        ctx.save(state, step + 1)
        ctx.report(step + 1, loss=(x - 0.3) ** 2 + state["value"] / (step + 2))
    return {"loss": (x - 0.3) ** 2 + state["value"] / (ctx.budget + 1)}


def plain(config, budget):
    return {"loss": value_at(config["x"], budget)}


def noop(config, budget):
    return 0.0


def sleepy(config, budget):
    time.sleep(float(os.environ.get("RUNGWAY_TEST_SLEEP", "0.2")))
    return {"loss": value_at(config["x"], budget)}


def sleepy_marked(config, budget):
    """``sleepy`` that keeps a file named after its Ray node in ``RUNGWAY_TEST_MARKS`` while it
    runs, so that a test can tell a segment is running on a given node right now."""
    import ray

    mark = os.path.join(os.environ["RUNGWAY_TEST_MARKS"], f"{ray.get_runtime_context().get_node_id()}-{os.getpid()}")
    with open(mark, "w"):
        pass
    try:
        return sleepy(config, budget)
    finally:
        os.remove(mark)


def flaky(config, budget):
    """Raises on the first attempt of every third trial (by x), succeeds otherwise."""
    if int(config["x"] * 1000) % 3 == 0 and budget == 1:
        marker = f"/tmp/rungway-flaky-{int(config['x'] * 1e9)}"
        if not os.path.exists(marker):
            open(marker, "w").close()
            raise RuntimeError("flaky failure")
    return {"loss": value_at(config["x"], budget)}


def always_fails(config, budget):
    raise ValueError("this objective always fails")


def padded(ctx):
    """Like ``resumable``, with checkpoints of about 64 KiB (to fill a small disk)."""
    x = ctx.config["x"]
    state = ctx.state if ctx.state is not None else {"value": x, "step": 0, "pad": b"\0" * 65536}
    for step in range(ctx.start, ctx.budget):
        state = {"value": math.sin(state["value"] * 1.7 + step) + 0.01 * step, "step": step + 1, "pad": state["pad"]}
        ctx.save(state, step + 1)
        ctx.report(step + 1, loss=(x - 0.3) ** 2 + state["value"] / (step + 2))
    return {"loss": (x - 0.3) ** 2 + state["value"] / (ctx.budget + 1)}


def slow_resumable(ctx, honour_yield: bool = False):
    """Resumable, ``RUNGWAY_TEST_SLEEP`` seconds per budget unit, a checkpoint every unit."""
    delay = float(os.environ.get("RUNGWAY_TEST_SLEEP", "0.2"))
    x = ctx.config["x"]
    state = ctx.state if ctx.state is not None else {"value": x, "step": 0}
    for step in range(ctx.start, ctx.budget):
        time.sleep(delay)
        state = {"value": math.sin(state["value"] * 1.7 + step) + 0.01 * step, "step": step + 1}
        ctx.save(state, step + 1)
        ctx.report(step + 1, loss=(x - 0.3) ** 2 + state["value"] / (step + 2))
        if honour_yield and ctx.asked_to_yield:
            return None
    return {"loss": (x - 0.3) ** 2 + state["value"] / (ctx.budget + 1)}


def yielding_slow(ctx):
    """``slow_resumable`` that honours a request to yield after each saved unit (preemption)."""
    return slow_resumable(ctx, honour_yield=True)


def counted(ctx):
    """``resumable`` that watches how many segments run at once, for the oversubscription tests.

    Folder ``RUNGWAY_TEST_COUNT`` holds ``running/`` (a marker per worker process, named by its
    pid, present from the segment's first unit until it returns), ``pids/`` (every process that
    ran a segment) and ``counts`` (one line per unit: the pid and the markers present then).
    Until ``RUNGWAY_TEST_MEET`` segments have been seen running together, a unit waits for them
    (at most five minutes), so that a search of many short segments does reach full width. Every
    unit saves, reports and checks ``ctx.asked_to_yield``.
    """
    folder = os.environ["RUNGWAY_TEST_COUNT"]
    meet = int(os.environ.get("RUNGWAY_TEST_MEET", "2"))
    delay = float(os.environ.get("RUNGWAY_TEST_SLEEP", "0.02"))
    pid = str(os.getpid())
    running = os.path.join(folder, "running")
    mark = os.path.join(running, pid)
    open(os.path.join(folder, "pids", pid), "w").close()
    x = ctx.config["x"]
    state = ctx.state if ctx.state is not None else {"value": x, "step": 0}
    assert state["step"] == ctx.start, (state, ctx.start)
    try:
        for step in range(ctx.start, ctx.budget):
            open(mark, "w").close()
            _count_running(folder, running, pid)
            met = os.path.join(folder, "met")
            give_up = time.monotonic() + 300.0  # a bound for a hung run, not a speed
            while not os.path.exists(met) and time.monotonic() < give_up:
                if len(os.listdir(running)) >= meet:
                    open(met, "w").close()
                else:
                    time.sleep(0.01)
            time.sleep(delay)
            state = {"value": math.sin(state["value"] * 1.7 + step) + 0.01 * step, "step": step + 1}
            ctx.save(state, step + 1)
            ctx.report(step + 1, loss=(x - 0.3) ** 2 + state["value"] / (step + 2))
            _count_running(folder, running, pid)
            if ctx.asked_to_yield:
                return None
            _count_running(folder, running, pid)
        return {"loss": (x - 0.3) ** 2 + state["value"] / (ctx.budget + 1)}
    finally:
        if os.path.exists(mark):
            os.remove(mark)


def _count_running(folder: str, running: str, pid: str) -> None:
    line = f"{pid} {len(os.listdir(running))}\n".encode()
    fd = os.open(os.path.join(folder, "counts"), os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, line)  # one small O_APPEND write: lines of concurrent writers never mix
    finally:
        os.close(fd)


def _busy_relay_class():
    """The head's relay as a loaded head's is: every call a segment makes is answered
    ``BUSY_RELAY_SECONDS`` late (an async actor, so the late answers overlap); the head's own
    calls are answered at once."""
    import asyncio

    import ray

    from rungway.workers.link import Relay

    base = Relay.__ray_actor_class__
    head_side = {"drain", "decide", "ask_to_yield", "forget"}

    def late(name):
        method = getattr(base, name)

        async def call(self, *args, **kwargs):
            await asyncio.sleep(BUSY_RELAY_SECONDS)
            return method(self, *args, **kwargs)

        call.__name__ = name
        return call

    names = [n for n, v in vars(base).items() if callable(v) and not n.startswith("_") and n not in head_side]
    return ray.remote(num_cpus=0, max_restarts=0)(type("BusyRelay", (base,), {n: late(n) for n in names}))


BUSY_RELAY_SECONDS = 1.0
BusyRelay = _busy_relay_class()


BURN_MAIN, BURN_THREAD, BURN_CHILD = 0.3, 0.4, 0.5  # CPU-seconds each part of ``burns_cpu`` burns


def _burn(seconds: float) -> None:
    began = time.thread_time()
    while time.thread_time() - began < seconds:
        pass


def burns_cpu(config, budget):
    """Burns known CPU time in three places, and reports what the OS says each used: its own
    thread (``time.thread_time``), a second thread it starts (the same, read in that thread)
    and a child process it waits for (``RUSAGE_CHILDREN``). ``reference_cpu`` is their sum."""
    import resource
    import subprocess
    import sys
    import threading

    main_before = time.thread_time()
    used = {}

    def second():
        _burn(BURN_THREAD)
        used["thread"] = time.thread_time()

    thread = threading.Thread(target=second)
    thread.start()
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    code = f"import time\nb = time.process_time()\nwhile time.process_time() - b < {BURN_CHILD}: pass\n"
    subprocess.run([sys.executable, "-c", code], check=True)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    _burn(BURN_MAIN)
    thread.join()
    child = (after.ru_utime + after.ru_stime) - (children.ru_utime + children.ru_stime)
    reference = time.thread_time() - main_before + used["thread"] + child
    return {"loss": value_at(config["x"], budget), "reference_cpu": reference, "child_cpu": child,
            "pid": float(os.getpid())}
