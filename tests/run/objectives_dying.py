"""Objectives that end their worker's life instead of raising (imported by Ray workers by path).

Each one does exactly what issue #10 found holding CPUs forever: ``raise SystemExit(3)``,
``os._exit(1)``, ``raise KeyboardInterrupt`` and a ``SIGKILL`` of its own process.
"""

from __future__ import annotations

import os
import signal


def exits_three(config, budget):
    raise SystemExit(3)


def exits_at_once(config, budget):
    os._exit(1)


def interrupts(config, budget):
    raise KeyboardInterrupt


def kills_itself(config, budget):
    os.kill(os.getpid(), signal.SIGKILL)


def fails_while_flagged(config, budget):
    """Raises while the file named by ``RUNGWAY_TEST_FLAG`` exists (a broken objective that
    gets fixed between two runs of a search); a plain quadratic otherwise."""
    if os.path.exists(os.environ["RUNGWAY_TEST_FLAG"]):
        raise RuntimeError("the flag is up")
    return {"loss": (config["x"] - 0.3) ** 2}


def hogs_memory(config, budget):
    """Asks for 2 GB when its trial reserved far less (``resources.memory_mb``)."""
    import numpy as np

    block = np.ones(2 * 2**30 // 8)
    return {"loss": float(block[0])}


# Which trials of the chaos run (tests/faults/test_chaos.py) die, and how: by the value of x.
CHAOS_BANDS = ((0.00, 0.03, "exit"), (0.03, 0.06, "signal"), (0.06, 0.09, "memory"))


def chaos_fate(x: float) -> str | None:
    return next((fate for low, high, fate in CHAOS_BANDS if low <= x < high), None)


def chaotic(config, budget):
    """``sleepy`` for most trials; a few end their worker (exit, SIGKILL) or go past their
    memory limit, on every attempt."""
    from objectives_run import sleepy

    fate = chaos_fate(config["x"])
    if fate == "exit":
        os._exit(5)
    if fate == "signal":
        os.kill(os.getpid(), signal.SIGKILL)
    if fate == "memory":
        return hogs_memory(config, budget)
    return sleepy(config, budget)
