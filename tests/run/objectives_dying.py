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
