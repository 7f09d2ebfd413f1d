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
