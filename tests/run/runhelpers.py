"""Helpers shared by the execution-layer tests (a module of its own: conftest is not importable by name)."""

from __future__ import annotations

import os
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _worker_path() -> None:
    # Ray worker processes inherit this, so they import objectives_run as the test does.
    paths = [str(HERE), *[p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]]
    os.environ["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))


def spec_text(name: str, objective: str = "objectives_run:resumable", *, mode: str = "asha", trials: int = 20,
              min_budget: int = 1, max_budget: int = 9, extra: str = "", seed: int = 3) -> str:
    return f"""
name = "{name}"
objective = "{objective}"
metric = "loss"
better = "lower"
seed = {seed}

[ladder]
min = {min_budget}
max = {max_budget}
eta = 3
mode = "{mode}"

[sampler]
kind = "random"

[limits]
trials = {trials}
max_crashes = 1
{extra}
[resources]
cpus = 1

[space.x]
kind = "real"
lower = 0.0
upper = 1.0
"""
