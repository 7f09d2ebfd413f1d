"""The objective of the corruption fuzzer's store (tests/faults/test_corruption_fuzz.py): resumable,
checkpoints every budget unit, reports every unit, and crashes on the first attempt of every
fourth trial, so that the store holds checkpoints, parts, blocks and failure records."""

from __future__ import annotations

import math


def resumable_flaky(ctx):
    x = ctx.config["x"]
    if ctx.trial % 4 == 1 and ctx.attempt == 1:  # attempts count from 1
        raise RuntimeError(f"trial {ctx.trial} fails on its first attempt, on purpose")
    state = ctx.state if ctx.state is not None else {"value": x, "step": 0}
    for step in range(ctx.start, ctx.budget):
        state = {"value": math.sin(state["value"] * 1.7 + step) + 0.01 * step, "step": step + 1}
        ctx.save(state, step + 1)
        ctx.report(step + 1, loss=(x - 0.3) ** 2 + state["value"] / (step + 2))
    return {"loss": (x - 0.3) ** 2 + state["value"] / (ctx.budget + 1)}
